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
    """True when the first image HDU of ``path`` has exactly two axes longer than one and
    neither is spectral (a cube of one row or one column is still a cube)."""
    hdul = open_fits(path)
    try:
        for hdu in hdul:
            if getattr(hdu, "is_image", False) and hdu.header.get("NAXIS", 0) >= 2:
                n = [hdu.header.get(f"NAXIS{i + 1}", 1) for i in range(hdu.header["NAXIS"])]
                ctypes = [str(hdu.header.get(f"CTYPE{i + 1}", "")).split("-")[0].strip().upper()
                          for i, k in enumerate(n) if k > 1]
                return len(ctypes) == 2 and not any(c in SPECTRAL_CTYPES for c in ctypes)
        return False
    finally:
        hdul.close()


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
        except (ValueError, KeyError) as exc:
            raise KinemapError(f"the WCS of {path} cannot be read: {str(exc).splitlines()[0]}") from None
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
