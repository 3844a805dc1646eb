"""Spectral reference frames (FITS SPECSYS) and conversions between them.

A frame change needs the observer's location and the time of observation, taken from the
header (OBSGEO-X/Y/Z or OBSGEO-L/B/H, and MJD-OBS or DATE-OBS), and the target direction
(the centre of the map).  It goes through astropy's :class:`~astropy.coordinates.SpectralCoord`
on the axis' frequencies (or wavelengths), so it is exact for the map centre; the correction
changes by well under 1 m/s across a map of a degree, which kinemap neglects.
"""
from __future__ import annotations

import astropy.units as u
import numpy as np

import warnings

from astropy.utils.exceptions import AstropyWarning

from kinemap.errors import KinemapError

__all__ = ["FRAMES", "normalise_frame", "change_frame"]

# FITS SPECSYS values and the astropy frame each maps to.
FRAMES = {
    "TOPOCENT": None,  # the observer itself
    "BARYCENT": "icrs",
    "LSRK": "lsrk",
    "LSRD": "lsrd",
    "GALACTOC": "galactocentric",
}
_ALIASES = {"TOPOCENTRIC": "TOPOCENT", "BARYCENTRIC": "BARYCENT", "HELIOCEN": "BARYCENT",
            "LSR": "LSRK", "HEL": "BARYCENT", "OBS": "TOPOCENT", "ICRS": "BARYCENT"}


def normalise_frame(name: str | None) -> str:
    if name is None or str(name).strip() == "":
        return ""
    key = str(name).strip().upper()
    key = _ALIASES.get(key, key)
    if key not in FRAMES:
        raise KinemapError(
            f"'frame' must be one of {', '.join(FRAMES)}, got {name!r}")
    return key


def _observer_and_time(header):
    from astropy.coordinates import EarthLocation
    from astropy.time import Time

    loc = None
    if all(k in header for k in ("OBSGEO-X", "OBSGEO-Y", "OBSGEO-Z")):
        loc = EarthLocation.from_geocentric(header["OBSGEO-X"], header["OBSGEO-Y"],
                                            header["OBSGEO-Z"], unit=u.m)
    elif all(k in header for k in ("OBSGEO-L", "OBSGEO-B", "OBSGEO-H")):
        loc = EarthLocation.from_geodetic(header["OBSGEO-L"] * u.deg, header["OBSGEO-B"] * u.deg,
                                          header["OBSGEO-H"] * u.m)
    time = None
    if "MJD-OBS" in header:
        time = Time(header["MJD-OBS"], format="mjd", scale="utc")
    elif "DATE-OBS" in header:
        time = Time(header["DATE-OBS"], scale="utc")
    return loc, time


def change_frame(spectral: u.Quantity, *, header, target, from_frame: str,
                 to_frame: str) -> u.Quantity:
    """Re-express frequencies/wavelengths ``spectral`` observed in ``from_frame`` in ``to_frame``.

    Parameters
    ----------
    spectral : Quantity
        Frequencies or vacuum wavelengths (air wavelengths are refused by the reader).
    header : astropy.io.fits.Header
        Source of observer location and time.
    target : astropy.coordinates.SkyCoord
        Direction of the source (map centre).
    """
    from_frame, to_frame = normalise_frame(from_frame), normalise_frame(to_frame)
    if not from_frame:
        raise KinemapError(
            "the header has no SPECSYS, so the cube's frame is unknown; add SPECSYS to the "
            "header or drop --frame")
    if from_frame == to_frame:
        return spectral
    loc, time = _observer_and_time(header)
    if loc is None or time is None:
        missing = " and ".join(n for n, v in (("observer location (OBSGEO-X/Y/Z or OBSGEO-L/B/H)",
                                                loc), ("time (MJD-OBS or DATE-OBS)", time))
                               if v is None)
        raise KinemapError(
            f"cannot change the frame from {from_frame} to {to_frame}: the header lacks the "
            f"{missing}; add them to the header or keep the cube's frame")
    with warnings.catch_warnings():
        # SpectralCoord warns that the target has no distance or velocity: expected for a
        # distant source; the correction depends only on the direction.
        warnings.simplefilter("ignore", AstropyWarning)
        return _shift(spectral, loc, time, target, from_frame, to_frame)


def _shift(spectral, loc, time, target, from_frame, to_frame):
    from astropy.coordinates import SpectralCoord

    observer_itrs = loc.get_itrs(obstime=time)
    target = target.icrs
    seen = SpectralCoord(spectral, observer=observer_itrs, target=target)
    if from_frame != "TOPOCENT":
        # The axis values are as seen by an observer at this place and time but at rest in
        # `from_frame`: build that observer, then re-read the same values as seen by it.
        moved = seen.with_observer_stationary_relative_to(FRAMES[from_frame])
        seen = SpectralCoord(spectral, observer=moved.observer, target=target)
    to = "itrs" if to_frame == "TOPOCENT" else FRAMES[to_frame]
    out = seen.with_observer_stationary_relative_to(to)
    return u.Quantity(np.asarray(out.value), spectral.unit)
