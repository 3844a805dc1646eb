"""The one validation layer of the reader: every check a cube's file and header must pass
before any data is touched.

Each problem is a :class:`~kinemap.errors.KinemapError` in one line that names the keyword,
its value and the fix; a header that is suspicious but usable gives a
:class:`~kinemap.errors.HeaderWarning`.  The checks run in the order the reader needs them:

1. :func:`check_file` on the path, before astropy opens it: a regular file (not a named
   pipe, a folder or a device), and a walk over the raw header blocks of every HDU
   (END card, BITPIX, NAXISn, the file long enough for each HDU's data, nothing but FITS
   extensions after the last one).  It reads the headers only, whatever the file's size.
2. :func:`check_header` on the cube HDU's header, before the WCS is built: the axes'
   CTYPE/CRVAL/CDELT/CRPIX/CUNIT, the scaling keywords, the rest values, PC/CD terms that
   mix the spectral and celestial axes.
3. :func:`check_velocity_axis`, :func:`check_beam`, :func:`check_beam_table` and
   :func:`check_time_keywords` once the reader has worked out the axis, the beam and
   whether a frame change is asked for.
"""
from __future__ import annotations

import math
import os
import re
import stat
import warnings

import astropy.units as u
import numpy as np

from kinemap.errors import HeaderWarning, KinemapError
from kinemap.spectral.axes import SPECTRAL_CTYPES

__all__ = ["card_value", "check_file", "check_header", "check_velocity_axis", "check_beam",
           "check_beam_table", "check_time_keywords", "wcs_error_reason", "compression"]

BLOCK = 2880
CARD = 80
C_KMS = 299792.458  # speed of light, km/s (CODATA, exact by definition of the metre)
VALID_BITPIX = (8, 16, 32, 64, -32, -64)  # FITS Standard 4.0, table 8 (from memory)
_MAGIC = {b"\x1f\x8b": "gzip", b"BZh": "bzip2"}
_LON = ("RA--", "GLON", "ELON", "SLON", "HLON")
_LAT = ("DEC-", "GLAT", "ELAT", "SLAT", "HLAT")
_UNPARSED = object()


def _fail(name, message):
    raise KinemapError(f"{name}: {message}")


def compression(path) -> str | None:
    """'gzip' or 'bzip2' when the file's first bytes say so (whatever its name), else None."""
    with open(path, "rb") as fh:
        head = fh.read(3)
    for magic, kind in _MAGIC.items():
        if head.startswith(magic):
            return kind
    return None


# ---------------------------------------------------------------- 1. the file itself

def check_file(path) -> None:
    """Refuse special files and FITS files whose structure is broken, reading headers only."""
    name = os.path.basename(path)
    try:
        st = os.stat(path)
    except OSError as exc:
        _fail(name, f"cannot read the file ({exc.strerror}); check the path and its permissions")
    if stat.S_ISDIR(st.st_mode):
        raise KinemapError(f"{name} is a folder, not a FITS file; give the path of a FITS cube")
    if not stat.S_ISREG(st.st_mode):
        kind = ("a named pipe" if stat.S_ISFIFO(st.st_mode) else
                "a device" if stat.S_ISCHR(st.st_mode) or stat.S_ISBLK(st.st_mode) else
                "a socket" if stat.S_ISSOCK(st.st_mode) else "a special file")
        raise KinemapError(f"{name} is {kind}, not a regular file; copy the cube into a FITS "
                           "file first")
    if not os.access(path, os.R_OK):
        raise KinemapError(f"{name} is not readable (permission denied); check the file's "
                           "permissions")
    if st.st_size == 0:
        raise KinemapError(f"{name} is empty (0 bytes); give a FITS cube")
    if compression(path):
        return  # astropy decompresses it; the sizes are checked on the decompressed bytes
    with open(path, "rb") as fh:
        _walk(fh, st.st_size, name)


def _walk(fh, size, name) -> None:
    """Follow the HDUs by their headers' sizes: every header ends, every data unit fits."""
    offset, index = 0, 0
    while offset < size:
        cards, data_start = _read_header(fh, offset, size, name, index)
        where = "the primary header" if index == 0 else f"the header of HDU {index}"
        nbytes = _data_bytes(cards, name, where)
        _check_raw_scaling(cards, name, where)
        end = data_start + nbytes
        if end > size:
            have = size - data_start
            _fail(name, f"the file is cut short: {where} promises {nbytes} bytes of data "
                        f"({_shape_text(cards)}) but only {max(have, 0)} follow; the file is "
                        "truncated (copy it again) or BITPIX/NAXISn are wrong")
        padded = data_start + -(-nbytes // BLOCK) * BLOCK
        offset, index = padded, index + 1
        if offset >= size:
            return
        fh.seek(offset)
        head = fh.read(CARD)
        if not head.startswith(b"XTENSION"):
            if not head.strip(b"\0 ") and size - offset <= BLOCK:
                return  # a block of zero or blank fill after the last HDU: harmless
            zero = [f"NAXIS{i}" for i in range(1, (cards.get("NAXIS") or 0) + 1)
                    if cards.get(f"NAXIS{i}") == 0]
            if zero or cards.get("NAXIS") == 0:
                what = f"{zero[0]} = 0" if zero else "NAXIS = 0"
                _fail(name, f"{what} in {where} says there are no data, yet "
                            f"{size - offset} bytes follow; fix {zero[0] if zero else 'NAXIS'} "
                            "(the cube's axis lengths)")
            _fail(name, f"{size - offset} bytes follow the last HDU and are not a FITS "
                        f"extension: the data are longer than {where} says "
                        f"({_shape_text(cards)}); check BITPIX and NAXISn")


def _read_header(fh, offset, size, name, index):
    """The header's cards as {keyword: value} up to END, and where its data start."""
    cards, pos = {}, offset
    fh.seek(offset)
    where = "the primary header" if index == 0 else f"the header of HDU {index}"
    while True:
        block = fh.read(BLOCK)
        if pos == offset:
            _check_first_card(block[:CARD], index, name)
        if len(block) < BLOCK:
            _fail(name, f"{where} has no END card within the file's {size} bytes: the header "
                        "is cut short (copy the file again) or the file is not FITS")
        pos += BLOCK
        for i in range(0, BLOCK, CARD):
            card = block[i:i + CARD]
            key = card[:8].decode("ascii", "replace").strip()
            if key == "END":
                return cards, pos
            if card[8:10] == b"= " and key not in cards:
                cards[key] = _value(card[10:].decode("ascii", "replace"))


def _check_first_card(card, index, name):
    if index == 0 and not card.startswith(b"SIMPLE"):
        shown = card[:20].decode("ascii", "replace").rstrip()
        raise KinemapError(f"{name} is not a readable FITS file: it does not start with "
                           f"SIMPLE = T (it starts {shown!r}); give a FITS cube")
    if index > 0 and not card.startswith(b"XTENSION"):
        _fail(name, f"HDU {index} does not start with XTENSION; the file is damaged after "
                    f"HDU {index - 1}")


def _value(text):
    """A card's value: int, float, bool, str, None (empty) or _UNPARSED."""
    text = text.strip()
    if text.startswith("'"):
        m = re.match(r"'((?:[^']|'')*)'", text)
        return m.group(1).replace("''", "'").rstrip() if m else _UNPARSED
    text = text.split("/", 1)[0].strip()
    if not text:
        return None
    if text in ("T", "F"):
        return text == "T"
    try:
        return int(text)
    except ValueError:
        pass
    try:
        return float(text.replace("D", "E").replace("d", "e"))
    except ValueError:
        return _UNPARSED


def _is_int(v):
    return isinstance(v, int) and not isinstance(v, bool)


def _data_bytes(cards, name, where) -> int:
    bitpix = cards.get("BITPIX")
    if bitpix is None:
        _fail(name, f"{where} has no BITPIX; add BITPIX (-32 for float32 data)")
    if not _is_int(bitpix) or bitpix not in VALID_BITPIX:
        _fail(name, f"BITPIX = {_show(bitpix)} in {where} is not a FITS data type; it must be "
                    "one of 8, 16, 32, 64, -32, -64")
    naxis = cards.get("NAXIS")
    if not _is_int(naxis) or not 0 <= naxis <= 999:
        _fail(name, f"NAXIS = {_show(naxis)} in {where} is not a number of axes (0-999); "
                    "fix NAXIS")
    if naxis == 0:
        return 0
    count = 1
    for i in range(1, naxis + 1):
        n = cards.get(f"NAXIS{i}")
        if n is None:
            _fail(name, f"{where} has NAXIS = {naxis} but no NAXIS{i}; add NAXIS{i} (the "
                        f"length of axis {i})")
        if not _is_int(n) or n < 0:
            _fail(name, f"NAXIS{i} = {_show(n)} in {where} is not a length; it must be a "
                        "non-negative integer")
        count *= n
    pcount, gcount = cards.get("PCOUNT", 0), cards.get("GCOUNT", 1)
    if not (_is_int(pcount) and _is_int(gcount)) or pcount < 0 or gcount < 0:
        _fail(name, f"PCOUNT/GCOUNT = {_show(pcount)}/{_show(gcount)} in {where} are not "
                    "counts; fix them")
    if count == 0:
        return abs(bitpix) // 8 * gcount * pcount
    return abs(bitpix) // 8 * gcount * (pcount + count)


def _check_raw_scaling(cards, name, where):
    """BSCALE/BZERO/BLANK as written (astropy drops values it cannot parse, silently)."""
    for key in ("BSCALE", "BZERO"):
        v = cards.get(key)
        if key in cards and (isinstance(v, bool) or not isinstance(v, (int, float))
                             or not math.isfinite(v)):
            _fail(name, f"{key} = {_show(v)} in {where} is not a number; fix {key} "
                        f"({'1' if key == 'BSCALE' else '0'} for unscaled data) or remove it")
    if "BLANK" in cards and not _is_int(cards["BLANK"]):
        _fail(name, f"BLANK = {_show(cards['BLANK'])} in {where} is not an integer; BLANK "
                    "names the stored integer that means 'no data': fix or remove it")


def _shape_text(cards) -> str:
    naxis = cards.get("NAXIS") or 0
    dims = " x ".join(str(cards.get(f"NAXIS{i}")) for i in range(1, naxis + 1))
    return f"BITPIX {cards.get('BITPIX')}, NAXIS {dims or 0}"


def _show(value) -> str:
    return "(not a value)" if value is _UNPARSED else repr(value)


# ---------------------------------------------------------------- 2. the cube's header

def _axes_of(header, name):
    """(spectral axis number or None, longitude axis, latitude axis), 1-based, from CTYPE."""
    naxis = int(header.get("NAXIS", 0))
    spec = lon = lat = None
    for i in range(1, naxis + 1):
        ctype = card_value(header, f"CTYPE{i}") if f"CTYPE{i}" in header else None
        if ctype is None:
            continue
        if not isinstance(ctype, str) or isinstance(ctype, _Text):
            raise KinemapError(
                f"{name}: CTYPE{i} = {ctype!r} is not an axis type; write it as text, e.g. "
                "'RA---SIN', 'DEC--SIN' or 'FREQ'")
        head = ctype.strip().upper()[:4]
        if head in SPECTRAL_CTYPES and spec is None:
            spec = i
        elif head in _LON or (head.endswith("LN") and ctype[4:5] == "-"):
            lon = i
        elif head in _LAT or (head.endswith("LT") and ctype[4:5] == "-"):
            lat = i
    return spec, lon, lat


def _number(header, key, name, *, required=False, what="", fix=""):
    """The header's numeric value of ``key`` (None if absent and not required)."""
    if key not in header:
        if required:
            raise KinemapError(f"{name}: {key} is missing{what}; {fix}")
        return None
    value = card_value(header, key)
    if isinstance(value, bool) or not isinstance(value, (int, float, np.number)):
        raise KinemapError(f"{name}: {key} = {value!r} is not a number; {fix or 'fix ' + key}")
    value = float(value)
    if not math.isfinite(value):
        raise KinemapError(f"{name}: {key} = {value} is not finite; {fix or 'fix ' + key}")
    return value


class _Text(str):
    """A card astropy cannot parse, shown as written (e.g. ``NaN``)."""

    def __repr__(self):
        return str(self)


def card_value(header, key):
    """The card's value, or its text as written when astropy cannot parse it (NaN, ...)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # astropy's verification notes: our line says it
        try:
            return header[key]
        except Exception:  # astropy's VerifyError for an unparsable card
            card = header.cards[key]
            image = str(getattr(card, "_image", None) or card.image)
            return _Text(image[10:].split("/", 1)[0].strip() or image[8:].strip())


def _get(header, key, default=None):
    """``header.get(key)`` that never raises: an unparsable card comes back as its text."""
    return card_value(header, key) if key in header else default


def _has_cd(header, i, naxis) -> bool:
    return any(f"CD{i}_{j}" in header for j in range(1, naxis + 1))


def check_header(header, name) -> None:
    """Refuse a cube header whose axes, scaling or rest values cannot give right numbers."""
    naxis = int(header.get("NAXIS", 0))
    for i in range(1, naxis + 1):
        n = _get(header, f"NAXIS{i}")
        if not _is_int(n) or n < 1:
            raise KinemapError(f"{name}: NAXIS{i} = {n!r}; every axis of a cube needs a "
                               "positive length")
    _check_scaling(header, name)
    spec, lon, lat = _axes_of(header, name)
    if spec is not None:
        _check_spectral(header, name, spec, naxis)
    for i, kind in ((lon, "longitude"), (lat, "latitude")):
        if i is not None:
            _check_celestial(header, name, i, kind, naxis)
    if spec is not None:
        _check_mixing(header, name, spec, [a for a in (lon, lat) if a is not None], naxis)
    _check_rest(header, name)


def _check_scaling(header, name):
    bscale = _number(header, "BSCALE", name, fix="BSCALE must be a number (1 for unscaled data)")
    _number(header, "BZERO", name, fix="BZERO must be a number (0 for unscaled data)")
    if bscale == 0:
        raise KinemapError(f"{name}: BSCALE = 0 would make every value BZERO; fix BSCALE "
                           "(1 for unscaled data)")
    if "BLANK" in header:
        blank = _get(header, "BLANK")
        if not _is_int(blank):
            raise KinemapError(f"{name}: BLANK = {blank!r} is not an integer; BLANK names the "
                               "stored integer that means 'no data': fix or remove it")
        if int(header.get("BITPIX", 0)) < 0:
            warnings.warn(f"{name}: BLANK = {blank} is ignored for floating-point data "
                          "(NaN marks no data there)", HeaderWarning, stacklevel=4)


def _check_spectral(header, name, i, naxis):
    ctype = _get(header, f"CTYPE{i}").strip()
    fix = f"fix CRVAL{i}/CDELT{i}/CRPIX{i} of the {ctype} axis"
    _number(header, f"CRVAL{i}", name, required=True, fix=f"give CRVAL{i} as the {ctype} "
            f"value at the reference channel CRPIX{i}, a number", what=f" (the {ctype} value "
            "at the reference channel)")
    crpix = _number(header, f"CRPIX{i}", name, fix=fix)
    if crpix is None:
        warnings.warn(f"{name}: CRPIX{i} is missing; the reference channel is taken as 0 "
                      f"(wcslib's default), add CRPIX{i} if that is wrong", HeaderWarning,
                      stacklevel=4)
    if not _has_cd(header, i, naxis):
        cdelt = _number(header, f"CDELT{i}", name, required=True,
                        what=" (the channel width)", fix=f"give CDELT{i} as the channel "
                        f"width in CUNIT{i}, a number")
        if cdelt == 0:
            raise KinemapError(f"{name}: CDELT{i} = 0: channels without width; fix CDELT{i} "
                               f"(the channel width in CUNIT{i})")
    _check_unit(header, name, i, ctype)


_PHYSICAL_UNIT = {"frequency": u.Hz, "wavelength": u.m, "velocity": u.m / u.s}


def _check_unit(header, name, i, ctype):
    kind = SPECTRAL_CTYPES[ctype.upper()[:4]]
    text = _get(header, f"CUNIT{i}")
    if text is None or (isinstance(text, str) and not text.strip()):
        return  # wcslib takes SI units; the velocity check below judges the magnitudes
    try:
        unit = u.Unit(str(text).strip(), format="fits")
    except ValueError:
        try:
            unit = u.Unit(str(text).strip())
        except ValueError:
            raise KinemapError(f"{name}: CUNIT{i} = {text!r} is not a unit; write it like "
                               "'Hz', 'm' or 'm/s'") from None
    expected = _PHYSICAL_UNIT.get(kind.physical)
    if ctype.upper()[:4] in ("ENER", "WAVN", "ZOPT", "BETA"):
        return
    if expected is not None and not unit.is_equivalent(expected):
        raise KinemapError(f"{name}: CUNIT{i} = {text!r} is not a {kind.physical} unit, but "
                           f"CTYPE{i} = {ctype!r} is a {kind.physical} axis; fix CUNIT{i} "
                           f"(e.g. '{expected.to_string('fits')}')")


def _check_celestial(header, name, i, kind, naxis):
    fix = f"fix CRVAL{i}/CDELT{i}/CRPIX{i} (degrees)"
    crval = _number(header, f"CRVAL{i}", name, fix=fix)
    _number(header, f"CRPIX{i}", name, fix=fix)
    cdelt = None
    if not _has_cd(header, i, naxis):
        cdelt = _number(header, f"CDELT{i}", name, required=True, what=" (the pixel size)",
                        fix=f"give CDELT{i} as the pixel size in degrees, a number")
        if cdelt == 0:
            raise KinemapError(f"{name}: CDELT{i} = 0: pixels without size; fix CDELT{i} "
                               "(the pixel size in degrees)")
    text = _get(header, f"CUNIT{i}")
    scale = 1.0
    if text is not None and str(text).strip():
        try:
            unit = u.Unit(str(text).strip())
        except ValueError:
            unit = None
        if unit is None or not unit.is_equivalent(u.deg):
            raise KinemapError(f"{name}: CUNIT{i} = {text!r} is not an angle unit; celestial "
                               f"axes need 'deg' (fix CUNIT{i})")
        scale = unit.to(u.deg)
    if kind == "latitude" and crval is not None and abs(crval * scale) > 90:
        raise KinemapError(f"{name}: CRVAL{i} = {crval} {text or 'deg'} is "
                           f"{crval * scale:.4g} deg, not a latitude; CUNIT{i} contradicts "
                           f"the values (fix CUNIT{i} or CRVAL{i})")
    if cdelt is not None and abs(cdelt * scale) > 10:
        raise KinemapError(f"{name}: CDELT{i} = {cdelt} {text or 'deg'} makes pixels "
                           f"{abs(cdelt * scale):.4g} deg wide; CUNIT{i} contradicts the "
                           f"values or CDELT{i} is wrong (pixel sizes are in degrees)")


def _mixing_terms(header, a, b):
    for key in (f"PC{a}_{b}", f"CD{a}_{b}", f"PC{a:03d}{b:03d}"):
        value = _get(header, key)
        if value is not None:
            yield key, value


def _check_mixing(header, name, spec, celestial, naxis):
    for c in celestial:
        for a, b in ((spec, c), (c, spec)):
            for key, value in _mixing_terms(header, a, b):
                if isinstance(value, bool) or not isinstance(value, (int, float)):
                    raise KinemapError(f"{name}: {key} = {value!r} is not a number; fix {key}")
                if value != 0:
                    raise KinemapError(
                        f"{name}: {key} = {value} mixes the spectral axis {spec} with the "
                        f"celestial axis {c}; kinemap needs a spectral axis independent of "
                        f"the sky position: set {key} = 0 (regrid the cube if it is tilted)")


def _check_rest(header, name):
    values = {}
    for key in ("RESTFRQ", "RESTFREQ", "RESTWAV"):
        v = _number(header, key, name, fix=f"{key} must be a positive number (or remove it "
                    "and give --rest-value)")
        if v is not None:
            if v <= 0:
                raise KinemapError(f"{name}: {key} = {v} is not positive; fix {key} or remove "
                                   "it and give --rest-value")
            values[key] = v
    if "RESTFRQ" in values and "RESTFREQ" in values:
        a, b = values["RESTFRQ"], values["RESTFREQ"]
        if abs(a - b) > 1e-9 * max(a, b):
            raise KinemapError(
                f"{name}: RESTFRQ = {a:.12g} and RESTFREQ = {b:.12g} disagree "
                f"({C_KMS * abs(a - b) / max(a, b):.3g} km/s apart); remove the wrong one "
                "from the header or give --rest-value")


# ---------------------------------------------------------------- 3. after the reader's work

def check_velocity_axis(velocity, spectral, *, name, ctype, rest, physical) -> None:
    """Refuse a spectral axis whose velocities are not finite, reach the speed of light or
    do not change from channel to channel; warn when they are only implausible."""
    v = np.asarray(velocity, dtype=np.float64)
    s = np.asarray(getattr(spectral, "value", spectral), dtype=np.float64)
    where = f"the {ctype} axis"
    if rest is not None:
        where += f" with rest value {rest:.10g}"
    if physical in ("frequency", "wavelength") and not np.all(s > 0):
        raise KinemapError(
            f"{name}: {where} reaches {physical} values <= 0 (from {s.min():.6g} to {s.max():.6g} "
            f"{getattr(spectral, 'unit', '')}); check CRVAL, CDELT, CRPIX and CUNIT of the "
            "spectral axis")
    if not np.all(np.isfinite(v)):
        raise KinemapError(f"{name}: {where} gives velocities that are not finite; check "
                           "CRVAL, CDELT, CRPIX and CUNIT of the spectral axis and the rest value")
    vmax = float(np.max(np.abs(v)))
    if vmax >= C_KMS:
        raise KinemapError(
            f"{name}: {where} gives velocities from {v.min():.6g} to {v.max():.6g} km/s, "
            "beyond the speed of light; the rest value does not belong to this band, or "
            "CRVAL/CDELT/CRPIX/CUNIT of the spectral axis are wrong (give --rest-value or fix "
            "the header)")
    if v.size > 1:
        step = np.abs(np.diff(v))
        if np.min(step) < 1e-6:
            raise KinemapError(
                f"{name}: channels of {where} are only {np.min(step):.3g} km/s apart (less "
                "than 1 mm/s); CDELT or CUNIT of the spectral axis is wrong")
        if np.median(step) > 1000:
            warnings.warn(f"{name}: channels are {np.median(step):.4g} km/s wide; check "
                          "CDELT and CUNIT of the spectral axis", HeaderWarning, stacklevel=3)
    if vmax > 0.1 * C_KMS:
        warnings.warn(f"{name}: velocities reach {vmax:.6g} km/s (over 10% of the speed of "
                      "light); check the rest value", HeaderWarning, stacklevel=3)


def check_beam(beam, *, name, pixel_deg, shape_yx, source="BMAJ/BMIN") -> None:
    """Refuse a beam no telescope makes (larger than the sky) or far larger than the map,
    which would make smoothing kernels absurd; warn when it is larger than the map."""
    if beam is None:
        return
    major = beam.major.to_value(u.deg)
    minor = beam.minor.to_value(u.deg)
    fix = ("give --beam as a FWHM such as '46arcsec'" if source == "--beam" else
           "fix BMAJ/BMIN (degrees) or give --beam")
    if not (math.isfinite(major) and math.isfinite(minor)):
        raise KinemapError(f"{name}: the beam ({source}) is not finite; {fix}")
    if not math.isfinite(beam.pa.to_value(u.deg)):
        pa_source = "--beam" if source == "--beam" else "BPA"
        raise KinemapError(f"{name}: the beam position angle ({pa_source}) is not finite; "
                           + ("give --beam with a finite position angle" if source == "--beam"
                              else "fix BPA (degrees east of north) or give --beam"))
    if major > 180:
        raise KinemapError(f"{name}: the beam major axis ({source}) is {major:.6g} deg, larger "
                           f"than the sky; {fix}")
    if pixel_deg and math.isfinite(pixel_deg) and pixel_deg > 0:
        extent = max(shape_yx) * pixel_deg
        if major > 10 * extent:
            raise KinemapError(
                f"{name}: the beam ({source}, {major * 3600:.6g} arcsec) is over ten times the "
                f"map's width ({extent * 3600:.6g} arcsec); {fix}")
        if major > extent:
            warnings.warn(f"{name}: the beam ({major * 3600:.4g} arcsec) is wider than the "
                          f"map ({extent * 3600:.4g} arcsec); spatial results will be one "
                          "beam", HeaderWarning, stacklevel=3)
        if minor < 0.01 * pixel_deg:
            warnings.warn(f"{name}: the beam minor axis ({minor * 3600:.3g} arcsec) is under "
                          "1% of a pixel; check BMIN (degrees)", HeaderWarning, stacklevel=3)


def check_beam_table(beams, nchan, name) -> None:
    """A per-channel beam table must have one beam per channel of the cube."""
    n = len(beams)
    if n != nchan:
        raise KinemapError(f"{name}: the BEAMS table has {n} beams for {nchan} channels; it "
                           "needs one row per channel (fix the table or remove it and give "
                           "--beam)")


def check_time_keywords(header, name) -> None:
    """A frame change needs a time: MJD-OBS a number, DATE-OBS a date."""
    if "MJD-OBS" in header:
        _number(header, "MJD-OBS", name, fix="MJD-OBS must be a number (a modified Julian "
                "date) for a frame change; fix it or drop --frame")
    elif "DATE-OBS" in header:
        from astropy.time import Time

        try:
            Time(str(header["DATE-OBS"]), scale="utc")
        except ValueError:
            raise KinemapError(f"{name}: DATE-OBS = {header['DATE-OBS']!r} is not a date; "
                               "write it like '2021-03-04T05:06:07' or drop --frame") from None


def wcs_error_reason(exc) -> str:
    """wcslib's reason without its 'ERROR 4 in wcs_types() at line ...' location line."""
    lines = [ln.strip() for ln in str(exc).splitlines() if ln.strip()]
    reasons = [ln for ln in lines if not re.match(r"ERROR \d+ in \w+\(\)", ln)]
    text = " ".join(reasons or lines) or type(exc).__name__
    return text.rstrip(".")
