"""Header handling: open the HDU, build the WCS, record every repair made on the way."""
from __future__ import annotations

import hashlib
import os
import warnings

import astropy.units as u
from astropy.io import fits
from astropy.wcs import WCS, FITSFixedWarning

from kinemap.errors import HeaderRepairWarning, KinemapError, MissingUnitWarning

__all__ = ["open_fits", "find_cube_hdu", "find_image_hdu_2d", "build_wcs", "warn_repairs",
           "parse_bunit",
           "sha256"]


def open_fits(path):
    """Open ``path`` read-only with memory mapping, after :func:`validate.check_file` has
    refused special files and broken structure; one clear error if astropy still cannot."""
    from kinemap.io.validate import check_file

    path = os.fspath(path)
    if not os.path.lexists(path):
        raise KinemapError(f"input file not found: {path}; check the path")
    check_file(path)
    # astropy's own notes on a file it then refuses would precede our one line: hold them
    with warnings.catch_warnings(record=True):
        warnings.simplefilter("always")
        try:
            hdul = fits.open(path, memmap=True, mode="readonly", lazy_load_hdus=False)
        except (OSError, ValueError, TypeError, EOFError) as exc:
            reason = _archive_damage(path) or " ".join(str(exc).split())[:200] or \
                type(exc).__name__
            raise KinemapError(f"{os.path.basename(path)} is not a readable FITS file "
                               f"({reason}); give a FITS cube") from None
    return hdul


def _archive_damage(path) -> str | None:
    """For a gzip/bzip2 file astropy refused: what is wrong with the compressed stream."""
    import bz2
    import gzip

    from kinemap.io.validate import compression

    kind = compression(path)
    if kind is None:
        return None
    opener = gzip.open if kind == "gzip" else bz2.open
    try:
        with opener(path, "rb") as fh:
            while fh.read(1 << 24):
                pass
    except EOFError:
        return f"the {kind} stream ends early: the file is cut short, copy it again"
    except OSError as exc:
        return f"the {kind} stream is damaged ({exc})"
    return None


def find_cube_hdu(hdul, path, hdu_index=None):
    """The first HDU holding an image with three or more axes (or the one asked for)."""
    if hdu_index is not None:
        try:
            hdu = hdul[hdu_index]
        except (IndexError, KeyError):
            raise KinemapError(f"{path} has no HDU {hdu_index!r}; it has {len(hdul)}") from None
        candidates = [hdu]
    else:
        candidates = [h for h in hdul if isinstance(h, (fits.PrimaryHDU, fits.ImageHDU,
                                                        fits.CompImageHDU))]
    best_ndim = 0
    for hdu in candidates:
        naxis = hdu.header.get("NAXIS", 0)
        best_ndim = max(best_ndim, naxis)
        if naxis >= 3:
            return hdu
    if best_ndim == 2:
        raise KinemapError(
            f"{path} holds a 2D image, not a cube: it has no spectral axis; give a "
            "spectral-line cube (two celestial axes and one spectral axis)")
    raise KinemapError(f"{path} holds no image data with a spectral axis; give a spectral-line cube")


def find_image_hdu_2d(hdul, path):
    """The first image HDU with data (for 2D maps)."""
    for hdu in hdul:
        if getattr(hdu, "is_image", False) and hdu.header.get("NAXIS", 0) >= 2:
            return hdu
    raise KinemapError(f"{path} holds no image; give a 2D FITS map")


def build_wcs(header, path, *, emit: bool = True) -> tuple[WCS, list[str]]:
    """Build the WCS, capturing wcslib's automatic fixes as a list of repair messages
    (warned about now, or by :func:`warn_repairs` once the caller has checked the rest:
    a refused cube then gets its one error line with no notes before it)."""
    repairs = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", FITSFixedWarning)
        try:
            wcs = WCS(header)
        except Exception as exc:  # wcslib's errors: ValueError and its own subclasses
            wcs = _retry_without_rest(header, exc, repairs, path)
    for w in caught:
        if issubclass(w.category, FITSFixedWarning):
            repairs.append(" ".join(str(w.message).split()))
    if emit:
        warn_repairs(repairs, path)
    return wcs, repairs


def warn_repairs(repairs, path) -> None:
    for msg in repairs:
        warnings.warn(f"{os.path.basename(str(path))}: {msg}", HeaderRepairWarning, stacklevel=4)


def _retry_without_rest(header, exc, repairs, path):
    """wcslib cannot build a frequency-linear optical axis (FELO) without a rest frequency.

    Such an axis is read as linear in optical velocity instead (exact at the reference
    channel, the usual approximation); the repair is recorded.
    """
    from kinemap.io.validate import wcs_error_reason

    if "rest frequency" not in str(exc).lower():
        raise KinemapError(f"the WCS of {path} cannot be read: {wcs_error_reason(exc)}; fix "
                           "the axis keywords (CTYPE, CUNIT, CRVAL, CDELT, CRPIX, PC) it "
                           "names") from None
    header = header.copy()
    for key in list(header.keys()):
        if key.startswith("CTYPE") and str(header[key]).upper().startswith("FELO"):
            old = header[key]
            suffix = str(old)[5:].strip("-").upper()
            header[key] = "VOPT"
            if suffix and "SPECSYS" not in header:
                from kinemap.spectral.frames import normalise_frame

                header["SPECSYS"] = normalise_frame(suffix)
            repairs.append(f"kinemap read {key}={old!r} without a rest frequency as linear "
                           "optical velocity (VOPT)")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FITSFixedWarning)
        try:
            return WCS(header)
        except Exception as exc2:
            raise KinemapError(
                f"the WCS of {path} cannot be read: {wcs_error_reason(exc2)}; fix the axis "
                "keywords it names") from None


def parse_bunit(header, override=None) -> tuple[u.UnitBase, bool]:
    """Return (unit, missing).  A missing BUNIT warns and gives arbitrary (dimensionless) units."""
    text = override if override is not None else header.get("BUNIT")
    if text is None or str(text).strip() == "":
        warnings.warn("the cube has no BUNIT; values are carried in arbitrary units "
                      "(give --bunit to set one)", MissingUnitWarning, stacklevel=3)
        return u.dimensionless_unscaled, True
    if isinstance(text, u.UnitBase):
        return text, False
    text = str(text).strip()
    for fmt in ("fits", None):
        try:
            return u.Unit(text, format=fmt, parse_strict="raise"), False
        except ValueError:
            continue
    for candidate in (text.replace("JY", "Jy").replace("BEAM", "beam"), text.split("(")[0]):
        try:
            return u.Unit(candidate.strip(), parse_strict="raise"), False
        except ValueError:
            continue
    raise KinemapError(
        f"BUNIT {text!r} is not a unit astropy can parse; fix the header or give --bunit "
        "(for example --bunit K or --bunit Jy/beam)")


def sha256(path, *, chunk=1 << 22) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while True:
            block = fh.read(chunk)
            if not block:
                break
            h.update(block)
    return h.hexdigest()
