"""Subsets of a cube: a velocity range, a pixel box, a region file (DS9 or CRTF)."""
from __future__ import annotations

import os
import warnings

import numpy as np

from kinemap.units import KMS, to_value
from kinemap.errors import KinemapError

__all__ = ["channel_range", "parse_box", "region_footprint", "select_channels"]


def channel_range(velocity: np.ndarray, vrange) -> slice:
    """Channels whose centre velocity (km/s) lies inside ``vrange`` = (v1, v2), inclusive."""
    if vrange is None:
        return slice(0, velocity.size)
    try:
        v1, v2 = vrange
    except (TypeError, ValueError):
        raise KinemapError(f"'vrange' must be two velocities like '-50,120' (km/s), got {vrange!r}") from None
    lo, hi = sorted((to_value(v1, KMS, name="vrange"), to_value(v2, KMS, name="vrange")))
    idx = np.flatnonzero((velocity >= lo) & (velocity <= hi))
    if idx.size < 3:
        raise KinemapError(
            f"'vrange' {lo:g} to {hi:g} km/s keeps {idx.size} channel(s); the cube covers "
            f"{velocity.min():.4g} to {velocity.max():.4g} km/s; widen the range")
    return slice(int(idx[0]), int(idx[-1]) + 1)


def parse_box(box, shape_yx) -> tuple[slice, slice]:
    """A pixel box 'x0:x1,y0:y1' (0-based, end exclusive) or a 4-sequence (x0, x1, y0, y1)."""
    ny, nx = shape_yx
    if box is None:
        return slice(0, ny), slice(0, nx)
    try:
        if isinstance(box, str):
            xs, ys = box.split(",")
            x0, x1 = (int(t) for t in xs.split(":"))
            y0, y1 = (int(t) for t in ys.split(":"))
        else:
            x0, x1, y0, y1 = (int(t) for t in box)
    except (ValueError, TypeError):
        raise KinemapError(f"'box' must look like 'x0:x1,y0:y1' in pixels, got {box!r}") from None
    x0, x1, y0, y1 = max(x0, 0), min(x1, nx), max(y0, 0), min(y1, ny)
    if x1 - x0 < 1 or y1 - y0 < 1:
        raise KinemapError(f"'box' {box!r} selects no pixels of a {nx} x {ny} map")
    return slice(y0, y1), slice(x0, x1)


def region_footprint(path, wcs, shape_yx) -> np.ndarray:
    """Boolean (ny, nx) map of the regions in ``path``: True inside the union of the
    include regions (the whole map when there are none) and outside every exclusion region
    (DS9 ``-circle(...)``, CRTF ``-circle[...]``), as DS9 and CASA read such files."""
    import regions

    if not os.path.exists(path):
        raise KinemapError(f"region file not found: {path}")
    if not os.path.isfile(path):
        raise KinemapError(f"region file {path} is not a regular file (a folder or a pipe?); "
                           "give a DS9 or CRTF region file")
    fmt = "crtf" if open(path, errors="replace").read(200).lstrip().startswith("#CRTF") else "ds9"
    # regions' notes on a file it then refuses would precede the one error line
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            regs = regions.Regions.read(path, format=fmt)
        except Exception as exc:  # regions raises many types for bad files
            reason = " ".join(str(exc).split())[:200]
            raise KinemapError(f"could not read region file {path} as {fmt.upper()}: "
                               f"{reason}") from None
    if len(regs) == 0:
        raise KinemapError(f"region file {path} holds no regions")
    include = [r for r in regs if r.meta.get("include", True) not in (False, 0)]
    exclude = [r for r in regs if r.meta.get("include", True) in (False, 0)]
    out = _union(include, wcs, shape_yx) if include else np.ones(shape_yx, bool)
    if exclude:
        out &= ~_union(exclude, wcs, shape_yx)
    if not out.any():
        raise KinemapError(f"the regions in {path} leave no pixel of the cube")
    return out


def _union(regs, wcs, shape_yx) -> np.ndarray:
    """True inside any of ``regs`` (sky or pixel regions) on the (ny, nx) pixel grid."""
    import regions

    out = np.zeros(shape_yx, bool)
    for reg in regs:
        pix = reg if isinstance(reg, regions.PixelRegion) else reg.to_pixel(wcs)
        try:
            img = pix.to_mask(mode="center").to_image(shape_yx)
        except ValueError:  # a region whose position does not project onto this map (NaN)
            continue
        if img is not None:
            out |= img.astype(bool)
    return out


def select_channels(cube, vrange):
    """``(cube, channels)``: the cube cut to the channels inside ``vrange`` (see
    :func:`channel_range`) and the slice of the original channels it keeps."""
    from dataclasses import replace

    cs = channel_range(cube.velocity, vrange)
    source = cube.source
    if source is not None:
        c0 = source.channels[0]
        source = replace(source, channels=(c0 + cs.start, c0 + cs.stop))
    meta = cube.meta
    if meta.wcs3d is not None:
        meta = replace(meta, wcs3d=meta.wcs3d.slice((cs, slice(None), slice(None))))
    return replace(cube, data=cube.data[cs], velocity=cube.velocity[cs],
                   spectral=cube.spectral[cs], meta=meta, source=source), cs
