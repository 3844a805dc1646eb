"""Turn whatever the caller holds into an open FITS cube HDU.

:func:`kinemap.io.read_cube` accepts a path, an astropy HDU or HDUList, a
``spectral_cube.SpectralCube`` or ``(array, header_or_wcs)``.  Each becomes an
:class:`Opened`: an HDUList, the cube's HDU in it, a name for messages and provenance,
and (for files only) the path the block reader may read from directly.
"""
from __future__ import annotations

import hashlib
import os
import sys
from dataclasses import dataclass

import astropy.units as u
import numpy as np
from astropy.io import fits
from astropy.wcs import WCS

from kinemap.errors import KinemapError
from kinemap.io._header import find_cube_hdu, open_fits

__all__ = ["Opened", "open_source", "SOURCE_KINDS"]

SOURCE_KINDS = ("a FITS path", "an astropy HDU or HDUList", "a spectral_cube.SpectralCube",
                "(array, header_or_wcs)")


@dataclass
class Opened:
    """An open cube.  ``path`` is set only when the data come straight from a file on disk
    (so blocks may be read from it by offset); ``owned`` says whether we must close
    ``hdul`` (we opened it)."""

    hdul: fits.HDUList
    hdu: object
    name: str
    path: str | None = None
    owned: bool = False
    archive: str | None = None  # 'gzip' or 'bzip2': no block reads from the file

    def close(self):
        if self.owned:
            self.hdul.close()


def open_source(source, *, hdu=None) -> Opened:
    """An :class:`Opened` for ``source``; a :class:`KinemapError` naming the accepted kinds
    for anything else."""
    if isinstance(source, (str, os.PathLike)):
        path = os.fspath(source)
        hdul = open_fits(path)
        try:
            cube_hdu = find_cube_hdu(hdul, path, hdu)
        except BaseException:
            hdul.close()
            raise
        from kinemap.io.validate import compression

        return Opened(hdul, cube_hdu, os.path.basename(path), path=path, owned=True,
                      archive=compression(path))
    if isinstance(source, fits.HDUList):
        name = os.path.basename(source.filename() or "") or "in-memory HDUList"
        return Opened(source, find_cube_hdu(source, name, hdu), name)
    if isinstance(source, (fits.PrimaryHDU, fits.ImageHDU, fits.CompImageHDU)):
        hdul = fits.HDUList([source] if isinstance(source, fits.PrimaryHDU)
                            else [fits.PrimaryHDU(), source])
        return Opened(hdul, find_cube_hdu(hdul, "the HDU"), "in-memory HDU")
    if _is_spectral_cube(source):
        hdul = source.hdulist  # a SpectralCube's mask becomes NaN (no data), as in kinemap
        return Opened(hdul, find_cube_hdu(hdul, "the SpectralCube"), "in-memory SpectralCube")
    if isinstance(source, tuple) and len(source) == 2:
        hdul = fits.HDUList([_hdu_from_array(*source)])
        return Opened(hdul, find_cube_hdu(hdul, "the array"), "in-memory array")
    raise KinemapError(f"'source' must be {', '.join(SOURCE_KINDS[:-1])} or {SOURCE_KINDS[-1]}, "
                       f"got {type(source).__name__}")


def _is_spectral_cube(obj) -> bool:
    if "spectral_cube" not in sys.modules:  # nobody made one: do not pay for the import
        return False
    from spectral_cube.spectral_cube import BaseSpectralCube

    return isinstance(obj, BaseSpectralCube)


def _hdu_from_array(data, header_or_wcs) -> fits.PrimaryHDU:
    """A primary HDU from (array, Header or WCS); a Quantity's unit becomes BUNIT."""
    unit = None
    if isinstance(data, u.Quantity):
        data, unit = data.value, data.unit
    data = np.asarray(data)
    if data.ndim not in (3, 4):
        raise KinemapError(f"the array has {data.ndim} axes; give a cube of shape "
                           "(nchan, ny, nx) (numpy order, as in FITS)")
    if isinstance(header_or_wcs, WCS):
        header = header_or_wcs.to_header()
    elif isinstance(header_or_wcs, fits.Header):
        header = header_or_wcs.copy()
    else:
        raise KinemapError("with an array, give a FITS header or an astropy WCS as the second "
                           f"item, got {type(header_or_wcs).__name__}")
    for key in ("SIMPLE", "XTENSION", "BITPIX", "PCOUNT", "GCOUNT", "EXTEND", "BSCALE", "BZERO",
                "BLANK") + tuple(k for k in header if k.startswith("NAXIS")):
        header.remove(key, ignore_missing=True, remove_all=True)
    if unit is not None:
        header["BUNIT"] = unit.to_string("fits")
    return fits.PrimaryHDU(data=data, header=header)


def data_checksum(data) -> str:
    """SHA-256 of an in-memory array's bytes (the provenance of a cube with no file)."""
    h = hashlib.sha256()
    arr = np.ascontiguousarray(data)
    h.update(str((arr.dtype.str, arr.shape)).encode())
    h.update(memoryview(arr).cast("B"))
    return h.hexdigest()
