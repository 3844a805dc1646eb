"""Velocity gradients: a plane fitted to the whole field, and local planes in a moving window.

The plane is v = v0 + g_x dx + g_y dy on pixel offsets, fitted by weighted least squares
(weights 1/sigma_v^2; Goodman et al. 1993, ApJ 406, 528 fit the same plane).  The
gradient on the sky follows from the linear map of pixel offsets to offsets east and
north, (east, north) = M (dx, dy), with M the celestial WCS's pixel-scale matrix: a
plane in pixels is a plane on the sky, and g_sky = M^-T g_pix (the covariance goes the
same way).  The magnitude is |g| and the direction the position angle of steepest
increase, east of north, 0-360 deg.

Errors: the formal covariance scaled by the reduced chi^2 of the residuals (a real
velocity field is not a plane; the residuals set the scale).  Residuals that are
spatially correlated (turbulence) make even these errors optimistic; the summary says
so.  The local fit sums the same normal equations over a disc of the chosen diameter
with FFT convolutions, so a map of any size costs a few FFTs.
"""
from __future__ import annotations

import math

import numpy as np
from scipy.signal import fftconvolve

from kinemap.errors import KinemapError

__all__ = ["sky_matrix", "plane_fit", "local_gradients", "gradient_direction"]


def sky_matrix(wcs=None, *, pixel_scale: float | None = None) -> np.ndarray:
    """2x2 matrix (arcsec per pixel) taking pixel offsets (dx, dy) to (east, north) offsets.

    From a celestial WCS (its pixel-scale matrix, exact in the projection plane near the
    reference point) or, without one, the usual orientation: east is -x, north is +y.
    """
    if wcs is not None:
        m = np.asarray(wcs.celestial.pixel_scale_matrix, float) * 3600.0
        # the first world axis is the longitude, which grows to the east
        return m
    if not pixel_scale or pixel_scale <= 0:
        raise KinemapError("a pixel scale (arcsec) or a celestial WCS is needed for gradients")
    return np.array([[-pixel_scale, 0.0], [0.0, pixel_scale]])


def gradient_direction(g_east, g_north, cov=None):
    """Magnitude, position angle (deg east of north, 0-360) and their 1-sigma errors of a
    gradient (g_east, g_north) with covariance ``cov`` (2x2, or stacked (..., 2, 2))."""
    ge, gn = np.asarray(g_east, float), np.asarray(g_north, float)
    mag = np.hypot(ge, gn)
    pa = np.degrees(np.arctan2(ge, gn)) % 360.0
    if cov is None:
        return mag, pa, None, None
    cov = np.asarray(cov, float)
    cee, cnn, cen = cov[..., 0, 0], cov[..., 1, 1], cov[..., 0, 1]
    with np.errstate(invalid="ignore", divide="ignore"):
        # first-order propagation: d|g| = (ge dge + gn dgn)/|g|, dPA = (gn dge - ge dgn)/|g|^2
        mag_err = np.sqrt(np.clip(ge ** 2 * cee + gn ** 2 * cnn + 2 * ge * gn * cen, 0, None)) / mag
        pa_err = np.degrees(np.sqrt(np.clip(gn ** 2 * cee + ge ** 2 * cnn - 2 * ge * gn * cen,
                                            0, None)) / mag ** 2)
    return mag, pa, mag_err, pa_err


def _to_sky(g_pix, cov_pix, m):
    minv_t = np.linalg.inv(m).T
    g = np.einsum("ij,...j->...i", minv_t, g_pix)
    cov = np.einsum("ij,...jk,lk->...il", minv_t, cov_pix, minv_t)
    return g, cov


def plane_fit(velocity, velocity_err=None, *, matrix) -> dict:
    """Weighted least-squares plane through a velocity map (Goodman et al. 1993).

    Parameters
    ----------
    velocity, velocity_err : ndarray (ny, nx)
        km/s; NaN where there is no data.  Without errors every pixel weighs the same.
    matrix : ndarray (2, 2)
        :func:`sky_matrix`: arcsec east and north per pixel step in x and y.

    Returns
    -------
    dict
        ``v0`` (km/s at the weighted centroid of the pixels, ``x0``, ``y0``), ``gradient``
        (km/s/arcsec), ``gradient_err``, ``position_angle`` and ``position_angle_err``
        (deg east of north, direction of increasing velocity), ``g_east``, ``g_north``
        and their covariance ``cov`` (km/s/arcsec), ``v0_err``, ``chi2_reduced``,
        ``npixels``, ``model`` (the plane on the map).
    """
    v = np.asarray(velocity, float)
    ok = np.isfinite(v)
    w = np.ones_like(v)
    if velocity_err is not None:
        e = np.asarray(velocity_err, float)
        ok &= np.isfinite(e) & (e > 0)
        w = np.where(ok, 1.0 / np.where(ok, e, 1.0) ** 2, 0.0)
    n = int(ok.sum())
    if n < 4:
        raise KinemapError("a plane fit needs at least 4 pixels with a velocity; lower the S/N "
                           "threshold or check the mask")
    yy, xx = np.nonzero(ok)
    ww, vv = w[ok], v[ok]
    x0, y0 = np.average(xx, weights=ww), np.average(yy, weights=ww)
    a = np.column_stack([np.ones(n), xx - x0, yy - y0])
    normal = a.T @ (ww[:, None] * a)
    if np.linalg.cond(normal) > 1e12:
        raise KinemapError("the pixels with a velocity lie on a line; a plane cannot be fitted")
    cov = np.linalg.inv(normal)
    beta = cov @ (a.T @ (ww * vv))
    chi2 = float(np.sum(ww * (vv - a @ beta) ** 2)) / max(n - 3, 1)
    cov = cov * chi2
    g, gcov = _to_sky(beta[1:], cov[1:, 1:], matrix)
    mag, pa, mag_err, pa_err = gradient_direction(g[0], g[1], gcov)
    yg, xg = np.mgrid[0:v.shape[0], 0:v.shape[1]]
    return {"v0": float(beta[0]), "v0_err": float(math.sqrt(cov[0, 0])), "x0": float(x0),
            "y0": float(y0), "g_east": float(g[0]), "g_north": float(g[1]), "cov": gcov,
            "gradient": float(mag), "gradient_err": float(mag_err),
            "position_angle": float(pa), "position_angle_err": float(pa_err),
            "chi2_reduced": chi2, "npixels": n,
            "model": beta[0] + beta[1] * (xg - x0) + beta[2] * (yg - y0)}


def _disc(diameter_pix: float) -> np.ndarray:
    r = 0.5 * diameter_pix
    h = int(math.floor(r))
    yy, xx = np.mgrid[-h:h + 1, -h:h + 1]
    return (xx ** 2 + yy ** 2 <= r ** 2).astype(float)


def local_gradients(velocity, velocity_err=None, *, matrix, window_pix: float,
                    min_fraction: float = 0.5) -> dict:
    """Plane fits in a disc of ``window_pix`` pixels (diameter) around every pixel.

    A pixel gets a gradient when at least ``min_fraction`` of its disc holds valid
    velocities (fewer make a lever arm too short to trust) and at least 6 pixels.

    Returns
    -------
    dict of ndarray (ny, nx)
        ``gradient``, ``gradient_err`` (km/s/arcsec), ``position_angle``,
        ``position_angle_err`` (deg east of north), ``npixels``; NaN where not fitted.
    """
    v = np.asarray(velocity, float)
    ok = np.isfinite(v)
    w = ok.astype(float)
    if velocity_err is not None:
        e = np.asarray(velocity_err, float)
        ok &= np.isfinite(e) & (e > 0)
        w = np.where(ok, 1.0 / np.where(ok, e, 1.0) ** 2, 0.0)
    kernel = _disc(window_pix)
    if kernel.sum() < 7:
        raise KinemapError(f"the gradient window is {window_pix:.1f} pixels across; give at "
                           "least 3 pixels (gradient_window in arcsec)")
    yy, xx = np.mgrid[0:v.shape[0], 0:v.shape[1]].astype(float)
    vc = np.where(ok, v - np.nanmedian(v[ok]), 0.0)  # small numbers: the sums lose nothing
    terms = {"n": ok.astype(float), "w": w, "x": w * xx, "y": w * yy, "xx": w * xx * xx,
             "yy": w * yy * yy, "xy": w * xx * yy, "v": w * vc, "vx": w * vc * xx,
             "vy": w * vc * yy, "vv": w * vc * vc}
    s = {k: fftconvolve(t, kernel, mode="same") for k, t in terms.items()}
    npix = np.rint(s["n"]).astype(int)
    # central moments about the window's weighted centroid (no cancellation worth a bit)
    with np.errstate(invalid="ignore", divide="ignore"):
        mx, my, mv = s["x"] / s["w"], s["y"] / s["w"], s["v"] / s["w"]
        sxx = s["xx"] - s["w"] * mx * mx
        syy = s["yy"] - s["w"] * my * my
        sxy = s["xy"] - s["w"] * mx * my
        svx = s["vx"] - s["w"] * mv * mx
        svy = s["vy"] - s["w"] * mv * my
        svv = s["vv"] - s["w"] * mv * mv
        det = sxx * syy - sxy ** 2
        gx = (syy * svx - sxy * svy) / det
        gy = (sxx * svy - sxy * svx) / det
        chi2 = np.clip(svv - gx * svx - gy * svy, 0, None) / np.maximum(npix - 3, 1)
        cov = np.stack([np.stack([syy, -sxy], -1), np.stack([-sxy, sxx], -1)], -2) \
            / det[..., None, None] * chi2[..., None, None]
    valid = (ok & (npix >= max(6, min_fraction * kernel.sum())) & (det > 1e-9 * s["w"] ** 2)
             & np.isfinite(gx) & np.isfinite(gy))
    g, gcov = _to_sky(np.stack([gx, gy], -1), cov, matrix)
    mag, pa, mag_err, pa_err = gradient_direction(g[..., 0], g[..., 1], gcov)
    nan = np.nan
    return {"gradient": np.where(valid, mag, nan), "gradient_err": np.where(valid, mag_err, nan),
            "position_angle": np.where(valid, pa, nan),
            "position_angle_err": np.where(valid, pa_err, nan),
            "npixels": np.where(valid, npix, 0)}
