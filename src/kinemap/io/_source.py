"""Read bands of rows straight from the FITS file, so memory stays bounded and workers in
other processes can read their own blocks.

A memory map would be simpler, but every page it touches stays in the process' resident
set until the map is dropped, so a pass over a 30 GB cube would look like 30 GB of memory.
Explicit reads of each channel's rows (``os.pread``) keep only the block in memory.  Cubes
whose axes are not in the usual order (spectral axis first in numpy order) are read
through a fresh memory map per block instead, which is dropped after the copy.
"""
from __future__ import annotations

import os
from dataclasses import dataclass, replace

import numpy as np

__all__ = ["FileSource", "SourceArray"]

_NATIVE = "<" if np.little_endian else ">"


@dataclass(frozen=True)
class FileSource:
    """Picklable recipe for rows ``ys`` of a cube: everything but the open file.

    Attributes
    ----------
    path : str
    offset : int
        Byte offset of the HDU's data in the file.
    raw_shape : tuple
        numpy shape of the HDU's data array.
    dtype : str
        FITS data type, e.g. '>f4'.
    drop, order : tuple
        Length-1 axes squeezed out, then the transpose that gives (spectral, y, x).
    channels, rows, cols : tuple (start, stop)
        The subset of the (spectral, y, x) cube the reader kept.
    bscale, bzero, blank
        FITS scaling of integer data (value = bzero + bscale * stored; BLANK -> NaN).
    """

    path: str
    offset: int
    raw_shape: tuple
    dtype: str
    drop: tuple
    order: tuple
    channels: tuple
    rows: tuple
    cols: tuple
    bscale: float = 1.0
    bzero: float = 0.0
    blank: int | None = None

    def _scale(self, stored):
        if np.dtype(self.dtype).kind == "f" and self.bscale == 1.0 and self.bzero == 0.0:
            return stored
        values = self.bzero + self.bscale * np.asarray(stored, dtype=np.float64)
        if self.blank is not None:
            values[np.asarray(stored) == self.blank] = np.nan
        return values

    @property
    def scaled(self) -> bool:
        return np.dtype(self.dtype).kind != "f" or self.bscale != 1.0 or self.bzero != 0.0

    def out_dtype(self):
        """float32 for unscaled 4-byte floats, float64 for everything else."""
        src = np.dtype(self.dtype)
        return np.dtype(np.float32 if src.itemsize == 4 and not self.scaled else np.float64)

    @property
    def standard(self) -> bool:
        return tuple(self.order) == (0, 1, 2)

    def read(self, ys: slice, *, dtype=None, swap: bool = True) -> np.ndarray:
        """Rows ``ys`` (relative to the subset) as a C-contiguous (nchan, rows, nx) array.

        ``dtype=None`` gives float32 for 4-byte data and float64 otherwise, native order.
        ``swap=False`` lets data read as it is stored (unscaled, of the dtype asked for)
        come back in the file's byte order (dtype '>f4' on a little-endian machine: the
        same values to numpy), for kernels that swap the bytes themselves while they load.
        """
        src = np.dtype(self.dtype)
        scaled = self.scaled
        out_dtype = dtype or self.out_dtype()
        y0, y1 = self.rows[0] + ys.start, self.rows[0] + ys.stop
        c0, c1 = self.channels
        x0, x1 = self.cols
        if self.standard:
            shape = [n for i, n in enumerate(self.raw_shape) if i not in self.drop]
            nraw_y, nraw_x = shape[1], shape[2]
            rowbytes = nraw_x * src.itemsize
            out = np.empty((c1 - c0, y1 - y0, x1 - x0), dtype=out_dtype)
            fd = os.open(self.path, os.O_RDONLY)
            direct = (not scaled and (x0, x1) == (0, nraw_x)
                      and np.dtype(out_dtype).itemsize == src.itemsize and hasattr(os, "preadv"))
            try:
                if direct:
                    # read each channel's rows straight into the output and swap the bytes
                    # in place: no temporary buffer, no second copy
                    for k, c in enumerate(range(c0, c1)):
                        start = self.offset + (c * nraw_y + y0) * rowbytes
                        view = memoryview(out[k]).cast("B")
                        got = os.preadv(fd, [view], start)
                        if got != view.nbytes:
                            _short_read(self.path)
                    if src.byteorder not in ("=", "|") and src.byteorder != _NATIVE:
                        if not swap:
                            return out.view(out.dtype.newbyteorder())
                        out.view(out.dtype.newbyteorder()).byteswap(inplace=True)
                    return out
                for k, c in enumerate(range(c0, c1)):
                    start = self.offset + (c * nraw_y + y0) * rowbytes
                    buf = os.pread(fd, (y1 - y0) * rowbytes, start)
                    if len(buf) != (y1 - y0) * rowbytes:
                        _short_read(self.path)
                    plane = np.frombuffer(buf, dtype=src).reshape(y1 - y0, nraw_x)
                    out[k] = self._scale(plane[:, x0:x1])
            finally:
                os.close(fd)
            return out
        mm = np.memmap(self.path, dtype=src, mode="r", offset=self.offset, shape=self.raw_shape)
        try:
            arr = mm.squeeze(axis=self.drop) if self.drop else mm
            arr = arr.transpose(self.order)[c0:c1, y0:y1, x0:x1]
            return np.ascontiguousarray(self._scale(arr), dtype=out_dtype)
        finally:
            del mm


def _short_read(path):
    from kinemap.errors import KinemapError

    raise KinemapError(f"{os.path.basename(path)}: the file ended before the cube's data did "
                       "(it was cut short or changed while kinemap read it); copy it again")


class SourceArray:
    """The whole (spectral, y, x) cube of a :class:`FileSource` as an array dask can slice.

    Every ``__getitem__`` is an independent read (its own file descriptor, ``os.pread``):
    no file handle or position is shared between threads, so threaded and prefetching
    schedulers get the same values as a serial read.  Scaled integers (BSCALE/BZERO/BLANK)
    come back as float64 with BLANK as NaN.
    """

    def __init__(self, source: FileSource):
        self.source = source
        self.shape = tuple(b - a for a, b in (source.channels, source.rows, source.cols))
        self.ndim = 3
        self.dtype = source.out_dtype()

    def __getitem__(self, item):
        if not isinstance(item, tuple):
            item = (item,)
        item = item + (slice(None),) * (3 - len(item))
        bounds, post, squeeze = [], [], []
        for axis, (key, n) in enumerate(zip(item, self.shape)):
            if isinstance(key, slice):
                start, stop, step = key.indices(n)
                # the bounding range, read forwards; the step (reversed too) is applied after
                bounds.append((start, max(stop, start)) if step > 0 else (stop + 1, start + 1))
                post.append(slice(None, None, step))
            else:
                k = int(key) + (n if int(key) < 0 else 0)
                bounds.append((k, k + 1))
                post.append(slice(None))
                squeeze.append(axis)
        if any(hi <= lo for lo, hi in bounds):
            out = np.empty([max(hi - lo, 0) for lo, hi in bounds], dtype=self.dtype)
        else:
            src = self.source
            sub = replace(src, channels=_shift(src.channels, bounds[0]),
                          rows=_shift(src.rows, bounds[1]), cols=_shift(src.cols, bounds[2]))
            out = sub.read(slice(0, bounds[1][1] - bounds[1][0]))
        out = out[tuple(post)]
        return out.squeeze(axis=tuple(squeeze)) if squeeze else out


def _shift(extent, bounds):
    return (extent[0] + bounds[0], extent[0] + bounds[1])
