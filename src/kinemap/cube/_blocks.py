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

__all__ = ["iter_blocks", "block_rows", "DEFAULT_MAX_MEMORY"]

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


def iter_blocks(cube, *, max_memory: int = DEFAULT_MAX_MEMORY, factor: float = 6.0,
                progress: bool | str = False, dtype=np.float64):
    """Yield ``(rows, block)``: a row slice and the float64 data of those rows.

    ``progress`` is False, True or a label for the progress bar.
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
            block = np.asarray(cube.data[:, ys, :], dtype=dtype)
            yield ys, block
            if bar is not None:
                bar.update(ys.stop - ys.start)
    finally:
        if bar is not None:
            bar.close()
