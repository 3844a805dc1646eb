"""The smooth-and-mask signal mask, block by block (see :mod:`kinemap.maps.masks`).

Smoothing and thresholds run on blocks of rows read from the cube (each with the rows the
Gaussian reaches into above and below), in the compiled kernel of
:mod:`kinemap.maps._smooth_kernel`; what stays for the whole cube is a byte of flags per
voxel, the island labels (int32) and the mask.  Islands are global, so the labelling is
one ``scipy.ndimage.label`` of the voxels above the growth threshold: the islands that
hold a seed are the ones seeds grow into (what ``binary_propagation`` of the seeds into
that region gives), and islands smaller than ``min_pixels`` on the sky or ``min_channels``
along the spectrum are dropped.
"""
from __future__ import annotations

import numpy as np

from kinemap.maps._smooth_kernel import FINITE, GROW, SEED, island_boxes, smooth_flags
from kinemap.parallel.blocks import block_rows, read_rows
from kinemap.spectral.response import variance_of_sum

__all__ = ["BYTES_PER_VOXEL", "gaussian_weights", "noise_factor", "smooth_mask"]

# whole-cube arrays: flags (1) + a boolean region (1) + labels (int32, 4) + the mask (1)
BYTES_PER_VOXEL = 7
BLOCK_BYTES = 64 << 20  # blocks of 32-512 MB time alike; 8 MB ones 35 % slower (halo rows)


def gaussian_weights(sigma: float, truncate: float = 4.0) -> np.ndarray:
    """The normalised Gaussian ``scipy.ndimage.gaussian_filter`` convolves with (radius
    ``int(truncate * sigma + 0.5)``); a single 1.0 for ``sigma`` <= 0."""
    if not sigma > 0:
        return np.ones(1)
    r = int(truncate * sigma + 0.5)
    x = np.arange(-r, r + 1, dtype=np.float64)
    w = np.exp(-0.5 / sigma ** 2 * x ** 2)
    return w / w.sum()


def noise_factor(cube, sig: float, nbox: int, rho, nplanes: int = 24) -> float:
    """How much the smoothing lowers the noise.

    Spatial part: measured, because radio noise is correlated on the beam scale.  The
    differences of neighbouring channels hold the noise with its spatial correlation but
    not the (spectrally smooth) emission, so the MAD of a few smoothed difference planes
    over the MAD of the raw ones is the spatial factor.  Spectral part: exact for a boxcar
    of ``nbox`` channels given the channel correlation ``rho``.
    """
    from scipy import ndimage

    nchan = cube.shape[0]
    idx = np.unique(np.linspace(0, nchan - 2, min(nplanes, nchan - 1)).astype(int))
    f_space = 1.0
    if sig > 0 and idx.size:
        a = np.stack([np.asarray(cube.data[int(i)], dtype=np.float32) for i in idx])
        b = np.stack([np.asarray(cube.data[int(i) + 1], dtype=np.float32) for i in idx])
        ok = np.isfinite(a) & np.isfinite(b)
        diff = np.where(ok, b - a, np.float32(0.0)).astype(np.float32)
        smd = ndimage.gaussian_filter(diff, sigma=(0, sig, sig), mode="constant")
        nz = diff != 0
        raw_mad = np.median(np.abs(diff[nz])) if nz.any() else 0.0
        if raw_mad > 0:
            f_space = float(np.median(np.abs(smd[nz])) / raw_mad)
    w = np.full((nbox, 1), 1.0 / nbox)
    f_spec = float(np.sqrt(variance_of_sum(w, 1.0, rho))[0]) if nbox > 1 else 1.0
    return f_space * f_spec


def smooth_mask(cube, *, scale: np.ndarray, sig: float, nbox: int, seed: float,
                grow: float, min_pixels: int, min_channels: int, max_memory: int,
                progress: bool = False) -> np.ndarray:
    """The boolean mask (nchan, ny, nx): voxels of kept islands, never blank ones.

    ``scale`` (ny, nx) is the smoothed noise of each spectrum; ``sig`` the Gaussian's
    sigma in pixels; ``nbox`` the boxcar in channels; ``seed``, ``grow`` the S/N
    thresholds.  Blocks take what ``max_memory`` leaves beside the whole-cube arrays.
    """
    from scipy import ndimage

    nchan, ny, nx = cube.shape
    weights = gaussian_weights(sig)
    reach = (weights.size - 1) // 2
    flags = np.empty((nchan, ny, nx), dtype=np.uint8)
    spare = max(max_memory - BYTES_PER_VOXEL * flags.size, max_memory // 8)
    # a block: its float32 data with the halo rows, the smoothed float32 copy, its flags
    # (1.5 float64 copies), capped so the smoothed copy stays near the cache
    rows = block_rows((nchan, ny, nx), max_memory=min(spare, BLOCK_BYTES), factor=1.5)
    scale = np.ascontiguousarray(scale, dtype=np.float64)
    bar = None
    if progress:
        from tqdm.auto import tqdm

        bar = tqdm(total=ny, unit="row", desc="smooth mask", leave=False, disable=None)
    try:
        for y0 in range(0, ny, rows):
            y1 = min(ny, y0 + rows)
            a, b = max(0, y0 - reach), min(ny, y1 + reach)
            block = read_rows(cube, slice(a, b))
            out = np.empty((nchan, y1 - y0, nx), dtype=np.uint8)  # C order: one kernel type
            smooth_flags(block, y0 - a, weights, int(nbox), scale[y0:y1], float(seed),
                         float(grow), out)
            flags[:, y0:y1] = out
            del block, out
            if bar is not None:
                bar.update(y1 - y0)
    finally:
        if bar is not None:
            bar.close()
    labels, nlab = ndimage.label((flags & (GROW | SEED)) != 0)  # int32 up to 2**31 voxels
    keep = np.zeros(nlab + 1, dtype=bool)
    if nlab:
        seeded, box = island_boxes(labels, flags, nlab)
        for k in np.flatnonzero(seeded):
            c0, c1, y0, y1, x0, x1 = box[k]
            sub = labels[c0:c1, y0:y1, x0:x1] == k
            npix = int(sub.any(axis=0).sum())
            nch = int(sub.any(axis=(1, 2)).sum())
            keep[k] = npix >= min_pixels and nch >= min_channels
    mask = keep[labels]
    del labels
    mask &= (flags & FINITE) != 0
    return mask
