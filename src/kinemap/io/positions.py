"""Sky positions given by a user: 'RA,DEC' text (degrees or sexagesimal) or a SkyCoord,
turned into pixel coordinates of a map with a check that they fall on it."""
from __future__ import annotations

import astropy.units as u
import numpy as np

from kinemap.errors import KinemapError

__all__ = ["parse_position", "position_pixels", "show_position"]

_FORM = "'RA,DEC' in degrees ('150.01,2.2') or sexagesimal ('10h00m02s,+02d12m00s')"


def parse_position(value, name: str = "position"):
    """A SkyCoord from 'RA,DEC' (degrees, or sexagesimal with h/m/s, d/m/s or colons: RA in
    hours) or a SkyCoord (returned as it is)."""
    from astropy.coordinates import SkyCoord

    if isinstance(value, SkyCoord):
        return value
    text = str(value)
    try:
        ra, dec = (p.strip() for p in text.split(","))
        if any(ch in text for ch in "hmsd:"):
            return SkyCoord(ra, dec, unit=(u.hourangle, u.deg))
        return SkyCoord(float(ra) * u.deg, float(dec) * u.deg)
    except (ValueError, TypeError):
        raise KinemapError(f"'{name}' must be {_FORM} or a SkyCoord, got {value!r}") from None


def show_position(value) -> str:
    """A position as the user wrote it, or 'RA,DEC' in degrees for a SkyCoord."""
    if isinstance(value, str):
        return value
    sc = parse_position(value)
    return f"{sc.icrs.ra.deg:.5f},{sc.icrs.dec.deg:.5f}"


def position_pixels(value, wcs, shape_yx, name: str = "position") -> tuple[float, float]:
    """0-based pixel (x, y) of a sky position on a map of ``shape_yx``; a position off the
    map is an error that gives the map's extent in pixels."""
    sc = parse_position(value, name)
    shown = show_position(sc if not isinstance(value, str) else value)
    try:
        x, y = (float(c) for c in wcs.world_to_pixel(sc))
    except Exception:  # wcslib refuses positions it cannot project
        x = y = float("nan")
    ny, nx = shape_yx
    if not (np.isfinite(x) and np.isfinite(y) and -0.5 <= x <= nx - 0.5 and -0.5 <= y <= ny - 0.5):
        where = (f"pixel ({x:.1f}, {y:.1f})" if np.isfinite(x) and np.isfinite(y)
                 else "a point the map's projection cannot reach")
        raise KinemapError(f"'{name}' {shown} lies off the map ({where}; the map is {nx} x {ny} "
                           f"pixels); give a position inside it")
    return x, y
