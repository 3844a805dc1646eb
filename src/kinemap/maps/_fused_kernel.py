"""Compiled fused pass: the noise estimate and every moment map from one read of a block.

The noise pass and the moments pass each used to read the whole cube, and each spent most
of its time waiting for memory (one strided load per channel per spectrum).  Here a tile of
``TILE`` neighbouring spectra is copied once, channel by channel as the cube stores them,
into contiguous memory that stays in the core's cache; the noise of its spectra is
estimated (:func:`tile_noise`) and their moments follow at once (:func:`tile_moments`), with
the noise of the same spectra for a threshold mask and the error maps.  The tile code is
the code the separate kernels run, so the results are the same numbers.

FITS stores floats big-endian.  :func:`fused_kernel_swapped` takes the block's raw bits as
uint32 and swaps the bytes while it copies the tile, which saves the reader a separate
byte-swapping sweep over the whole block.
"""
from __future__ import annotations

import numba
import numpy as np

from kinemap.maps._moments_kernel import tile_moments
from kinemap.maps._noise_kernel import TILE, load_tile, tile_noise


@numba.njit(cache=True, nogil=True)
def _tile_work(tile, nq, p0, second_differences, keep, factor, clip, correction, velocity,
               dv, mode, threshold, mask, footprint, rho, sigma, nused, nfinite, out):
    """Noise, then moments, of the spectra tile[:, :nq] (pixels p0...)."""
    tile_noise(tile, nq, p0, second_differences, keep, factor, clip, correction, sigma, nused,
               nfinite)
    tile_moments(tile, nq, p0, velocity, dv, mode, threshold, sigma, mask, footprint, rho, out)


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
        tile = np.empty((nchan, TILE), dtype=data.dtype)
        load_tile(data, p0, nq, tile)
        _tile_work(tile, nq, p0, second_differences, keep, factor, clip, correction, velocity,
                   dv, mode, threshold, mask, footprint, rho, sigma, nused, nfinite, out)


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
        bits = np.empty((nchan, TILE), dtype=np.uint32)
        for c in range(nchan):
            src = raw[c, p0:p0 + nq]
            dst = bits[c]
            for q in range(nq):
                v = src[q]
                dst[q] = (((v >> 24) & 0xFF) | ((v >> 8) & 0xFF00)
                          | ((v << 8) & 0xFF0000) | ((v << 24) & 0xFF000000))
            dst[nq:] = 0  # padding lanes of a last, partial tile (as load_tile)
        _tile_work(bits.view(np.float32), nq, p0, second_differences, keep, factor, clip,
                   correction, velocity, dv, mode, threshold, mask, footprint, rho, sigma,
                   nused, nfinite, out)
