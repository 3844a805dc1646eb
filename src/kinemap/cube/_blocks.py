"""Walk a cube in blocks of whole spectra so memory stays bounded.

Every per-pixel stage (noise, moments, line fits) uses :func:`iter_blocks`: a block is all
channels of a band of rows, ``(nchan, rows, nx)``, read as float64.  The band height is
chosen so that one block, times a working factor for the temporaries a stage makes, fits
in ``max_memory`` bytes.
"""
from __future__ import annotations

import numpy as np
from tqdm.auto import tqdm

from ..errors import KinemapError

__all__ = ["iter_blocks", "read_rows", "block_rows", "DEFAULT_MAX_MEMORY"]

DEFAULT_MAX_MEMORY = 1 << 30  # 1 GiB working set unless the caller says otherwise


def block_rows(shape, *, max_memory: int = DEFAULT_MAX_MEMORY, factor: float = 6.0) -> int:
    """Rows per block for a cube of ``shape`` = (nchan, ny, nx)."""
    nchan, ny, nx = shape
    per_row = nchan * nx * 8 * factor
    if nchan * 8 * factor > max_memory:
        raise KinemapError(
            f"'max_memory' of {max_memory} bytes cannot hold one spectrum of {nchan} channels "
            "with the stage's temporaries; raise it")
    return int(max(1, min(ny, max_memory // max(per_row, 1))))


def read_rows(cube, ys: slice, *, dtype=None) -> np.ndarray:
    """Rows ``ys`` of ``cube`` as a C-contiguous (nchan, rows, nx) array (see iter_blocks)."""
    if cube.source is not None:
        return cube.source.read(ys, dtype=dtype)
    raw = cube.data[:, ys, :]
    single = raw.dtype.kind == "f" and raw.dtype.itemsize == 4  # any byte order
    dt = dtype or (np.float32 if single else np.float64)
    return np.ascontiguousarray(np.asarray(raw), dtype=dt)


def iter_blocks(cube, *, max_memory: int = DEFAULT_MAX_MEMORY, factor: float = 6.0,
                progress: bool | str = False, dtype=np.float64):
    """Yield ``(rows, block)``: a row slice and the data of those rows, C-contiguous.

    ``dtype=None`` keeps float32 data as float32 (native byte order, for compiled kernels)
    and turns anything else into float64.  ``progress`` is False, True or a bar label.
    """
    nchan, ny, nx = cube.shape
    rows = block_rows(cube.shape, max_memory=max_memory, factor=factor)
    starts = range(0, ny, rows)
    bar = None
    if progress:
        bar = tqdm(total=ny, unit="row", desc=progress if isinstance(progress, str) else None,
                   leave=False, disable=None)
    try:
        for y0 in starts:
            ys = slice(y0, min(ny, y0 + rows))
            yield ys, read_rows(cube, ys, dtype=dtype)
            if bar is not None:
                bar.update(ys.stop - ys.start)
    finally:
        if bar is not None:
            bar.close()
