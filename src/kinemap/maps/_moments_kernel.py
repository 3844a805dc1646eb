"""Compiled moment kernel: all moment maps and their errors in three passes per spectrum.

Same formulas as :mod:`kinemap.maps.moments` (the docstring there is the reference).  The
per-spectrum work is :func:`spectrum_moments`, shared by :func:`moments_kernel` (moments
alone) and the fused noise-and-moments pass (:mod:`kinemap.maps._fused_kernel`), so the two
paths cannot drift apart.
"""
from __future__ import annotations

import numba
import numpy as np

# Which channels count: 0 every finite channel, 1 value > threshold * sigma, 2 a given mask,
# 3 both (a threshold inside the user's mask)
USE_FINITE, USE_THRESHOLD, USE_MASK, USE_MASK_THRESHOLD = 0, 1, 2, 3


@numba.njit(cache=True, nogil=True)
def _use(mode, x, thr_sigma, mask_val):
    if not np.isfinite(x):
        return False
    if mode == 1:
        return x > thr_sigma
    if mode == 2:
        return mask_val
    if mode == 3:
        return mask_val and x > thr_sigma
    return True


@numba.njit(cache=True, nogil=True)
def spectrum_moments(spec, velocity, dv, mode, threshold, sigma_p, mask, p, inside, rho, out):
    """Moments of one spectrum ``spec`` (nchan,) into column ``p`` of ``out`` (9, npix).

    ``spec`` may be float32 or float64 and strided: every product with the float64 channel
    widths and velocities is float64, so the sums are the same either way.  ``sigma_p`` is
    the spectrum's noise, ``mask`` the (nchan, npix) voxel mask (read in modes 2 and 3),
    ``inside`` False for pixels outside the footprint.
    """
    nchan = spec.shape[0]
    nlag = rho.shape[0]
    nan = np.nan
    if not inside:
        for k in range(8):
            out[k, p] = nan
        out[8, p] = 0.0
        return
    thr = threshold * sigma_p
    S = 0.0
    Sv = 0.0
    n = 0
    peak = -np.inf
    ipk = -1
    for c in range(nchan):
        x = spec[c]
        if _use(mode, x, thr, mask[c, p] if mode >= 2 else True):
            w = x * dv[c]
            S += w
            Sv += w * velocity[c]
            n += 1
            if x > peak:
                peak = x
                ipk = c
    out[8, p] = n
    if n == 0:
        for k in range(8):
            out[k, p] = nan
        return
    out[0, p] = S
    out[6, p] = peak
    out[7, p] = velocity[ipk]
    s2 = sigma_p * sigma_p
    # error of moment 0: weights dv_i on used channels, banded correlation
    v0 = 0.0
    prev1 = 0.0
    prev2 = 0.0
    for c in range(nchan):
        x = spec[c]
        w = dv[c] if _use(mode, x, thr, mask[c, p] if mode >= 2 else True) else 0.0
        v0 += w * w
        if nlag > 1:
            v0 += 2.0 * rho[1] * w * prev1
        if nlag > 2:
            v0 += 2.0 * rho[2] * w * prev2
        prev2 = prev1
        prev1 = w
    out[3, p] = np.sqrt(s2 * v0)
    if not S > 0.0:
        out[1, p] = nan
        out[2, p] = nan
        out[4, p] = nan
        out[5, p] = nan
        return
    m1 = Sv / S
    M2 = 0.0
    for c in range(nchan):
        x = spec[c]
        if _use(mode, x, thr, mask[c, p] if mode >= 2 else True):
            d = velocity[c] - m1
            M2 += x * dv[c] * d * d
    M2 /= S
    out[1, p] = m1
    v1 = 0.0
    v2 = 0.0
    a1 = 0.0
    a2 = 0.0
    b1 = 0.0
    b2 = 0.0
    for c in range(nchan):
        x = spec[c]
        if _use(mode, x, thr, mask[c, p] if mode >= 2 else True):
            d = velocity[c] - m1
            w1 = dv[c] * d / S
            w2 = dv[c] * (d * d - M2) / S
        else:
            w1 = 0.0
            w2 = 0.0
        v1 += w1 * w1
        v2 += w2 * w2
        if nlag > 1:
            v1 += 2.0 * rho[1] * w1 * a1
            v2 += 2.0 * rho[1] * w2 * b1
        if nlag > 2:
            v1 += 2.0 * rho[2] * w1 * a2
            v2 += 2.0 * rho[2] * w2 * b2
        a2 = a1
        a1 = w1
        b2 = b1
        b1 = w2
    out[4, p] = np.sqrt(s2 * v1)
    if n == 1:
        # one channel: the velocity is only known to within the channel (top-hat
        # sigma dv/sqrt(12)), and there is no width to measure
        out[4, p] = dv[ipk] / np.sqrt(12.0)
        out[2, p] = nan
        out[5, p] = nan
        return
    if M2 >= 0.0:
        m2 = np.sqrt(M2)
        out[2, p] = m2
        out[5, p] = np.sqrt(s2 * v2) / (2.0 * m2) if m2 > 0.0 else nan
    else:
        out[2, p] = nan
        out[5, p] = nan


@numba.njit(parallel=True, cache=True, nogil=True)
def moments_kernel(data, velocity, dv, mode, threshold, sigma, mask, footprint, rho, out):
    """Fill ``out`` (9, npix) from ``data`` (nchan, npix).

    Rows of ``out``: moment0, moment1, moment2, moment0_err, moment1_err, moment2_err,
    peak, velocity_at_peak, nchan.  ``mask`` is (nchan, npix) bool (only read in modes 2 and 3),
    ``footprint`` (npix,) bool, ``rho`` the noise correlation at lags 0.. (len <= 3).
    """
    npix = data.shape[1]
    for p in numba.prange(npix):
        spectrum_moments(data[:, p], velocity, dv, mode, threshold, sigma[p], mask, p,
                         footprint[p], rho, out)
