"""Which stack each pixel joins: deprojected-radius bins or the values of a map.

A label map (ny, nx) of bin numbers (-1: in no bin) and a description of the bins.
Deprojection (thin disk, common practice): with (E, N) the sky offsets of a pixel from
the centre in arcsec, X = E sin PA + N cos PA along the major axis (towards the receding
side) and Y = E cos PA - N sin PA along the minor axis; the radius in the disk plane is
R = sqrt(X^2 + (Y / cos i)^2).
"""
from __future__ import annotations

from dataclasses import dataclass

import astropy.units as u
import numpy as np

from kinemap.errors import KinemapError

__all__ = ["Bins", "radial_bins", "map_bins", "deprojected_radius", "center_pixel",
           "check_edges", "check_inclination"]


@dataclass(frozen=True)
class Bins:
    """Bin membership of the pixels.

    labels : int array (ny, nx), -1 where a pixel is in no bin.
    edges : float array (nbin + 1,), in ``unit``, increasing.
    quantity : name of the binned quantity ('radius' or 'value').
    unit : unit of the edges (arcsec for radius bins, the map's unit otherwise).
    values : float array (ny, nx) of the binned quantity (radius or map value).
    description : one line for tables and plots.
    """

    labels: np.ndarray
    edges: np.ndarray
    quantity: str
    unit: u.UnitBase
    values: np.ndarray
    description: str

    @property
    def nbin(self) -> int:
        return self.edges.size - 1


def center_pixel(center, wcs) -> tuple[float, float]:
    """'RA,DEC' (degrees or sexagesimal), a SkyCoord or a pixel pair (x, y) -> 0-based
    pixel (x, y)."""
    from astropy.coordinates import SkyCoord

    if isinstance(center, (tuple, list)) and len(center) == 2 and not isinstance(center[0], str):
        return float(center[0]), float(center[1])
    if isinstance(center, SkyCoord):
        sc = center
    else:
        text = str(center)
        try:
            ra, dec = (p.strip() for p in text.split(","))
            if any(ch in text for ch in "hmsd:"):
                sc = SkyCoord(ra, dec, unit=(u.hourangle, u.deg))
            else:
                sc = SkyCoord(float(ra) * u.deg, float(dec) * u.deg)
        except (ValueError, TypeError):
            raise KinemapError(f"'center' must be 'RA,DEC' in degrees or sexagesimal, got "
                               f"{center!r}") from None
    x, y = wcs.world_to_pixel(sc)
    return float(x), float(y)


def deprojected_radius(wcs, shape, x0, y0, position_angle, inclination) -> np.ndarray:
    """Radius in the disk plane (arcsec) of every pixel of a (ny, nx) grid."""
    check_inclination(inclination)
    ny, nx = shape
    yy, xx = np.mgrid[0:ny, 0:nx]
    centre = wcs.pixel_to_world(x0, y0)
    sky = wcs.pixel_to_world(xx.ravel(), yy.ravel())
    dlon, dlat = centre.spherical_offsets_to(sky)
    east = dlon.to_value(u.arcsec).reshape(shape)
    north = dlat.to_value(u.arcsec).reshape(shape)
    pa = np.deg2rad(position_angle)
    major = east * np.sin(pa) + north * np.cos(pa)
    minor = east * np.cos(pa) - north * np.sin(pa)
    return np.hypot(major, minor / np.cos(np.deg2rad(inclination)))


def check_inclination(inclination) -> None:
    if not 0.0 <= inclination < 90.0:
        raise KinemapError(f"'inclination' must be in [0, 90) deg for radius bins, got "
                           f"{inclination:g}; an edge-on disk cannot be deprojected")


def _labels(values, edges):
    lab = np.searchsorted(edges, values, side="right") - 1
    ok = np.isfinite(values) & (values >= edges[0]) & (values < edges[-1])
    return np.where(ok, lab, -1).astype(np.int64)


def check_edges(edges, what):
    e = np.asarray(edges, dtype=np.float64)
    if e.ndim != 1 or e.size < 2 or not np.all(np.isfinite(e)) or np.any(np.diff(e) <= 0):
        raise KinemapError(f"'edges' must be at least two increasing numbers ({what}), got "
                           f"{list(np.atleast_1d(edges))}")
    return e


def radial_bins(wcs, shape, *, center, position_angle, inclination, edges=None,
                bin_width=None, footprint=None) -> Bins:
    """Bins of deprojected radius.  ``edges`` (arcsec) or else steps of ``bin_width``
    (arcsec) from 0 out to the farthest pixel of ``footprint`` (all pixels if None)."""
    x0, y0 = center_pixel(center, wcs)
    r = deprojected_radius(wcs, shape, x0, y0, position_angle, inclination)
    if edges is None:
        if bin_width is None or not bin_width > 0:
            raise KinemapError(f"'bin_width' must be a positive number of arcsec, got "
                               f"{bin_width!r}")
        rmax = float(np.nanmax(r if footprint is None else np.where(footprint, r, np.nan)))
        edges = np.arange(0.0, rmax + bin_width, bin_width)
    e = check_edges(edges, "radii in arcsec")
    desc = (f"deprojected radius (centre pixel {x0:.1f},{y0:.1f}; PA {position_angle:g} deg, "
            f"inclination {inclination:g} deg)")
    return Bins(_labels(r, e), e, "radius", u.arcsec, r, desc)


def map_bins(values, unit, edges, *, name: str = "bin map") -> Bins:
    """Bins of the values of a map (ny, nx): bin k holds edges[k] <= value < edges[k+1]."""
    if edges is None:
        raise KinemapError(f"binning by a map needs --edges (bin edges in the units of the "
                           f"{name}, e.g. '0,1,2,5')")
    e = check_edges(edges, f"values of the {name}")
    v = np.asarray(values, dtype=np.float64)
    return Bins(_labels(v, e), e, "value", u.Unit(unit), v, f"values of the {name}")
