"""Smoothing of ring-by-ring geometry in radius (private)."""
from __future__ import annotations

import numpy as np


def polynomial(radius, values, errors, degree, *, clip=4.0):
    """Weighted polynomial in radius, one 4-sigma (MAD) clipping pass; returns (fit, err).

    Rings with NaN values are ignored in the fit but still get the evaluated polynomial.
    ``err`` is the 1-sigma uncertainty of the polynomial at each radius (covariance scaled
    by the reduced chi^2 of the fit, so ring errors that are too small or too large do not
    matter, only their ratios).
    """
    radius = np.asarray(radius, float)
    ok = np.isfinite(values) & np.isfinite(errors)
    out = np.full(radius.size, np.nan)
    err = np.full(radius.size, np.nan)
    if ok.sum() == 0:
        return out, err
    e = np.where(errors > 0, errors, np.nan)
    floor = np.nanmedian(e[ok]) * 0.1 if np.isfinite(e[ok]).any() else 1.0
    e = np.where(np.isfinite(e), np.maximum(e, floor), floor if floor > 0 else 1.0)
    use = ok.copy()
    for _ in range(2):
        deg = int(min(degree, use.sum() - 1))
        if deg < 0:
            return out, err
        x = radius[use] / max(radius.max(), 1e-12)
        coef, cov = _wpolyfit(x, values[use], e[use], deg)
        model = np.polyval(coef, radius / max(radius.max(), 1e-12))
        resid = (values - model) / e
        mad = 1.4826 * np.nanmedian(np.abs(resid[use] - np.nanmedian(resid[use])))
        new = ok & (np.abs(resid) <= clip * max(mad, 1e-12))
        if new.sum() <= deg or np.array_equal(new, use):
            break
        use = new
    xs = radius / max(radius.max(), 1e-12)
    vander = np.vander(xs, len(coef))
    out = vander @ coef
    err = np.sqrt(np.einsum("ij,jk,ik->i", vander, cov, vander))
    return out, err


def _wpolyfit(x, y, e, deg):
    vander = np.vander(x, deg + 1)
    a = vander / e[:, None]
    b = y / e
    coef, *_ = np.linalg.lstsq(a, b, rcond=None)
    dof = x.size - (deg + 1)
    chi2 = float(np.sum((a @ coef - b) ** 2))
    scale = chi2 / dof if dof > 0 else 1.0
    try:
        cov = np.linalg.inv(a.T @ a) * scale
    except np.linalg.LinAlgError:
        cov = np.full((deg + 1, deg + 1), np.nan)
    return coef, cov


def running_median(values, errors, *, max_error_ratio=3.0):
    """Running median over 3 rings with Tukey's end-point rule; NaN rings skipped.

    Within each window, rings whose error exceeds ``max_error_ratio`` times the smallest
    error there are left out, so a single poorly determined ring (often an inner one)
    does not pull its neighbours; the rest enter a plain median, which follows a linear
    warp exactly.  The end rings get median(own, s1, 3 s1 - 2 s2) with s the smoothed
    neighbours (Tukey 1977, Exploratory Data Analysis), which also keeps a linear trend.
    The error returned is the median of the ring errors used.
    """
    values = np.asarray(values, float)
    errors = np.asarray(errors, float)
    out = np.full(values.size, np.nan)
    err = np.full(values.size, np.nan)
    idx = np.nonzero(np.isfinite(values))[0]
    v, e = values[idx], errors[idx]
    m = v.size
    if m == 0:
        return out, err
    if m < 3:
        out[idx], err[idx] = np.median(v), np.median(e) if np.isfinite(e).any() else np.nan
        return out, err
    sm = v.copy()
    se = e.copy()
    for i in range(1, m - 1):
        seg, seg_e = v[i - 1:i + 2], e[i - 1:i + 2]
        use = np.ones(3, bool)
        good_e = np.isfinite(seg_e) & (seg_e > 0)
        if good_e.any():
            use &= ~np.isfinite(seg_e) | (seg_e <= max_error_ratio * seg_e[good_e].min())
        sm[i] = np.median(seg[use])
        se[i] = np.median(seg_e[use]) if np.isfinite(seg_e[use]).any() else np.nan
    for end, n1, n2 in ((0, 1, 2), (m - 1, m - 2, m - 3)):
        extrap = 3 * sm[n1] - 2 * sm[n2]
        own_ok = not (np.isfinite(e[end]) and np.isfinite(e[n1]) and e[n1] > 0 and e[end] > max_error_ratio * e[n1])
        sm[end] = np.median([v[end], sm[n1], extrap]) if own_ok else sm[n1]
        se[end] = e[end] if own_ok else e[n1]
    out[idx], err[idx] = sm, se
    return out, err
