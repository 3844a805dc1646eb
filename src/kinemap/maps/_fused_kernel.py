"""Compiled fused pass: the noise estimate and every moment map from one read of a block.

The noise pass and the moments pass each used to read the whole cube, and each spent most
of its time waiting for memory (one strided load per channel per spectrum).  Here a tile of
``TILE`` neighbouring spectra is copied once into contiguous float32 rows that stay in the
core's cache; the noise of each row is estimated (:func:`spectrum_noise`) and its moments
follow at once (:func:`spectrum_moments`), with the noise of the same spectrum for a
threshold mask and the error maps.  The per-spectrum code is the code the separate kernels
run, so the results are the same numbers.

FITS stores floats big-endian.  :func:`fused_kernel_swapped` takes the block's raw bits as
uint32 and swaps the bytes while it copies the tile, which saves the reader a separate
byte-swapping sweep over the whole block.
"""
from __future__ import annotations

import numba
import numpy as np

from kinemap.maps._moments_kernel import spectrum_moments
from kinemap.maps._noise_kernel import spectrum_noise

TILE = 32  # spectra per tile: 32 x 1024 channels x 4 bytes = 128 KB, inside L2


@numba.njit(cache=True, nogil=True)
def _tile_work(tile, nq, p0, second_differences, keep, factor, clip, correction, velocity,
               dv, mode, threshold, mask, footprint, rho, buf, sigma, nused, nfinite, out):
    """Noise, then moments, of the first ``nq`` rows of ``tile`` (pixels p0...)."""
    for q in range(nq):
        p = p0 + q
        s, kept, nf = spectrum_noise(tile[q], buf, second_differences, keep, factor, clip,
                                     correction)
        sigma[p] = s
        nused[p] = kept
        nfinite[p] = nf
        spectrum_moments(tile[q], velocity, dv, mode, threshold, s, mask, p, footprint[p],
                         rho, out)


@numba.njit(parallel=True, cache=True, nogil=True)
def fused_kernel(data, second_differences, keep, factor, clip, correction, velocity, dv,
                 mode, threshold, mask, footprint, rho, sigma, nused, nfinite, out):
    """Noise and moments of every spectrum (column) of ``data`` (nchan, npix), native order.

    Outputs: ``sigma``, ``nused``, ``nfinite`` as :func:`noise_kernel` fills them, ``out``
    (9, npix) as :func:`moments_kernel` does; the arguments are theirs.
    """
    nchan, npix = data.shape
    ntile = (npix + TILE - 1) // TILE
    for t in numba.prange(ntile):
        p0 = t * TILE
        nq = min(npix, p0 + TILE) - p0
        tile = np.empty((TILE, nchan), dtype=data.dtype)
        for c in range(nchan):
            for q in range(nq):
                tile[q, c] = data[c, p0 + q]
        buf = np.empty(max(nchan, 1))
        _tile_work(tile, nq, p0, second_differences, keep, factor, clip, correction, velocity,
                   dv, mode, threshold, mask, footprint, rho, buf, sigma, nused, nfinite, out)


@numba.njit(parallel=True, cache=True, nogil=True)
def fused_kernel_swapped(raw, second_differences, keep, factor, clip, correction, velocity,
                         dv, mode, threshold, mask, footprint, rho, sigma, nused, nfinite, out):
    """:func:`fused_kernel` for float32 data of the other byte order, given as its raw bits
    ``raw`` (nchan, npix) uint32: bytes are swapped as the tile is copied."""
    nchan, npix = raw.shape
    ntile = (npix + TILE - 1) // TILE
    for t in numba.prange(ntile):
        p0 = t * TILE
        nq = min(npix, p0 + TILE) - p0
        bits = np.empty((TILE, nchan), dtype=np.uint32)
        for c in range(nchan):
            for q in range(nq):
                v = raw[c, p0 + q]
                bits[q, c] = (((v >> 24) & 0xFF) | ((v >> 8) & 0xFF00)
                              | ((v << 8) & 0xFF0000) | ((v << 24) & 0xFF000000))
        tile = bits.view(np.float32)
        buf = np.empty(max(nchan, 1))
        _tile_work(tile, nq, p0, second_differences, keep, factor, clip, correction, velocity,
                   dv, mode, threshold, mask, footprint, rho, buf, sigma, nused, nfinite, out)
