"""``kinemap info``: a plain-text account of what the reader understood about a cube."""
from __future__ import annotations

import astropy.units as u
import numpy as np

from kinemap.io.reader import read_cube
from kinemap.maps.continuum import subtract_continuum
from kinemap.maps.noise import estimate_noise
from kinemap.pipeline import adapters as ad

__all__ = ["describe"]


def describe(cfg: dict) -> str:
    cube = read_cube(cfg["input"]["cube"], **ad.read_kwargs(cfg))
    m = cube.meta
    nchan, ny, nx = cube.shape
    v = cube.velocity
    dv = np.median(cube.channel_width)
    lines = [
        f"file            {m.source}  (sha256 {m.checksum[:16]}...)",
        f"shape           {nchan} channels x {ny} x {nx} pixels (spectral, y, x)",
        f"celestial axes  {m.wcs.wcs.ctype[0]}, {m.wcs.wcs.ctype[1]}; pixel "
        f"{m.pixel_scale_arcsec:.3g} arcsec",
        f"spectral axis   {m.ctype_original}" + (f" (read as {m.ctype})" if m.ctype != m.ctype_original else "")
        + f", {cube.spectral[0]:.6g} to {cube.spectral[-1]:.6g}",
        f"velocity        {v.min():.4f} to {v.max():.4f} km/s, channel {dv:.4g} km/s, "
        f"{'increasing' if v[-1] > v[0] else 'decreasing'} with channel",
        f"convention      {m.convention} (axis' own: {m.native_convention})",
        f"rest value      {_rest(m)}",
        f"frame           {m.frame or 'unknown (no SPECSYS)'}",
        f"beam            {_beam(m)}",
        f"unit            {m.bunit.to_string() or 'arbitrary'}" + (" (no BUNIT in header)" if m.bunit_missing else ""),
        f"memory-mapped   {'yes' if m.memmapped else 'no (scaled or compressed data)'}",
    ]
    if m.subset:
        lines.append(f"subset          {m.subset}")
    continuum = subtract_continuum(cube, **ad.continuum_kwargs(cfg))
    lines.append(f"continuum       {continuum.message.removeprefix('continuum: ')}")
    noise = estimate_noise(continuum.cube, **ad.noise_kwargs(cfg))
    lines.append(f"noise           median {noise.median:.4g} {m.bunit.to_string() or ''} per "
                 f"channel ({noise.method})")
    if m.repairs:
        lines.append("header repairs:")
        lines += [f"  - {r}" for r in m.repairs]
    else:
        lines.append("header repairs  none")
    return "\n".join(lines)


def _rest(m):
    if m.rest_value is None:
        return "none (velocity axis used as it is)"
    r = m.rest_value
    if r.unit.is_equivalent(u.Hz):
        return f"{r.to(u.MHz):.9g}"
    return f"{r.to(u.Angstrom):.6g} ({m.medium or 'vacuum'})"


def _beam(m):
    b = m.beam
    if b is None:
        return "none"
    return (f"{b.major.to_value(u.arcsec):.3g} x {b.minor.to_value(u.arcsec):.3g} arcsec, "
            f"PA {b.pa.to_value(u.deg):.1f} deg")
