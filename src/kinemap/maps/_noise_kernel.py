"""Compiled per-spectrum robust noise: iteratively clipped RMS.

A median-based estimator (MAD) costs two selections per spectrum, which dominate the run
time on large cubes; an iteratively clipped RMS needs a few predictable passes instead.
Values beyond ``clip`` times the current sigma of the current mean are dropped until the
kept set stops changing; the RMS of a Gaussian truncated at +-c sigma is low by the factor
sqrt(1 - 2 c phi(c) / (2 Phi(c) - 1)) (truncated normal variance), which ``correction``
undoes (computed by the caller; see :func:`kinemap.maps.noise.clip_correction`).
"""
from __future__ import annotations

import numba
import numpy as np

TILE = 32  # pixels per tile: a tile's spectra are copied to contiguous memory first
MAX_ITER = 20


@numba.njit(cache=True, nogil=True)
def _clipped_sigma(x, n, clip, correction):
    """Sigma of x[:n] by iterative clipping at clip * sigma around the mean."""
    if n < 3:
        return np.nan, n
    lo, hi = -np.inf, np.inf
    kept_prev = -1
    sigma = np.nan
    kept = 0
    for _ in range(MAX_ITER):
        s1 = 0.0
        s2 = 0.0
        kept = 0
        for i in range(n):
            v = x[i]
            if v >= lo and v <= hi:
                s1 += v
                s2 += v * v
                kept += 1
        if kept < 3:
            return np.nan, kept
        mean = s1 / kept
        var = s2 / kept - mean * mean
        sigma = np.sqrt(var * kept / (kept - 1)) if var > 0 else 0.0
        if kept == kept_prev:
            break
        kept_prev = kept
        lo = mean - clip * sigma
        hi = mean + clip * sigma
    return sigma / correction, kept


@numba.njit(cache=True, nogil=True)
def spectrum_noise(x, buf, second_differences, keep, factor, clip, correction):
    """(sigma, channels kept, finite channels) of one spectrum ``x`` (nchan,).

    ``buf`` is scratch of at least nchan float64.  ``x`` may be float32 or float64: the
    second differences are formed in float64 either way (the constant 2.0 promotes them),
    so the estimate does not depend on the precision the spectrum was loaded in.
    """
    nchan = x.shape[0]
    nf = 0
    for c in range(nchan):
        if np.isfinite(x[c]):
            nf += 1
    n = 0
    if second_differences:
        for c in range(1, nchan - 1):
            d = x[c - 1] - 2.0 * x[c] + x[c + 1]
            if np.isfinite(d):
                buf[n] = d
                n += 1
    else:
        for c in range(nchan):
            if keep[c] and np.isfinite(x[c]):
                buf[n] = x[c]
                n += 1
    s, kept = _clipped_sigma(buf, n, clip, correction)
    return (s / factor if s > 0 else np.nan), kept, nf


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
        p1 = min(npix, p0 + TILE)
        tile = np.empty((p1 - p0, nchan))
        for c in range(nchan):
            for q in range(p1 - p0):
                tile[q, c] = data[c, p0 + q]
        buf = np.empty(max(nchan, 1))
        for q in range(p1 - p0):
            s, kept, nf = spectrum_noise(tile[q], buf, second_differences, keep, factor, clip,
                                         correction)
            out[p0 + q] = s
            nused[p0 + q] = kept
            nfinite[p0 + q] = nf
