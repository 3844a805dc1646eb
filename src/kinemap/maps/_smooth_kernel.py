"""Compiled smoothing of one block of rows for the smooth-and-mask signal mask.

Each channel plane is convolved with a normalised, truncated Gaussian along y and then
along x (blanks as zeros, zeros beyond the map), then a boxcar of ``nbox`` channels is
taken along the spectrum (zeros beyond the band), as ``scipy.ndimage.gaussian_filter``
with ``mode='constant'`` followed by ``uniform_filter1d`` do on the whole cube; the y pass
is rounded to float32 before the x pass, as scipy stores it.  The smoothed S/N of each
voxel is compared with the seed and growth thresholds and only those answers are kept, a
byte per voxel (:data:`GROW`, :data:`SEED`, :data:`FINITE`), not the float32 cubes.

The block carries ``top`` extra rows above and ``bottom`` below its own rows (the
Gaussian's reach, fewer at the map's edges), so the rows of a block come out as they
would from the whole cube.
"""
from __future__ import annotations

import numba
import numpy as np

__all__ = ["smooth_flags", "GROW", "SEED", "FINITE"]

GROW = np.uint8(1)    # smoothed S/N above the growth threshold
SEED = np.uint8(2)    # ... above the seed threshold
FINITE = np.uint8(4)  # the voxel's value is finite


@numba.njit(parallel=True, cache=True, nogil=True, error_model="numpy")
def smooth_flags(block, top, weights, nbox, scale, seed, grow, flags):
    """Flags of the rows ``top:top + rows`` of ``block`` (nchan, top + rows + bottom, nx).

    ``weights`` (2r+1,) is the Gaussian (one weight, 1.0, for no spatial smoothing);
    ``scale`` (rows, nx) the smoothed noise of each spectrum (noise x smoothing factor);
    ``flags`` (nchan, rows, nx) uint8 receives GROW | SEED | FINITE bits.
    """
    nchan, rin, nx = block.shape
    rows = flags.shape[1]
    r = (weights.size - 1) // 2
    sm = np.empty((nchan, rows, nx), dtype=np.float32)
    for c in numba.prange(nchan):
        plane = block[c]
        col = np.empty(nx, dtype=np.float64)
        line = np.empty(nx + 2 * r, dtype=np.float32)
        for y in range(rows):
            # y pass: rows top + y - r ... top + y + r of the block (zero outside it)
            col[:] = 0.0
            for k in range(-r, r + 1):
                yy = top + y + k
                if yy < 0 or yy >= rin:
                    continue
                w = weights[k + r]
                src = plane[yy]
                for x in range(nx):
                    v = src[x]
                    if np.isfinite(v):  # blanks count as zero
                        col[x] += w * v
            line[:r] = 0.0
            line[r + nx:] = 0.0
            for x in range(nx):
                line[r + x] = np.float32(col[x])
            # x pass along the row, zeros beyond the map
            out = sm[c, y]
            for x in range(nx):
                acc = 0.0
                for k in range(2 * r + 1):
                    acc += weights[k] * line[x + k]
                out[x] = np.float32(acc)
    lo = nbox // 2
    inv = 1.0 / nbox
    for c in numba.prange(nchan):
        acc = np.empty(nx, dtype=np.float64)
        for y in range(rows):
            acc[:] = 0.0
            for j in range(c - lo, c - lo + nbox):
                if 0 <= j < nchan:
                    src = sm[j, y]
                    for x in range(nx):
                        acc[x] += src[x]
            raw = block[c, top + y]
            dst = flags[c, y]
            s = scale[y]
            for x in range(nx):
                snr = np.float64(np.float32(acc[x] * inv)) / s[x]
                f = np.uint8(0)
                if snr > grow:
                    f |= GROW
                if snr > seed:
                    f |= SEED
                if np.isfinite(raw[x]):
                    f |= FINITE
                dst[x] = f
    return flags


@numba.njit(cache=True, nogil=True)
def island_boxes(labels, flags, nlab):
    """One pass over the labelled cube: which islands hold a seed (``flags`` SEED bit),
    and each island's bounding box (lo, hi) along (channel, y, x), hi exclusive.

    Returns (seeded (nlab+1,) bool, box (nlab+1, 6) int64); label 0 is the background."""
    nchan, ny, nx = labels.shape
    seeded = np.zeros(nlab + 1, dtype=np.bool_)
    box = np.empty((nlab + 1, 6), dtype=np.int64)
    for k in range(nlab + 1):
        box[k, 0], box[k, 2], box[k, 4] = nchan, ny, nx
        box[k, 1], box[k, 3], box[k, 5] = 0, 0, 0
    for c in range(nchan):
        for y in range(ny):
            row = labels[c, y]
            frow = flags[c, y]
            for x in range(nx):
                k = row[x]
                if k == 0:
                    continue
                if frow[x] & SEED:
                    seeded[k] = True
                b = box[k]
                if c < b[0]:
                    b[0] = c
                if c + 1 > b[1]:
                    b[1] = c + 1
                if y < b[2]:
                    b[2] = y
                if y + 1 > b[3]:
                    b[3] = y + 1
                if x < b[4]:
                    b[4] = x
                if x + 1 > b[5]:
                    b[5] = x + 1
    seeded[0] = False
    return seeded, box
