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
from dataclasses import dataclass

import numpy as np

__all__ = ["FileSource"]

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
    def standard(self) -> bool:
        return tuple(self.order) == (0, 1, 2)

    def read(self, ys: slice, *, dtype=None, swap: bool = True) -> np.ndarray:
        """Rows ``ys`` (relative to the subset) as a C-contiguous (nchan, rows, nx) array.

        ``dtype=None`` gives float32 for 4-byte data and float64 otherwise, native order.
        ``swap=False`` lets unscaled float32 data of the other byte order come back as it
        is in the file (dtype '>f4' on a little-endian machine: the same values to numpy),
        for kernels that swap the bytes themselves while they load the data.
        """
        src = np.dtype(self.dtype)
        scaled = src.kind != "f" or self.bscale != 1.0 or self.bzero != 0.0
        out_dtype = dtype or (np.float32 if src.itemsize == 4 and not scaled else np.float64)
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
                            raise OSError(f"short read from {self.path}")
                    if src.byteorder not in ("=", "|") and src.byteorder != _NATIVE:
                        if not swap and dtype is None:
                            return out.view(out.dtype.newbyteorder())
                        out.view(out.dtype.newbyteorder()).byteswap(inplace=True)
                    return out
                for k, c in enumerate(range(c0, c1)):
                    start = self.offset + (c * nraw_y + y0) * rowbytes
                    buf = os.pread(fd, (y1 - y0) * rowbytes, start)
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
