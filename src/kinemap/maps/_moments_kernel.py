"""Compiled moment kernel: all moment maps and their errors in three passes per spectrum.

Same formulas as :mod:`kinemap.maps.moments` (the docstring there is the reference).  The
work on a tile of spectra is :func:`tile_moments`, shared by :func:`moments_kernel` (moments
alone) and the fused noise-and-moments pass (:mod:`kinemap.maps._fused_kernel`), so the two
paths cannot drift apart.
"""
from __future__ import annotations

import numba
import numpy as np

from kinemap.maps._noise_kernel import TILE, lane, load_tile

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
def tile_moments(tile, nq, p0, velocity, dv, mode, threshold, sigma, mask, footprint, rho,
                 out):
    """Moments of the spectra tile[:, q], q < nq, into columns p0 + q of ``out`` (9, npix),
    :func:`_tile_moments` compiled for each ``mode`` (a constant there, so the loops carry
    no test of it: twice as fast as one version for all modes)."""
    # the mode as a number literal in each call: numba compiles a version for each value
    if mode == 0:
        _tile_moments(tile, nq, p0, velocity, dv, 0, threshold, sigma, mask, footprint, rho, out)
    elif mode == 1:
        _tile_moments(tile, nq, p0, velocity, dv, 1, threshold, sigma, mask, footprint, rho, out)
    elif mode == 2:
        _tile_moments(tile, nq, p0, velocity, dv, 2, threshold, sigma, mask, footprint, rho, out)
    else:
        _tile_moments(tile, nq, p0, velocity, dv, 3, threshold, sigma, mask, footprint, rho, out)


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _tile_moments(tile, nq, p0, velocity, dv, mode, threshold, sigma, mask, footprint, rho,
                  out):
    """Moments of the spectra tile[:, q], q < nq, into columns p0 + q of ``out`` (9, npix).

    ``tile`` (nchan, TILE) holds the spectra channel by channel as :func:`load_tile` fills
    it (lanes from nq on are padding), float32 or float64: every product with the float64
    channel widths and velocities is float64, so the sums are the same either way.
    ``sigma`` (npix,) is the noise, ``mask`` the (nchan, npix) voxel mask (read in modes 2
    and 3), ``footprint`` (npix,) False outside the data.  Each pass runs over the channels
    and, inside, over the spectra, one lane each, as in :mod:`kinemap.maps._noise_kernel`:
    it vectorises across spectra while every spectrum's sums run through its channels in
    order.  ``error_model='numpy'``: lanes without signal divide by zero harmlessly (their
    results are not used).
    """
    nchan = tile.shape[0]
    nlag = rho.shape[0]
    r1 = rho[1] if nlag > 1 else 0.0
    r2 = rho[2] if nlag > 2 else 0.0
    thr = lane(0.0)
    thr[:nq] = threshold * sigma[p0:p0 + nq]
    msk = np.zeros((nchan if mode >= 2 else 1, TILE), np.bool_)  # the mask's tile, padded
    if mode >= 2:
        for c in range(nchan):
            msk[c, :nq] = mask[c, p0:p0 + nq]
    # Products are formed for every lane and selected afterwards (x if use else 0.0): a
    # select of a computed value vectorises, a computation inside the select does not.
    S = lane(0.0)
    Sv = lane(0.0)
    n = lane(0.0)
    peak = lane(-np.inf)
    ipk = lane(-1.0)
    for c in range(nchan):
        dvc = dv[c]  # per-channel values as locals: loaded once, not once per lane
        vc = velocity[c]
        cf = float(c)
        for q in range(TILE):
            x = tile[c, q]
            use = _use(mode, x, thr[q], msk[c, q] if mode >= 2 else True)
            w = x * dvc
            wv = w * vc
            S[q] += w if use else 0.0
            Sv[q] += wv if use else 0.0
            n[q] += use
            x = x + 0.0  # float64
            pq = peak[q]
            better = use & (x > pq)
            peak[q] = x if better else pq
            iq = ipk[q]
            ipk[q] = cf if better else iq
    m1 = lane(0.0)
    for q in range(TILE):
        m1[q] = Sv[q] / S[q]
    # M2, and the error of moment 0: weights dv_i on used channels, banded correlation
    M2 = lane(0.0)
    v0 = lane(0.0)
    prev1 = lane(0.0)
    prev2 = lane(0.0)
    for c in range(nchan):
        dvc = dv[c]
        vc = velocity[c]
        for q in range(TILE):
            x = tile[c, q]
            use = _use(mode, x, thr[q], msk[c, q] if mode >= 2 else True)
            d = vc - m1[q]
            t = x * dvc * d * d
            M2[q] += t if use else 0.0
            w = dvc if use else 0.0
            acc = v0[q] + w * w
            if nlag > 1:
                acc += 2.0 * r1 * w * prev1[q]
            if nlag > 2:
                acc += 2.0 * r2 * w * prev2[q]
            v0[q] = acc
            prev2[q] = prev1[q]
            prev1[q] = w
    for q in range(TILE):
        M2[q] /= S[q]
    # errors of moments 1 and 2
    v1 = lane(0.0)
    v2 = lane(0.0)
    a1 = lane(0.0)
    a2 = lane(0.0)
    b1 = lane(0.0)
    b2 = lane(0.0)
    for c in range(nchan):
        dvc = dv[c]
        vc = velocity[c]
        for q in range(TILE):
            x = tile[c, q]
            use = _use(mode, x, thr[q], msk[c, q] if mode >= 2 else True)
            d = vc - m1[q]
            u1 = dvc * d / S[q]
            u2 = dvc * (d * d - M2[q]) / S[q]
            w1 = u1 if use else 0.0
            w2 = u2 if use else 0.0
            acc1 = v1[q] + w1 * w1
            acc2 = v2[q] + w2 * w2
            if nlag > 1:
                acc1 += 2.0 * r1 * w1 * a1[q]
                acc2 += 2.0 * r1 * w2 * b1[q]
            if nlag > 2:
                acc1 += 2.0 * r2 * w1 * a2[q]
                acc2 += 2.0 * r2 * w2 * b2[q]
            v1[q] = acc1
            v2[q] = acc2
            a2[q] = a1[q]
            a1[q] = w1
            b2[q] = b1[q]
            b1[q] = w2
    for q in range(nq):
        _finish(out, p0 + q, footprint[p0 + q], sigma[p0 + q], S[q], n[q], peak[q], ipk[q],
                m1[q], M2[q], v0[q], v1[q], v2[q], velocity, dv)


@numba.njit(cache=True, nogil=True)
def _finish(out, p, inside, sigma_p, S, n, peak, ipk, m1, M2, v0, v1, v2, velocity, dv):
    """Column ``p`` of ``out`` from one spectrum's sums."""
    nan = np.nan
    if not inside:
        for k in range(8):
            out[k, p] = nan
        out[8, p] = 0.0
        return
    out[8, p] = n
    if n == 0.0:
        for k in range(8):
            out[k, p] = nan
        return
    out[0, p] = S
    out[6, p] = peak
    out[7, p] = velocity[int(ipk)]
    s2 = sigma_p * sigma_p
    out[3, p] = np.sqrt(s2 * v0)
    if not S > 0.0:
        out[1, p] = nan
        out[2, p] = nan
        out[4, p] = nan
        out[5, p] = nan
        return
    out[1, p] = m1
    out[4, p] = np.sqrt(s2 * v1)
    if n == 1.0:
        # one channel: the velocity is only known to within the channel (top-hat
        # sigma dv/sqrt(12)), and there is no width to measure
        out[4, p] = dv[int(ipk)] / np.sqrt(12.0)
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
    nchan, npix = data.shape
    ntile = (npix + TILE - 1) // TILE
    for t in numba.prange(ntile):
        p0 = t * TILE
        nq = min(npix, p0 + TILE) - p0
        tile = np.empty((nchan, TILE), dtype=data.dtype)
        load_tile(data, p0, nq, tile)
        tile_moments(tile, nq, p0, velocity, dv, mode, threshold, sigma, mask, footprint, rho,
                     out)
