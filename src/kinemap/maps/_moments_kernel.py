"""Compiled moment kernel: all moment maps and their errors in three passes per spectrum.

Same formulas as :mod:`kinemap.maps.moments` (the docstring there is the reference); the numpy
version in ``moments_of_block`` is kept for testing this kernel against.
"""
from __future__ import annotations

import numba
import numpy as np

# Which channels count: 0 every finite channel, 1 value > threshold * sigma, 2 a given mask
USE_FINITE, USE_THRESHOLD, USE_MASK = 0, 1, 2


@numba.njit(cache=True, nogil=True)
def _use(mode, x, thr_sigma, mask_val):
    if not np.isfinite(x):
        return False
    if mode == 1:
        return x > thr_sigma
    if mode == 2:
        return mask_val
    return True


@numba.njit(parallel=True, cache=True, nogil=True)
def moments_kernel(data, velocity, dv, mode, threshold, sigma, mask, footprint, rho, out):
    """Fill ``out`` (9, npix) from ``data`` (nchan, npix).

    Rows of ``out``: moment0, moment1, moment2, moment0_err, moment1_err, moment2_err,
    peak, velocity_at_peak, nchan.  ``mask`` is (nchan, npix) bool (only read in mode 2),
    ``footprint`` (npix,) bool, ``rho`` the noise correlation at lags 0.. (len <= 3).
    """
    nchan, npix = data.shape
    nlag = rho.shape[0]
    for p in numba.prange(npix):
        nan = np.nan
        if not footprint[p]:
            for k in range(8):
                out[k, p] = nan
            out[8, p] = 0.0
            continue
        thr = threshold * sigma[p]
        S = 0.0
        Sv = 0.0
        n = 0
        peak = -np.inf
        ipk = -1
        for c in range(nchan):
            x = data[c, p]
            if _use(mode, x, thr, mask[c, p] if mode == 2 else True):
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
            continue
        out[0, p] = S
        out[6, p] = peak
        out[7, p] = velocity[ipk]
        s2 = sigma[p] * sigma[p]
        # error of moment 0: weights dv_i on used channels, banded correlation
        v0 = 0.0
        prev1 = 0.0
        prev2 = 0.0
        for c in range(nchan):
            x = data[c, p]
            w = dv[c] if _use(mode, x, thr, mask[c, p] if mode == 2 else True) else 0.0
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
            continue
        m1 = Sv / S
        M2 = 0.0
        for c in range(nchan):
            x = data[c, p]
            if _use(mode, x, thr, mask[c, p] if mode == 2 else True):
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
            x = data[c, p]
            if _use(mode, x, thr, mask[c, p] if mode == 2 else True):
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
            continue
        if M2 >= 0.0:
            m2 = np.sqrt(M2)
            out[2, p] = m2
            out[5, p] = np.sqrt(s2 * v2) / (2.0 * m2) if m2 > 0.0 else nan
        else:
            out[2, p] = nan
            out[5, p] = nan
