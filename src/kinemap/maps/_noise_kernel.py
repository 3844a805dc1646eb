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
of a plain loop over one spectrum.  The whole tile takes the clipping passes until only
``FEW_LANES`` spectra have not settled; those finish with passes of their own.  The
compiler is left to vectorise only what it can prove safe: every lane loop runs the
constant ``TILE`` times, per-lane state lives in 64-byte aligned arrays (:func:`lane`),
and no fast-math flag is used, so NaN and infinity handling and the summation order are
exactly those written here.
"""
from __future__ import annotations

import numba
import numpy as np

TILE = 128  # spectra per tile, copied channel by channel: 128 x 1024 channels x 4 bytes = 512 KB,
# inside L2; wider tiles touch each page of a channel plane fewer times (TLB misses)
MAX_ITER = 20
# when this many lanes or fewer have not settled, each takes a pass of its own: one
# spectrum's sums in order cost about as much as 7 lanes of a vectorised tile pass
# (measured: ~2 ns against ~0.28 ns a value), and 16 here ran ~10 % faster than 4
FEW_LANES = 16
_BIG = np.finfo(np.float64).max  # |v| <= _BIG: v is finite (False for NaN and infinity)


@numba.njit(cache=True, nogil=True)
def lane(fill):
    """TILE values ``fill`` (of its type), starting on a 64-byte boundary: per-lane sums,
    limits and counts.  The lane loops load and store them as whole 64-byte vectors; numba
    aligns arrays to 32 bytes only, and a vector straddling two cache lines makes the loops
    about 1.5x slower."""
    flat = np.full(TILE + 8, fill)
    return flat[(-flat.ctypes.data % 64) // flat.itemsize:][:TILE]


@numba.njit(cache=True, nogil=True)
def _value(tile, c, q, second_differences):
    """Value c of lane q, in float64: the second difference tile[c] - 2 tile[c+1] +
    tile[c+2], or the channel itself."""
    if second_differences:
        return tile[c, q] - 2.0 * tile[c + 1, q] + tile[c + 2, q]
    return tile[c, q] + 0.0


@numba.njit(cache=True, nogil=True)
def _add(v, lo, hi, kept, s1, s2):
    """(count, sum, sum of squares) with ``v`` added when it is finite and in [lo, hi]
    (branch-free: a value left out adds zero)."""
    use = (v >= lo) & (v <= hi) & (abs(v) <= _BIG)
    v = v if use else 0.0
    return kept + use, s1 + v, s2 + v * v


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _sums(tile, second_differences, keep, lo, hi, kept, s1, s2):
    """Per lane q: count, sum and sum of squares of the finite values in [lo, hi] of the
    second differences of tile[:, q] (``second_differences``) or of its channels where
    ``keep`` is True.  Every loop over the lanes runs TILE times (a constant: the compiler
    unrolls it into a few vector operations)."""
    kept[:] = 0
    s1[:] = 0.0
    s2[:] = 0.0
    if second_differences:  # (two loops: a test inside the lane loop slows it down)
        for c in range(tile.shape[0] - 2):
            for q in range(TILE):
                kept[q], s1[q], s2[q] = _add(_value(tile, c, q, True), lo[q], hi[q], kept[q],
                                             s1[q], s2[q])
    else:
        for c in range(tile.shape[0]):
            if keep[c]:
                for q in range(TILE):
                    kept[q], s1[q], s2[q] = _add(_value(tile, c, q, False), lo[q], hi[q],
                                                 kept[q], s1[q], s2[q])


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _lane_sums(tile, q, second_differences, keep, lo, hi):
    """:func:`_sums` of lane q alone, the same numbers (for the last lanes to settle)."""
    kept = 0
    s1 = s2 = 0.0
    for c in range(tile.shape[0] - 2 if second_differences else tile.shape[0]):
        if second_differences or keep[c]:
            kept, s1, s2 = _add(_value(tile, c, q, second_differences), lo, hi, kept, s1, s2)
    return kept, s1, s2


@numba.njit(cache=True, nogil=True)
def tile_noise(tile, nq, p0, second_differences, keep, factor, clip, correction, out, nused,
               nfinite):
    """Noise of the spectra tile[:, q], q < nq, into out[p0 + q], nused[p0 + q] (values
    the clipped RMS kept) and nfinite[p0 + q] (finite channels).  ``tile`` is (nchan, TILE)
    as :func:`load_tile` fills it (lanes from nq on are padding).

    ``second_differences`` reaches the work as a constant: numba compiles a version for
    each value, with the loops free of the test (twice as fast as one version for both).
    """
    if second_differences:
        _tile_noise(tile, nq, p0, True, keep, factor, clip, correction, out, nused, nfinite)
    else:
        _tile_noise(tile, nq, p0, False, keep, factor, clip, correction, out, nused, nfinite)


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _tile_noise(tile, nq, p0, second_differences, keep, factor, clip, correction, out, nused,
                nfinite):
    """:func:`tile_noise` for one value of ``second_differences``."""
    nchan = tile.shape[0]
    nf = lane(0)
    lo = lane(-np.inf)
    hi = lane(np.inf)
    kept = lane(0)
    s1 = lane(0.0)
    s2 = lane(0.0)
    for c in range(nchan):
        for q in range(TILE):
            nf[q] += abs(tile[c, q]) <= _BIG
    for q in range(nq):
        nfinite[p0 + q] = nf[q]
    prev = np.full(nq, -1)
    done = np.zeros(nq, np.bool_)
    left = nq
    for it in range(MAX_ITER):
        if left > FEW_LANES:
            _sums(tile, second_differences, keep, lo, hi, kept, s1, s2)
        else:  # the last few lanes: a pass over each of them instead of over the tile
            for q in range(nq):
                if not done[q]:
                    kept[q], s1[q], s2[q] = _lane_sums(tile, q, second_differences, keep,
                                                       lo[q], hi[q])
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
