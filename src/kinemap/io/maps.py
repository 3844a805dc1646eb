"""Read 2D maps (a velocity field, its errors, an intensity map) made by kinemap or others."""
from __future__ import annotations

import os
import warnings
from dataclasses import dataclass

import astropy.units as u
import numpy as np
from astropy.wcs import WCS, FITSFixedWarning

from kinemap.errors import KinemapError
from kinemap.io._header import find_image_hdu_2d, open_fits, parse_bunit, sha256
from kinemap.io.beams import read_beam
from kinemap.io.cube import CubeMeta
from kinemap.io.validate import card_value
from kinemap.spectral.axes import SPECTRAL_CTYPES
from kinemap.spectral.frames import normalise_frame

__all__ = ["SkyMap", "read_map", "is_2d_image"]


@dataclass(frozen=True)
class SkyMap:
    """A 2D map: values (ny, nx) as float64, their unit, and where they came from."""

    data: np.ndarray
    unit: u.UnitBase
    meta: CubeMeta


def is_2d_image(path) -> bool:
    """True when no image HDU of ``path`` holds a cube: no spectral axis (by CTYPE) longer
    than one channel and no HDU with three axes longer than one.  A 2D primary HDU in front
    of a cube in an extension is therefore a cube, as :func:`read_cube` reads it; a
    one-channel cube is a 2D image (which :func:`read_map` refuses unless it is a map of
    the unit asked for)."""
    hdul = open_fits(path)
    try:
        images = [h for h in hdul if getattr(h, "is_image", False)
                  and h.header.get("NAXIS", 0) >= 2]
        return bool(images) and not any(_holds_cube(h.header) for h in images)
    finally:
        hdul.close()


def _ctype(header, i) -> str:
    """CTYPEi as text ('' when absent); an unparsable card (CTYPE3 = NaN) reads as its text
    for the validation layer to name."""
    return str(card_value(header, f"CTYPE{i}") if f"CTYPE{i}" in header else "")


def _holds_cube(header) -> bool:
    naxis = int(header.get("NAXIS", 0))
    lengths = [int(header.get(f"NAXIS{i}", 1)) for i in range(1, naxis + 1)]
    spectral = [n for i, n in enumerate(lengths, 1)
                if _ctype(header, i).strip().upper()[:4] in SPECTRAL_CTYPES]
    return any(n > 1 for n in spectral) or sum(n > 1 for n in lengths) >= 3


def _one_channel_hint(header) -> str:
    naxis = int(header.get("NAXIS", 0))
    for i in range(1, naxis + 1):
        if (_ctype(header, i).strip().upper()[:4] in SPECTRAL_CTYPES
                and header.get(f"NAXIS{i}") == 1):
            return (f" (it is a cube with one channel, NAXIS{i} = 1: a cube needs several "
                    "channels)")
    return ""


def read_map(path, *, unit=None, like: SkyMap | None = None, name: str = "map") -> SkyMap:
    """Read a 2D FITS image; length-1 extra axes (spectral, Stokes) are dropped.

    ``unit`` overrides BUNIT (a velocity map without BUNIT is taken to be in km/s when
    ``unit='km/s'`` is given).  ``like``: another map this one must match pixel for pixel.
    """
    path = os.fspath(path)
    hdul = open_fits(path)
    hdu = find_image_hdu_2d(hdul, path)
    header = hdu.header
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FITSFixedWarning)
        try:
            wcs = WCS(header)
        except Exception as exc:  # wcslib's errors: ValueError and its own subclasses
            from kinemap.io.validate import wcs_error_reason

            raise KinemapError(f"the WCS of {path} cannot be read: {wcs_error_reason(exc)}; "
                               "fix the axis keywords it names") from None
    if not wcs.has_celestial:
        raise KinemapError(f"{path} has no celestial axes; give a sky map with RA/Dec axes")
    data = np.asarray(hdu.data, dtype=np.float64).squeeze()
    if data.ndim != 2:
        raise KinemapError(f"{path} is not a 2D map (shape {hdu.data.shape}); give a 2D image")
    wcs2d = wcs.celestial
    if wcs2d.wcs.lng > wcs2d.wcs.lat:
        wcs2d = wcs2d.sub([2, 1])
        data = data.T
    if header.get("BUNIT") is None and unit is not None:
        bunit, missing = u.Unit(unit), False
    else:
        bunit, missing = parse_bunit(header, None)
        if unit is not None and not missing and not bunit.is_equivalent(u.Unit(unit)):
            raise KinemapError(
                f"{os.path.basename(path)} has BUNIT {bunit.to_string()!r}, so it is not a "
                f"{name} (in {u.Unit(unit).to_string()}){_one_channel_hint(header)}; give a "
                f"{name} or a spectral-line cube")
    if like is not None and data.shape != like.data.shape:
        raise KinemapError(f"{name} {path} has shape {data.shape}, the velocity map "
                           f"{like.data.shape}; give maps on the same pixel grid")
    rest = None
    if header.get("RESTFRQ") or header.get("RESTFREQ"):
        rest = float(header.get("RESTFRQ") or header.get("RESTFREQ")) * u.Hz
    elif header.get("RESTWAV"):
        rest = float(header["RESTWAV"]) * u.m
    beam, _ = read_beam(hdul, header, radio_like=False)
    meta = CubeMeta(wcs=wcs2d, bunit=bunit, convention=str(header.get("VCONV", "unknown")),
                    rest_value=rest, frame=normalise_frame(header.get("SPECSYS")) if header.get("SPECSYS") else "",
                    beam=beam, medium=None, ctype_original=str(header.get("KMCTYPE", "")),
                    ctype="", native_convention=str(header.get("VCONV", "unknown")),
                    source=os.path.basename(path), checksum_job=sha256(path),
                    bunit_missing=missing)
    hdul.close()
    return SkyMap(data=data, unit=bunit, meta=meta)
