"""Which pixels a spectrum sums, and the variance of a sum of beam-correlated noise."""
from __future__ import annotations

import math

import astropy.units as u
import numpy as np

from kinemap.errors import KinemapError
from kinemap.io.positions import position_pixels, show_position
from kinemap.units import to_value

__all__ = ["aperture", "beam_kernel", "correlated_sum_variance", "beam_area_pixels"]


def aperture(cube, *, at=None, radius=None, region=None) -> tuple[np.ndarray, str]:
    """``(pixels, description)``: boolean (ny, nx) map of the pixels a spectrum uses.

    ``at`` with ``radius``: a circle (``radius`` in arcsec; None or 0: the one pixel at
    ``at``).  ``region``: a region file (read by :mod:`kinemap.io.subset`, exclusion
    regions cut holes) or a boolean map.  Neither: every pixel (the global profile).  The
    cube's own footprint (a region given to the reader) always applies.
    """
    ny, nx = cube.shape[1:]
    if at is not None and region is not None:
        raise KinemapError("give either a position (--at) or a region (--region), not both")
    if at is not None:
        x0, y0 = position_pixels(at, cube.meta.wcs, (ny, nx), name="at")
        r = 0.0 if radius is None else float(to_value(radius, u.arcsec, name="radius"))
        if not (np.isfinite(r) and r >= 0):
            raise KinemapError(f"'radius' must be a positive angle in arcsec, got {radius!r}")
        yy, xx = np.indices((ny, nx), dtype=float)
        dist = np.hypot(xx - x0, yy - y0) * cube.meta.pixel_scale_arcsec
        pixels = dist <= r
        if not pixels.any():  # a radius smaller than half a pixel: the nearest pixel
            pixels[int(round(y0)), int(round(x0))] = True
        where = show_position(at)
        what = f"circle of radius {r:g} arcsec at {where}" if r > 0 else f"the pixel at {where}"
    elif region is not None:
        if isinstance(region, np.ndarray):
            if region.shape != (ny, nx):
                raise KinemapError(f"'region' map has shape {region.shape}, the cube's sky "
                                   f"plane {(ny, nx)}")
            pixels = region.astype(bool)
            what = "the given pixel map"
        else:
            from kinemap.io.subset import region_footprint

            pixels = region_footprint(str(region), cube.meta.wcs, (ny, nx))
            what = f"regions in {region}"
    else:
        pixels = np.ones((ny, nx), bool)
        what = "the whole map (global profile)"
    if cube.footprint is not None:
        pixels = pixels & cube.footprint
        what += f", inside the regions of {cube.meta.subset.get('region', 'the reader')}"
    if not pixels.any():
        raise KinemapError(f"the spectrum's aperture ({what}) holds no pixel of the cube; "
                           "move or widen it")
    return pixels, what


def beam_area_pixels(meta) -> float:
    """Solid angle of the Gaussian beam in pixels, pi/(4 ln 2) * BMAJ * BMIN / pixel area."""
    pix = meta.pixel_scale_arcsec
    return float(meta.beam.sr.to_value(u.arcsec ** 2) / pix ** 2)


def beam_kernel(meta) -> np.ndarray | None:
    """The beam on the pixel grid, peak 1 (north up, east left: ``BPA`` turns the major
    axis from north towards east), out to 4 sigma of the major axis; None without a beam."""
    beam = meta.beam
    if beam is None:
        return None
    pix = meta.pixel_scale_arcsec
    fwhm = 2.0 * math.sqrt(2.0 * math.log(2.0))
    smaj = beam.major.to_value(u.arcsec) / pix / fwhm
    smin = beam.minor.to_value(u.arcsec) / pix / fwhm
    half = int(math.ceil(4.0 * smaj))
    yy, xx = np.mgrid[-half:half + 1, -half:half + 1].astype(float)
    pa = math.radians(beam.pa.to_value(u.deg))
    # east is -x on the usual grid: the major axis points to (-sin PA, cos PA)
    along = -xx * math.sin(pa) + yy * math.cos(pa)
    across = xx * math.cos(pa) + yy * math.sin(pa)
    return np.exp(-0.5 * ((along / smaj) ** 2 + (across / smin) ** 2))


def correlated_sum_variance(sigma: np.ndarray, pixels: np.ndarray, kernel) -> float:
    """Variance of the sum of the noise over ``pixels``:
    sum_ij sigma_i sigma_j rho(x_i - x_j), with rho the beam (peak 1) when ``kernel`` is
    given (the noise of an interferometer image is correlated like its beam: common
    practice) and independent pixels otherwise.  Pixels with no noise estimate (NaN)
    contribute nothing."""
    w = np.where(pixels & np.isfinite(sigma), sigma, 0.0)
    if kernel is None:
        return float(np.sum(w ** 2))
    ys, xs = np.nonzero(w)
    if ys.size == 0:
        return float("nan")
    box = w[ys.min():ys.max() + 1, xs.min():xs.max() + 1]
    from scipy.signal import fftconvolve

    smooth = fftconvolve(box, kernel, mode="same")
    return float(np.sum(box * smooth))
