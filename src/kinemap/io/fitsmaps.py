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


def write_fits(path, data, header) -> None:
    """Write one HDU with CHECKSUM/DATASUM.  astropy's WCS comments that do not fit on a
    card are shortened (their warning is not the user's concern)."""
    arr = np.asarray(data)
    if arr.dtype == bool:
        arr = arr.astype(np.uint8)
    if arr.dtype.kind == "f" and arr.dtype != np.float32 and arr.dtype != np.float64:
        arr = arr.astype(np.float32)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Card is too long")
        fits.PrimaryHDU(data=arr, header=header).writeto(path, overwrite=True, checksum=True)
