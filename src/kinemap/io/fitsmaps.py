"""FITS products: 2D maps with the cube's celestial WCS, 3D cubes with its full WCS.

Every file records the velocity convention (``VCONV``), rest value (``RESTFRQ`` or
``RESTWAV`` as in FITS WCS paper III: RESTWAV is always the VACUUM rest wavelength, also for
an air-wavelength cube, whose air rest wavelength goes into ``KMRWAIR``), frame (``SPECSYS``), beam (``BMAJ``/``BMIN``/``BPA``)
and provenance (``ORIGIN``, ``DATE``, ``KMINPUT``, ``KMSHA256``, and the options as
``HISTORY`` lines).
"""
from __future__ import annotations

import json
import warnings
from datetime import datetime, timezone

import astropy.units as u
import numpy as np
from astropy.io import fits

from kinemap._version import __version__
from kinemap.parallel import store
from kinemap.parallel.store import derive
from kinemap.spectral.airvac import fits_air_to_vacuum

__all__ = ["product_header", "write_fits"]


def product_header(meta, *, unit, description: str, key: str, options: dict | None = None,
                   ndim: int = 2, extra: dict | None = None, wcs=None) -> fits.Header:
    wcs = wcs if wcs is not None else (meta.wcs if ndim == 2 else meta.wcs3d)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        h = wcs.to_header()
    unit = u.Unit(unit)
    if not (unit == u.one and key in ("nchan", "mask", "fit_status", "width_status", "ncomp")):
        try:
            h["BUNIT"] = (unit.to_string(format="fits"), "unit of the values")
        except ValueError:
            h["BUNIT"] = (unit.to_string(), "unit of the values")
    h["BTYPE"] = (key, "kinemap product")
    h["VCONV"] = (meta.convention, "radio, optical or relativistic")
    if meta.rest_value is not None:
        rv = meta.rest_value
        if rv.unit.is_equivalent(u.Hz):
            h["RESTFRQ"] = (rv.to_value(u.Hz), "[Hz] rest frequency used for velocities")
        elif meta.medium == "air":
            # RESTWAV is a vacuum wavelength whatever the axis (Greisen et al. 2006, A&A 446,
            # 747); wcslib converts an AWAV axis to vacuum before the Doppler formula, so an
            # air value here would shift every velocity it derives (82.7 km/s at H-alpha).
            # The inverse of the formula the reader applies keeps the round trip exact.
            air = rv.to_value(u.AA)
            h["RESTWAV"] = (float(fits_air_to_vacuum(air)) * 1e-10,
                            "[m] rest wavelength in vacuum (FITS standard)")
            h["KMRWAIR"] = (air * 1e-10, "[m] rest wavelength in air, used for velocities")
        else:
            h["RESTWAV"] = (rv.to_value(u.m), "[m] rest wavelength in vacuum")
    if meta.frame:
        h["SPECSYS"] = (meta.frame, "spectral reference frame of velocities")
    if meta.beam is not None:
        h["BMAJ"] = (meta.beam.major.to_value(u.deg), "[deg] beam major axis FWHM")
        h["BMIN"] = (meta.beam.minor.to_value(u.deg), "[deg] beam minor axis FWHM")
        h["BPA"] = (meta.beam.pa.to_value(u.deg), "[deg] beam position angle")
    h["ORIGIN"] = (f"kinemap {__version__}", "software that made this file")
    h["DATE"] = (datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S"), "UTC creation time")
    # FITS cards hold printable ASCII only: other characters of a file name are escaped
    # (Python's unicode_escape, reversible); a long name continues on CONTINUE cards
    h["KMINPUT"] = (str(meta.source).encode("unicode_escape").decode("ascii"),
                    "input cube file name")
    if meta.checksum:
        h["KMSHA256"] = meta.checksum  # 64 hex digits leave no room for a comment
    h["KMCTYPE"] = (meta.ctype_original, "spectral CTYPE of the input, as written")
    for k, v in (extra or {}).items():
        h[k] = v
    h.add_history(f"kinemap {__version__}: {description}")
    if options:
        text = json.dumps(options, sort_keys=True, default=str)
        for i in range(0, len(text), 60):
            h.add_history("options " + text[i:i + 60])
    return h


# file dtype (big-endian, as FITS stores numbers) of each array dtype written as it is
_FILE_DTYPES = {np.dtype(t): np.dtype(t).newbyteorder(">")
                for t in (np.uint8, np.int16, np.int32, np.int64, np.float32, np.float64)}


def write_fits(path, data, header) -> None:
    """Write one HDU with CHECKSUM/DATASUM.  astropy's WCS comments that do not fit on a
    card are shortened (their warning is not the user's concern).

    The data go to the file a band at a time, converted to the file's byte order band by
    band, so writing a map costs no full-size copy (a map kept on disk by
    :mod:`kinemap.parallel.store` is never wholly in memory); the checksums are summed
    over the same bands.  Types FITS has no plain BITPIX for (unsigned 16/32-bit) go
    through astropy's own writer, which scales them.
    """
    arr = data if isinstance(data, np.ndarray) else np.asarray(data)
    if arr.dtype == bool:
        arr = derive(arr, lambda a: a.astype(np.uint8), np.uint8)
    if arr.dtype.kind == "f" and arr.dtype.itemsize not in (4, 8):  # float16, float128
        arr = arr.astype(np.float32)
    native = arr.dtype.newbyteorder("=")
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Card is too long")
        if native not in _FILE_DTYPES or arr.ndim == 0:
            fits.PrimaryHDU(data=arr, header=header).writeto(path, overwrite=True, checksum=True)
            return
        # the structural cards (BITPIX, NAXISn, ...) as astropy writes them for this array,
        # from a zero-size stand-in of its shape and type
        stand_in = np.broadcast_to(np.zeros((), dtype=native), arr.shape)
        h = fits.PrimaryHDU(data=stand_in, header=header).header.copy()
        h["CHECKSUM"], h["DATASUM"] = "0" * 16, "0"
        size = len(h.tostring())
    file_dtype = _FILE_DTYPES[native]
    datasum = _OnesSum()
    with open(path, "wb") as fh:
        fh.write(b"\0" * size)  # the header goes in last, when its sums are known
        for _, part in store.bands(arr, axis=0):  # slabs in the file's (C) order
            raw = np.ascontiguousarray(part, dtype=file_dtype).view(np.uint8).reshape(-1)
            datasum.add(raw)
            fh.write(raw.data)
        pad = -(arr.size * file_dtype.itemsize) % 2880
        fh.write(b"\0" * pad)
        h["DATASUM"] = (str(datasum.value), "data unit checksum")
        h["CHECKSUM"] = ("0" * 16, "HDU checksum")
        text = h.tostring().encode("ascii")
        total = _OnesSum()
        total.add(np.frombuffer(text, np.uint8))
        h["CHECKSUM"] = (_encode_checksum(_ones_add(total.value, datasum.value)),
                         "HDU checksum")
        text = h.tostring().encode("ascii")
        if len(text) != size:  # pragma: no cover - the cards' count did not change
            raise RuntimeError("FITS header length changed while writing")
        fh.seek(0)
        fh.write(text)


def _ones_add(a: int, b: int) -> int:
    """32-bit ones'-complement sum (end-around carry)."""
    s = a + b
    while s >> 32:
        s = (s & 0xFFFFFFFF) + (s >> 32)
    return s


class _OnesSum:
    """The FITS checksum sum (FITS Standard 4.0, appendix J, from memory: 32-bit
    ones'-complement sum of the bytes read as big-endian 32-bit words), over bytes given
    in pieces of any length; a last partial word is padded with zeros, as FITS pads."""

    def __init__(self):
        self._sum, self._rest = 0, np.zeros(0, np.uint8)

    def add(self, raw: np.ndarray) -> None:
        if self._rest.size:
            k = min(4 - self._rest.size, raw.size)
            self._rest, raw = np.concatenate([self._rest, raw[:k]]), raw[k:]
            if self._rest.size < 4:
                return
            self._word(self._rest)
            self._rest = np.zeros(0, np.uint8)
        whole = raw.size - raw.size % 4
        self._word(raw[:whole])
        self._rest = raw[whole:].copy()

    def _word(self, raw):
        words = raw.view(">u4")
        self._sum = _ones_add(self._sum, int(words.sum(dtype=np.uint64)))

    @property
    def value(self) -> int:
        s = self._sum
        if self._rest.size:
            s = _ones_add(s, int(np.concatenate(
                [self._rest, np.zeros(4 - self._rest.size, np.uint8)]).view(">u4")[0]))
        return s


_EXCLUDE = frozenset(range(0x3A, 0x41)) | frozenset(range(0x5B, 0x61))  # :;<=>?@ [\\]^_`


def _encode_checksum(value: int) -> str:
    """The 16-character ASCII encoding of the complement of ``value`` (the FITS checksum
    convention: each byte split over four characters from '0', punctuation avoided, the
    string rotated one place to the right)."""
    value = ~value & 0xFFFFFFFF
    chars = [0] * 16
    for i in range(4):
        byte = (value >> (24 - 8 * i)) & 0xFF
        quotient, remainder = byte // 4 + 0x30, byte % 4
        ch = [quotient + remainder, quotient, quotient, quotient]
        changed = True
        while changed:
            changed = False
            for j in (0, 2):
                if ch[j] in _EXCLUDE or ch[j + 1] in _EXCLUDE:
                    ch[j] += 1
                    ch[j + 1] -= 1
                    changed = True
        for j in range(4):
            chars[4 * j + i] = ch[j]
    return "".join(chr(chars[(k - 1) % 16]) for k in range(16))
