"""Per-pixel maps that may not fit the memory bound: held in memory, or on disk.

A block-wise stage fills its output maps a band of rows at a time (:func:`map_blocks`).
For most cubes they are small beside the cube and live in memory.  A cube with very wide
planes and few channels turns that round: eleven float64 maps of a 20000 x 20000 cube are
35 GB, more than the cube itself.  When the maps would take more than a share of
``max_memory``, :func:`allocate` puts each on a disk file mapped into memory (a
``numpy.memmap``, usable as any array), and every reader of such maps goes through
:func:`row_chunks`, which hands out bands of rows and afterwards gives the band's pages
back to the operating system (``madvise(MADV_DONTNEED)``: the values stay in the file and
in the page cache, which the kernel can write out and reuse, and leave this process's
resident memory).  The files are deleted as soon as they are mapped, so a killed run
leaves nothing behind; the space returns when the last array over it is dropped.

The reductions here (:func:`any_finite`, :func:`finite_fraction`, :func:`nanmedian`) and
:func:`derive` work band by band on any array, in memory or not, with the same results as
numpy's whole-array functions.
"""
from __future__ import annotations

import mmap
import os
import tempfile
from contextlib import contextmanager

import numpy as np

__all__ = ["allocate", "on_disk", "scratch_folder", "bands", "row_chunks", "release", "derive",
           "any_true", "any_finite", "finite_fraction", "nanmedian", "MAPS_SHARE", "CHUNK_BYTES"]

MAPS_SHARE = 0.25  # maps beyond this share of max_memory go to disk
CHUNK_BYTES = 32 << 20  # band size for readers of maps: 32 MB of one map at a time

_SCRATCH = [None]  # folder for map files; None: the system's temporary folder


@contextmanager
def scratch_folder(path):
    """Put map files made inside the block into ``path`` (a run's staging folder, on the
    disk that will hold the products anyway) instead of the temporary folder."""
    old, _SCRATCH[0] = _SCRATCH[0], None if path is None else os.fspath(path)
    try:
        yield
    finally:
        _SCRATCH[0] = old


def on_disk(arr) -> bool:
    """Whether ``arr`` is a map kept on disk (a memory map, or a view of one, whose pages
    :func:`release` can give back)."""
    return getattr(arr, "_mmap", None) is not None


def allocate(outputs: dict, plane: tuple, *, max_memory: int) -> dict:
    """Full-size maps for ``outputs`` = {name: (leading shape, dtype, fill)} over a plane
    of shape ``plane`` = (ny, nx): in memory when they take at most ``MAPS_SHARE`` of
    ``max_memory``, else each on a deleted disk file (see the module docstring)."""
    shapes = {k: (tuple(lead) + tuple(plane), np.dtype(dt), fill)
              for k, (lead, dt, fill) in outputs.items()}
    total = sum(int(np.prod(s)) * dt.itemsize for s, dt, _ in shapes.values())
    if total <= MAPS_SHARE * max_memory:
        return {k: np.full(s, fill, dtype=dt) for k, (s, dt, fill) in shapes.items()}
    out = {}
    for k, (s, dt, fill) in shapes.items():
        out[k] = _disk_array(s, dt)
        for ys, band in row_chunks(out[k]):
            band[...] = fill
    return out


def _disk_array(shape, dtype) -> np.memmap:
    fd, path = tempfile.mkstemp(prefix="kinemap-map-", suffix=".bin", dir=_SCRATCH[0])
    try:
        nbytes = max(1, int(np.prod(shape)) * np.dtype(dtype).itemsize)
        os.ftruncate(fd, nbytes)  # sparse: no disk is used before values are written
        arr = np.memmap(path, dtype=dtype, mode="r+", shape=shape)
    finally:
        os.close(fd)
        os.unlink(path)  # the mapping keeps the file alive; nothing is left behind
    return arr


def release(arr) -> None:
    """Give the resident pages of a map on disk back to the system (no-op in memory)."""
    m = getattr(arr, "_mmap", None)
    if m is not None and hasattr(m, "madvise") and hasattr(mmap, "MADV_DONTNEED"):
        m.madvise(mmap.MADV_DONTNEED)


def bands(arr, *, axis: int = -2, multiple: int = 1, chunk_bytes: int | None = None):
    """Yield ``(slice, band)``: consecutive slices of ``arr`` along ``axis`` of about
    ``chunk_bytes`` (default ``CHUNK_BYTES``), a whole ``multiple`` of elements long
    except the last.  A map on disk gets its pages back after each band, and when the
    reader stops early (``any(...)`` does)."""
    axis = axis % arr.ndim if arr.ndim else 0
    n = arr.shape[axis] if arr.ndim else 1
    per_item = max(1, arr.nbytes // max(n, 1))
    step = multiple * max(1, min(-(-n // multiple), (chunk_bytes or CHUNK_BYTES)
                                 // (per_item * multiple)))
    disk = on_disk(arr)
    lead = (slice(None),) * axis
    try:
        for i0 in range(0, n, step):
            sl = slice(i0, min(n, i0 + step))
            yield sl, (arr[lead + (sl,)] if arr.ndim else arr)
            if disk:
                release(arr)
    finally:
        if disk:
            release(arr)


def row_chunks(arr, *, chunk_bytes: int | None = None):
    """Yield ``(rows slice, arr[..., rows, :])`` bands covering a map (last two axes
    (ny, nx)); :func:`bands` along the rows."""
    if arr.ndim < 2:
        return bands(arr, axis=0, chunk_bytes=chunk_bytes)
    return bands(arr, axis=-2, chunk_bytes=chunk_bytes)


def derive(arr, fn, dtype) -> np.ndarray:
    """``fn(arr)`` (an element-wise function returning ``dtype``), computed band by band
    into a map kept where ``arr`` is kept (memory or disk)."""
    if not on_disk(arr):
        return np.asarray(fn(arr), dtype=dtype)
    out = _disk_array(arr.shape, dtype)
    for ys, band in row_chunks(arr):
        out[..., ys, :] = fn(band)
        release(out)
    return out


def any_true(arr, test=None) -> bool:
    """``test(arr).any()`` (``arr.any()`` without a test), band by band."""
    return any(bool((band if test is None else test(band)).any()) for _, band in row_chunks(arr))


def any_finite(arr) -> bool:
    """``np.isfinite(arr).any()``, band by band."""
    return any_true(arr, np.isfinite)


def finite_fraction(arr) -> float:
    """Fraction of finite values of ``arr`` (0 for an empty array), band by band."""
    n = sum(int(np.count_nonzero(np.isfinite(band))) for _, band in row_chunks(arr))
    return n / arr.size if arr.size else 0.0


def nanmedian(arr) -> float:
    """``np.nanmedian(arr)`` of a map, without copying it whole.

    The finite values are counted in 4096 bins between their extremes; the range is
    narrowed to the bins that hold the median's order statistics until those hold few
    enough values to gather and sort (each narrowing is one pass).  NaN when no value is
    finite.
    """
    lo, hi, n = np.inf, -np.inf, 0
    for _, band in row_chunks(arr):
        v = band[np.isfinite(band)]
        if v.size:
            lo, hi, n = min(lo, float(v.min())), max(hi, float(v.max())), n + v.size
    if n == 0:
        return float("nan")
    k_hi = n // 2  # the order statistics a median needs (0-based): k, or k-1 and k
    k_lo = k_hi if n % 2 else k_hi - 1
    below, closed = 0, True  # values below the range; whether the range includes hi
    while True:
        counts, ranged = _bin_counts(arr, lo, hi, closed)
        if ranged <= _GATHER or lo == hi:
            break
        edges = np.linspace(lo, hi, _NBINS + 1)
        cum = below + np.cumsum(counts)
        b_lo = int(np.searchsorted(cum, k_lo, "right"))
        b_hi = int(np.searchsorted(cum, k_hi, "right"))
        if edges[b_lo] == lo and edges[b_hi + 1] == hi:  # bins too fine for floats
            break
        below = int(cum[b_lo - 1]) if b_lo else below
        closed = closed and b_hi == _NBINS - 1
        lo, hi = float(edges[b_lo]), float(edges[b_hi + 1])
    if lo == hi:
        return lo
    vals = np.sort(np.concatenate([v for _, v in _in_range(arr, lo, hi, closed)]))
    return float(0.5 * (vals[k_lo - below] + vals[k_hi - below]))


_NBINS = 4096
_GATHER = CHUNK_BYTES // 8  # values few enough to gather in memory and sort


def _in_range(arr, lo, hi, closed):
    for ys, band in row_chunks(arr):
        v = band[np.isfinite(band)]
        yield ys, v[(v >= lo) & ((v <= hi) if closed else (v < hi))]


def _bin_counts(arr, lo, hi, closed):
    """(counts in _NBINS equal bins of [lo, hi] or [lo, hi), values in the range)."""
    edges = np.linspace(lo, hi, _NBINS + 1)
    counts = np.zeros(_NBINS, dtype=np.int64)
    for _, v in _in_range(arr, lo, hi, closed):
        # bin i holds edges[i] <= v < edges[i+1]; hi (when closed) goes into the last
        counts += np.bincount(np.clip(np.searchsorted(edges, v, "right") - 1, 0, _NBINS - 1),
                              minlength=_NBINS)
    return counts, int(counts.sum())
