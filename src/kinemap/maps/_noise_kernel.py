"""Compiled per-spectrum robust noise: iteratively clipped RMS.

A median-based estimator (MAD) costs two selections per spectrum, which dominate the run
time on large cubes; an iteratively clipped RMS needs a few predictable passes instead.
Values beyond ``clip`` times the current sigma of the current mean are dropped until the
kept set stops changing; the RMS of a Gaussian truncated at +-c sigma is low by the factor
sqrt(1 - 2 c phi(c) / (2 Phi(c) - 1)) (truncated normal variance), which ``correction``
undoes (computed by the caller; see :func:`kinemap.maps.noise.clip_correction`).

Layout: the kernels work on a tile of ``TILE`` neighbouring spectra held channel by channel
(``tile[c, q]``, as the cube stores them), one lane per spectrum.  Each pass runs over the
channels and, inside, over the lanes: the inner loop is branch-free (a value counts or adds
zero) and independent from lane to lane, so it vectorises across spectra without fast-math,
while every spectrum's sums still run through its channels in order; the numbers are those
of a plain loop over one spectrum.  All lanes take the clipping pass until each has
settled (the spectra of a tile rarely need different numbers of passes).
"""
from __future__ import annotations

import numba
import numpy as np

TILE = 32  # spectra per tile: a tile is copied channel by channel into contiguous memory
MAX_ITER = 20
_BIG = np.finfo(np.float64).max  # |v| <= _BIG: v is finite (False for NaN and infinity)


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _sums(tile, second_differences, keep, lo, hi, kept, s1, s2):
    """Per lane q: count, sum and sum of squares of the finite values in [lo, hi] of the
    second differences of tile[:, q] (``second_differences``) or of its channels where
    ``keep`` is True, all in float64.  Every loop over the lanes runs TILE times (a
    constant: the compiler unrolls it into a few vector operations)."""
    nchan = tile.shape[0]
    kept[:] = 0
    s1[:] = 0.0
    s2[:] = 0.0
    if second_differences:
        for c in range(nchan - 2):
            for q in range(TILE):
                v = tile[c, q] - 2.0 * tile[c + 1, q] + tile[c + 2, q]
                use = (v >= lo[q]) & (v <= hi[q]) & (abs(v) <= _BIG)
                kept[q] += use
                v = v if use else 0.0
                s1[q] += v
                s2[q] += v * v
    else:
        for c in range(nchan):
            if keep[c]:
                for q in range(TILE):
                    v = tile[c, q] + 0.0  # float64
                    use = (v >= lo[q]) & (v <= hi[q]) & (abs(v) <= _BIG)
                    kept[q] += use
                    v = v if use else 0.0
                    s1[q] += v
                    s2[q] += v * v


@numba.njit(cache=True, nogil=True, error_model="numpy")
def tile_noise(tile, nq, p0, second_differences, keep, factor, clip, correction, out, nused,
               nfinite):
    """Noise of the spectra tile[:, q], q < nq, into out[p0 + q], nused[p0 + q] (values
    the clipped RMS kept) and nfinite[p0 + q] (finite channels).  ``tile`` is (nchan, TILE)
    as :func:`load_tile` fills it (lanes from nq on are padding)."""
    nchan = tile.shape[0]
    nf = np.zeros(TILE, np.int64)
    for c in range(nchan):
        for q in range(TILE):
            nf[q] += abs(tile[c, q]) <= _BIG
    nfinite[p0:p0 + nq] = nf[:nq]
    lo = np.full(TILE, -np.inf)
    hi = np.full(TILE, np.inf)
    kept = np.empty(TILE, np.int64)
    s1 = np.empty(TILE)
    s2 = np.empty(TILE)
    prev = np.full(nq, -1)
    done = np.zeros(nq, np.bool_)
    for it in range(MAX_ITER):
        _sums(tile, second_differences, keep, lo, hi, kept, s1, s2)
        left = 0
        for q in range(nq):
            if done[q]:
                continue
            k = kept[q]
            if k < 3:
                out[p0 + q] = np.nan
                nused[p0 + q] = k
                done[q] = True
                continue
            mean = s1[q] / k
            var = s2[q] / k - mean * mean
            sigma = np.sqrt(var * k / (k - 1)) if var > 0 else 0.0
            if k == prev[q] or it == MAX_ITER - 1:
                s = sigma / correction
                out[p0 + q] = s / factor if s > 0 else np.nan
                nused[p0 + q] = k
                done[q] = True
                continue
            prev[q] = k
            lo[q] = mean - clip * sigma
            hi[q] = mean + clip * sigma
            left += 1
        if left == 0:
            break


@numba.njit(cache=True, nogil=True)
def load_tile(data, p0, nq, tile):
    """tile[:, :nq] = data[:, p0:p0 + nq] (contiguous rows of the tile's spectra); the
    padding lanes tile[:, nq:] of a last, partial tile are zero."""
    for c in range(data.shape[0]):
        tile[c, :nq] = data[c, p0:p0 + nq]
        tile[c, nq:] = 0


@numba.njit(parallel=True, cache=True, nogil=True)
def noise_kernel(data, second_differences, keep, factor, clip, correction, out, nused, nfinite):
    """Per spectrum (column of ``data``): the clipped sigma of its second differences
    x[i-1] - 2 x[i] + x[i+1] over finite triples (``second_differences``), or of its finite
    values in the channels where ``keep`` is True, divided by ``factor``; nfinite[p] counts
    the finite channels of the spectrum."""
    nchan, npix = data.shape
    ntile = (npix + TILE - 1) // TILE
    for t in numba.prange(ntile):
        p0 = t * TILE
        nq = min(npix, p0 + TILE) - p0
        tile = np.empty((nchan, TILE), dtype=data.dtype)
        load_tile(data, p0, nq, tile)
        tile_noise(tile, nq, p0, second_differences, keep, factor, clip, correction, out,
                   nused, nfinite)
