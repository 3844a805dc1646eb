"""A spectrum at a position, in a region or over the whole map: ``kinemap spectrum``.

Jy/beam cubes are summed over the aperture's pixels and divided by the beam area in
pixels, which gives a flux density in Jy (a point source of S Jy gives S); cubes of a
flux per pixel (Jy/pixel, erg/s/cm2/Angstrom per spaxel) are summed.  Brightness cubes
(K, surface brightness per solid angle, no unit) are averaged over the pixels.  The error of each channel is the noise of that sum or mean with the noise of
neighbouring pixels correlated like the beam.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import ClassVar

import astropy.units as u
import numpy as np
from astropy.table import QTable

from kinemap.errors import KinemapError
from kinemap.extract._aperture import (aperture, beam_area_pixels, beam_kernel,
                                       correlated_sum_variance)
from kinemap.extract._profile import fit_gaussian, line_moments
from kinemap.io.products import Product
from kinemap.io.results import StageResult
from kinemap.units import KMS

__all__ = ["extract_spectrum", "SpectrumResult"]

_PER_BEAM = u.Jy / u.beam
_PER_PIXEL = u.Jy / u.pix
_CHUNK_BYTES = 64 * 2 ** 20  # channels read at a time over the aperture's bounding box


@dataclass(frozen=True)
class SpectrumResult(StageResult):
    """One spectrum with errors, a Gaussian fit and its moments.

    Attributes
    ----------
    table : QTable
        Columns ``velocity`` (km/s), ``frequency`` or ``wavelength`` (as on the cube's
        axis, when it is not a velocity axis), ``flux``, ``flux_err``, ``n_pixels`` (pixels
        with data in each channel); ``meta`` says how the flux was made, the Gaussian fit
        and the moments.
    pixels : ndarray of bool (ny, nx)
        The aperture.
    mode : 'sum' or 'mean'
    meta : CubeMeta
    """

    name: ClassVar[str] = "spectrum"

    table: QTable
    pixels: np.ndarray
    mode: str
    meta: object = None
    seconds: float = 0.0
    settings: dict = field(default_factory=dict)

    @property
    def fit(self) -> dict:
        return self.table.meta["gaussian_fit"]

    @property
    def moments(self) -> dict:
        return self.table.meta["moments"]

    def products(self) -> list[Product]:
        return [Product("spectrum", self.table, self.table["flux"].unit,
                        "spectrum " + self.table.meta["aperture"], kind="table")]

    def summary(self) -> dict:
        f, m = self.fit, self.moments
        return {"aperture": self.table.meta["aperture"], "n_pixels": int(self.pixels.sum()),
                "flux": self.table.meta["flux"], "unit": str(self.table["flux"].unit),
                "fit_status": f["status"], "fit_centre_kms": f["centre"],
                "fit_dispersion_kms": f["dispersion"], "integrated": m["integrated"],
                "integrated_err": m["integrated_err"]}

    def systemic_velocity(self) -> float | None:
        c = self.fit["centre"]
        return c if np.isfinite(c) else None


def _flux_mode(meta):
    """('sum' | 'mean', output unit, scale): how channel values of the aperture combine."""
    bunit = meta.bunit
    if bunit.is_equivalent(_PER_BEAM):
        if meta.beam is None:
            raise KinemapError(f"the cube is in {bunit} but has no beam, so a flux density "
                               "cannot be made; give the beam with --beam (e.g. '10arcsec')")
        scale = bunit.to(_PER_BEAM) / beam_area_pixels(meta)
        return "sum", u.Jy, scale
    if bunit.is_equivalent(_PER_PIXEL):
        return "sum", u.Jy, bunit.to(_PER_PIXEL)
    if any(t in ("spectral flux density", "spectral flux density wav")
           for t in str(bunit.physical_type).split("/")):
        return "sum", bunit, 1.0  # a flux per pixel (spaxel) adds up
    return "mean", bunit, 1.0


def _channel_sums(cube, pixels):
    """(sum of finite values per channel, finite pixels per channel) over ``pixels``,
    reading the aperture's bounding box a few channels at a time."""
    ys, xs = np.nonzero(pixels)
    rs, cs = slice(ys.min(), ys.max() + 1), slice(xs.min(), xs.max() + 1)
    sub = pixels[rs, cs]
    nchan = cube.nchan
    step = max(1, int(_CHUNK_BYTES // max(1, sub.size * 8)))
    total, count = np.zeros(nchan), np.zeros(nchan, dtype=np.int64)
    for c0 in range(0, nchan, step):
        block = np.asarray(cube.data[c0:c0 + step, rs, cs], dtype=np.float64)
        block = np.where(sub[None], block, np.nan)
        total[c0:c0 + step] = np.nansum(block, axis=(1, 2))
        count[c0:c0 + step] = np.isfinite(block).sum(axis=(1, 2))
    return total, count


def _spectral_column(cube):
    spec = cube.spectral
    if spec.unit.is_equivalent(u.Hz):
        return "frequency", spec.to(u.GHz)
    if spec.unit.is_equivalent(u.m):
        return "wavelength", spec.to(u.AA)
    return None, None


def extract_spectrum(cube, *, at=None, radius=None, region=None, noise=None,
                     snr_threshold: float = 3.0) -> SpectrumResult:
    """The spectrum of ``cube`` at a position, in a region, or over the whole map.

    Parameters
    ----------
    cube : kinemap.io.Cube, or anything :func:`kinemap.read_cube` reads
    at : str or SkyCoord, optional
        'RA,DEC' (degrees or sexagesimal) of the aperture's centre.
    radius : Quantity or float, optional
        Radius of the circular aperture at ``at`` (arcsec); None: the one pixel there.
    region : path or ndarray of bool, optional
        DS9 or CRTF region file (exclusion regions cut holes) or a (ny, nx) pixel map.
        With neither ``at`` nor ``region``: every pixel, the global profile.
    noise : kinemap.maps.NoiseMap, optional
        Per-pixel noise for the errors; estimated with :func:`kinemap.estimate_noise`'s
        defaults when not given.
    snr_threshold : float
        The Gaussian is fitted only when the peak exceeds this many times its error.

    Returns
    -------
    SpectrumResult
        Per-beam cubes: ``flux`` is the sum over the aperture / beam area in pixels (Jy);
        fluxes per pixel: the sum; others (K, per solid angle, no unit): the mean over the
        aperture, in the cube's unit.  NaN channels of a
        pixel are left out of that channel's sum (``n_pixels`` counts the rest).
    """
    t0 = time.perf_counter()
    if not hasattr(cube, "meta") or not hasattr(cube, "velocity"):
        from kinemap.io.reader import read_cube

        cube = read_cube(cube)
    mode, unit, scale = _flux_mode(cube.meta)
    pixels, what = aperture(cube, at=at, radius=radius, region=region)
    if noise is None:
        from kinemap.maps.noise import estimate_noise

        noise = estimate_noise(cube)
    total, count = _channel_sums(cube, pixels)
    kernel = beam_kernel(cube.meta)
    sum_err = np.sqrt(correlated_sum_variance(noise.sigma, pixels, kernel))
    npix = int(pixels.sum())
    if mode == "sum":
        flux, err = total * scale, np.full(total.shape, sum_err * scale)
        how = (f"sum over the aperture's pixels divided by the beam area "
               f"({beam_area_pixels(cube.meta):.4g} pixels): flux density"
               if cube.meta.bunit.is_equivalent(_PER_BEAM)
               else "sum over the aperture's pixels (a flux per pixel adds up)")
    else:
        with np.errstate(invalid="ignore", divide="ignore"):
            flux = np.where(count > 0, total / count, np.nan)
        err = np.full(total.shape, sum_err / npix)
        how = "mean over the aperture's pixels (a brightness, not summed)"
    flux = np.where(count > 0, flux, np.nan)
    v = np.asarray(cube.velocity, float)
    fit = fit_gaussian(v, flux, err, snr_threshold=snr_threshold)
    if fit["status"] == "ok":
        window = (fit["centre"] - 3 * fit["dispersion"], fit["centre"] + 3 * fit["dispersion"])
        wnote = "centre +- 3 dispersions of the Gaussian fit"
    else:
        window, wnote = (float(np.nanmin(v)), float(np.nanmax(v))), "the whole band"
    moments = line_moments(v, flux, err, cube.channel_width, window)
    moments["window_note"] = wnote
    table = QTable()
    table["velocity"] = v * KMS
    name, spec = _spectral_column(cube)
    if name:
        table[name] = spec
    table["flux"] = flux * unit
    table["flux_err"] = err * unit
    table["n_pixels"] = count
    table.meta.update({
        "aperture": what, "n_pixels": npix, "flux": how, "mode": mode,
        "flux_err": ("noise map summed with the noise correlated like the beam"
                     if kernel is not None else "noise map, pixels taken as independent (no beam)"),
        "velocity_convention": cube.meta.convention, "frame": cube.meta.frame,
        "rest_value": None if cube.meta.rest_value is None else str(cube.meta.rest_value),
        "source": cube.meta.source, "gaussian_fit": {**fit, "unit_velocity": "km/s",
                                                    "unit_amplitude": str(unit)},
        "moments": {**moments, "unit_integrated": str(unit * KMS)},
    })
    return SpectrumResult(table=table, pixels=pixels, mode=mode, meta=cube.meta,
                          seconds=time.perf_counter() - t0,
                          settings={"at": None if at is None else str(at),
                                    "radius": None if radius is None else str(radius),
                                    "region": None if region is None or isinstance(region, np.ndarray)
                                    else str(region)})
