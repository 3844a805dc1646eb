"""Walk a cube in blocks of whole spectra so memory stays bounded.

Every per-pixel stage (noise, moments, line fits) goes through :func:`map_blocks`: a block
is all channels of a band of rows, ``(nchan, rows, nx)``.  The band height is chosen so
that one block, times a working factor for the temporaries a stage makes, fits in
``max_memory`` bytes.  The same block function runs in this process (the default: its
compiled kernels use every core) or, given a dask.distributed client, as one task per
block on the cluster's workers, which read their blocks from the file themselves.  Either
way each pixel sees the same code and the same data, so the maps are identical.
"""
from __future__ import annotations

import numpy as np
from tqdm.auto import tqdm

from kinemap.errors import KinemapError
from kinemap.parallel.store import MAPS_SHARE, allocate, release

__all__ = ["read_rows", "block_rows", "task_rows", "map_blocks", "DEFAULT_MAX_MEMORY"]

DEFAULT_MAX_MEMORY = 1 << 30  # 1 GiB working set unless the caller says otherwise
# a block's results: float64 values per spectrum, made once by the kernel and once more by
# the reshapes and type changes of the block function
RESULT_BYTES = 16
TASKS_PER_WORKER = 4  # on a cluster, blocks are cut so each worker gets at least this many


def block_rows(shape, *, max_memory: int = DEFAULT_MAX_MEMORY, factor: float = 6.0,
               per_pixel: float = 0.0) -> int:
    """Rows per block for a cube of ``shape`` = (nchan, ny, nx): ``factor`` float64 copies
    of the block's spectra plus ``per_pixel`` bytes of results per spectrum fit in
    ``max_memory`` (cubes with few channels and wide planes make more results than data)."""
    nchan, ny, nx = shape
    per_spectrum = nchan * 8 * factor + per_pixel
    per_row = nx * per_spectrum
    if per_spectrum > max_memory:
        raise KinemapError(
            f"'max_memory' of {max_memory} bytes cannot hold one spectrum of {nchan} channels "
            "with the stage's temporaries; raise it")
    return int(max(1, min(ny, max_memory // max(per_row, 1))))


def read_rows(cube, ys: slice, *, dtype=np.float32, swap: bool = True) -> np.ndarray:
    """Rows ``ys`` of ``cube`` as a C-contiguous (nchan, rows, nx) array, float32 unless
    ``dtype`` says otherwise, whatever the file stores.

    The kernels load float32 and accumulate in float64, so a float64 or scaled-integer
    cube costs no precision that its noise would not hide, and every kernel has one
    compiled version (a float64 block made numba compile the map kernels again, about 35 s,
    in a user's first run on such a cube).

    ``swap=False``: float32 data read from a file may keep the file's byte order (see
    :meth:`kinemap.io._source.FileSource.read`); the caller's kernel swaps the bytes.
    """
    if cube.source is not None:
        return cube.source.read(ys, dtype=dtype, swap=swap)
    return np.ascontiguousarray(np.asarray(cube.data[:, ys, :]), dtype=dtype)


def task_rows(shape, *, max_memory: int, factor: float, client=None, outputs=None) -> int:
    """Rows per block as :func:`map_blocks` cuts them (capped on a cluster so each worker
    gets at least ``TASKS_PER_WORKER`` blocks; one big block would keep the others idle).

    The blocks get the share of ``max_memory`` the full-size maps of ``outputs`` do not
    take (:data:`kinemap.parallel.store.MAPS_SHARE`), and each spectrum's results count:
    ``RESULT_BYTES`` per output value."""
    per_pixel = RESULT_BYTES * sum(int(np.prod(lead)) for lead, _, _ in (outputs or {}).values())
    rows = block_rows(shape, max_memory=int(max_memory * (1 - MAPS_SHARE)), factor=factor,
                      per_pixel=per_pixel)
    if client is not None:
        nworkers = max(1, len(client.nthreads()))
        rows = max(1, min(rows, -(-shape[1] // (TASKS_PER_WORKER * nworkers))))
    return rows


def _row_slices(ny, rows):
    return [slice(y0, min(ny, y0 + rows)) for y0 in range(0, ny, rows)]


def _run_block(source, data, ys, func, args, kwargs, threads):
    """One block on a worker: read it (from the file when possible) and run ``func``."""
    if threads:
        import numba

        numba.set_num_threads(max(1, min(int(threads), numba.config.NUMBA_NUM_THREADS)))
    block = source.read(ys, dtype=np.float32) if source is not None else data
    return ys, func(block, **args, **kwargs)


def _blocks_in_order(cube, slices, *, prefetch, swap):
    """Yield (ys, block) for every slice, reading the next block ahead when ``prefetch``."""
    if not prefetch or len(slices) < 2:
        for ys in slices:
            yield ys, read_rows(cube, ys, swap=swap)
        return
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="kinemap-read") as pool:
        pending = pool.submit(read_rows, cube, slices[0], swap=swap)
        for i, ys in enumerate(slices):
            block = pending.result()
            # drop the reference before the next read starts, so at most two blocks live
            pending = (pool.submit(read_rows, cube, slices[i + 1], swap=swap)
                       if i + 1 < len(slices) else None)
            yield ys, block
            del block


def map_blocks(cube, func, *, outputs: dict, max_memory: int = DEFAULT_MAX_MEMORY,
               factor: float = 6.0, block_args=None, progress: bool | str = False,
               client=None, prefetch: bool = False, swap: bool = True, **kwargs) -> dict:
    """Run ``func(block, **block_args(ys), **kwargs)`` on every block and assemble the maps.

    Parameters
    ----------
    func : callable
        Module-level function (picklable) returning a dict of arrays whose last two axes
        are (rows, nx).
    outputs : dict name -> (leading shape tuple, dtype, fill value)
        The full-size maps to assemble, shape ``leading + (ny, nx)``; kept on disk when
        they would take more than a share of ``max_memory`` (:mod:`kinemap.parallel.store`).
    block_args : callable ys -> dict, optional
        Per-block arguments (slices of noise maps, masks), evaluated here.
    client : distributed.Client, optional
        Run one task per block on the cluster.
    prefetch : bool
        In this process, read the next block in a thread while ``func`` works on the
        current one (the read releases the GIL, and so do the nogil kernels).  Two blocks
        are then in memory: the stage's ``factor`` must count both.
    swap : bool
        False: blocks read from a file may keep the file's byte order (``func`` swaps).
    """
    nchan, ny, nx = cube.shape
    rows = task_rows(cube.shape, max_memory=max_memory, factor=factor, client=client,
                     outputs=outputs)
    # maps too large for the memory bound are kept on disk (parallel.store)
    out = allocate(outputs, (ny, nx), max_memory=max_memory)
    bar = None
    if progress:
        bar = tqdm(total=ny, unit="row", desc=progress if isinstance(progress, str) else None,
                   leave=False, disable=None)

    def store(ys, res):
        for k, arr in res.items():
            out[k][..., ys, :] = arr
            release(out[k])
        if bar is not None:
            bar.update(ys.stop - ys.start)

    try:
        slices = _row_slices(ny, rows)
        if client is None:
            for ys, block in _blocks_in_order(cube, slices, prefetch=prefetch, swap=swap):
                store(ys, func(block, **(block_args(ys) if block_args else {}), **kwargs))
        else:
            from distributed import as_completed

            threads = min(client.nthreads().values() or [1])
            futures = []
            for ys in slices:
                data = None if cube.source is not None else read_rows(cube, ys)
                futures.append(client.submit(_run_block, cube.source, data, ys, func,
                                             block_args(ys) if block_args else {}, kwargs,
                                             threads, pure=False))
            for fut in as_completed(futures):
                ys, res = fut.result()
                store(ys, res)
    finally:
        if bar is not None:
            bar.close()
    return out
