"""Position-velocity diagrams along any cut: ``kinemap pv``.

The cube is sampled with bilinear interpolation (``scipy.ndimage.map_coordinates``,
order 1) every pixel-size step along the cut and averaged over parallel lines one
pixel-size apart across ``width``.  A ring model, when given, is drawn along the same
cut; the object that holds it (a :class:`kinemap.RingFit`, or the ring table read by the
runner) evaluates its line-of-sight velocity at the cut's pixel positions, so this module
does not depend on the ring fit.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import ClassVar

import astropy.units as u
import numpy as np
from astropy.wcs import WCS
from scipy import ndimage

from kinemap.errors import KinemapError
from kinemap.extract._path import (path_from_center, path_from_points, path_from_region,
                                   sample_points)
from kinemap.io.products import Product
from kinemap.io.results import StageResult
from kinemap.units import to_value

__all__ = ["pv_diagram", "PVDiagram"]

_CTYPE = {"radio": "VRAD", "optical": "VOPT", "relativistic": "VELO"}


@dataclass(frozen=True)
class PVDiagram(StageResult):
    """A position-velocity diagram.

    Attributes
    ----------
    data : ndarray (n_channel, n_offset)
        Cube values along the cut (NaN off the map or where the cube has none), in ``unit``.
    offset : ndarray (n_offset,)
        Arcsec along the cut, 0 at the centre of a --center cut or at the start of a path.
    velocity : ndarray (n_channel,)
        km/s, as the cube's channels.
    x, y : ndarray (n_offset,)
        0-based pixel positions of the cut's centre line (for plots of the cut on a map).
    model_velocity : ndarray (n_offset,) or None
        A ring model's line-of-sight velocity along the cut (km/s).
    model_note : str
        How the model was sampled.
    beam_along : float or None
        FWHM of the beam along the cut's first segment (arcsec), for the plot.
    vertices : tuple of float
        Offsets (arcsec) of the cut's vertices, its ends included.
    """

    name: ClassVar[str] = "pv"

    data: np.ndarray
    offset: np.ndarray
    velocity: np.ndarray
    unit: u.UnitBase
    x: np.ndarray
    y: np.ndarray
    description: str
    width: float
    meta: object = None
    model_velocity: np.ndarray | None = None
    model_note: str = ""
    v_sys: float | None = None
    beam_along: float | None = None
    vertices: tuple = ()
    seconds: float = 0.0
    settings: dict = field(default_factory=dict)

    def pv_wcs(self) -> WCS:
        """Axis 1 offset (arcsec, CTYPE1 'OFFSET'), axis 2 velocity (km/s), both linear."""
        w = WCS(naxis=2)
        step = float(self.offset[1] - self.offset[0]) if self.offset.size > 1 else 1.0
        dv = float(self.velocity[-1] - self.velocity[0]) / max(1, self.velocity.size - 1)
        w.wcs.ctype = ["OFFSET", _CTYPE.get(getattr(self.meta, "convention", ""), "VELO")]
        w.wcs.cunit = ["arcsec", "km/s"]
        w.wcs.crpix = [1.0, 1.0]
        w.wcs.crval = [float(self.offset[0]), float(self.velocity[0])]
        w.wcs.cdelt = [step, dv if dv else 1.0]
        return w

    def products(self) -> list[Product]:
        extra = {"PVWIDTH": (self.width, "[arcsec] width averaged across the cut"),
                 "PVPATH": (self.description[:60], "the cut")}
        lin = np.linspace(self.velocity[0], self.velocity[-1], self.velocity.size)
        extra["VNONLIN"] = (float(np.max(np.abs(lin - self.velocity))),
                            "[km/s] largest departure of channels from axis 2")
        # astropy writes spectral axes in SI; the velocity axis stays in km/s as asked
        w = self.pv_wcs()
        extra.update(CUNIT2=("km/s", "velocity unit"),
                     CRVAL2=(float(w.wcs.crval[1]), "[km/s] velocity of the first channel"),
                     CDELT2=(float(w.wcs.cdelt[1]), "[km/s] channel step"))
        return [Product("pv", self.data.astype(np.float32), self.unit,
                        "position-velocity diagram, " + self.description, kind="intensity",
                        plot=False, extra_header=extra, wcs=self.pv_wcs())]

    def summary(self) -> dict:
        return {"cut": self.description, "length_arcsec": float(self.offset[-1] - self.offset[0]),
                "width_arcsec": self.width, "n_offset": int(self.offset.size),
                "ring_model": self.model_note or None}

    def systemic_velocity(self) -> float | None:
        return self.v_sys


def _cut(cube, path, center, position_angle, length, region):
    shape = cube.shape[1:]
    wcs = cube.meta.wcs
    given = [name for name, v in (("--path", path), ("--center", center), ("--region", region))
             if v is not None]
    if len(given) != 1:
        raise KinemapError("give the cut as one of --path 'RA1,DEC1;RA2,DEC2', --center RA,DEC "
                           "with --pa and --length, or --region FILE with a line"
                           + (f" (got {' and '.join(given)})" if given else ""))
    if path is not None:
        return path_from_points(path, wcs, shape)
    if center is not None:
        return path_from_center(center, position_angle, length, wcs, shape)
    return path_from_region(str(region), wcs, shape)


def sample_cube(data, xs, ys) -> np.ndarray:
    """Bilinear samples of every channel at pixel positions (n_across, n_offset), averaged
    over the lines across (NaN samples left out); NaN beyond the map's edge."""
    out = np.zeros((data.shape[0], xs.shape[1]))
    count = np.zeros_like(out)
    for ch in range(data.shape[0]):
        plane = np.asarray(data[ch], dtype=np.float64)
        vals = ndimage.map_coordinates(plane, [ys.ravel(), xs.ravel()], order=1, cval=np.nan,
                                       prefilter=False).reshape(xs.shape)
        ok = np.isfinite(vals)
        out[ch] = np.where(ok, vals, 0.0).sum(axis=0)
        count[ch] = ok.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, out / count, np.nan)


def _beam_along(meta, cut) -> float | None:
    """FWHM (arcsec) of the beam's section along the cut's first segment (north up, east
    left: the segment's position angle from its pixel direction)."""
    beam = meta.beam
    if beam is None:
        return None
    pa = np.arctan2(-(cut.x[1] - cut.x[0]), cut.y[1] - cut.y[0])
    phi = pa - np.deg2rad(beam.pa.to_value(u.deg))
    a, b = beam.major.to_value(u.arcsec), beam.minor.to_value(u.arcsec)
    return float(1.0 / np.sqrt((np.cos(phi) / a) ** 2 + (np.sin(phi) / b) ** 2))


def pv_diagram(cube, *, path=None, center=None, position_angle=None, length=None, width=None,
               region=None, rings=None) -> PVDiagram:
    """Position-velocity diagram of ``cube`` along a cut.

    Parameters
    ----------
    cube : kinemap.io.Cube, or anything :func:`kinemap.read_cube` reads
    path : str or list, optional
        'RA1,DEC1;RA2,DEC2[;...]' (degrees or sexagesimal) or a list of positions: a
        polyline, offsets from its first point.
    center, position_angle, length : optional
        A straight cut through ``center`` ('RA,DEC') towards ``position_angle`` (deg east of
        north, positive offsets that way), ``length`` arcsec long, offset 0 at the centre.
    region : path, optional
        A DS9 or CRTF file with a line (or lines joined end to start).
    width : Quantity or float, optional
        Average over this width across the cut (arcsec); default one line of samples.
    rings : optional
        A ring model: an object with ``model_velocity_at(x, y)`` (km/s at 0-based pixel
        positions of this cube's grid), such as :class:`kinemap.RingFit`; its curve is
        drawn on the plot and kept in ``model_velocity``.

    Returns
    -------
    PVDiagram
    """
    t0 = time.perf_counter()
    if not hasattr(cube, "meta") or not hasattr(cube, "velocity"):
        from kinemap.io.reader import read_cube

        cube = read_cube(cube)
    cut = _cut(cube, path, center, position_angle, length, region)
    w = None if width is None else float(to_value(width, u.arcsec, name="width"))
    if w is not None and not (np.isfinite(w) and w >= 0):
        raise KinemapError(f"'width' must be a positive angle (arcsec), got {width!r}")
    step = cube.meta.pixel_scale_arcsec
    offsets, xs, ys = sample_points(cut, step, w)
    data = sample_cube(cube.data, xs, ys)
    mid = xs.shape[0] // 2
    model = note = v_sys = None
    if rings is not None:
        if not hasattr(rings, "model_velocity_at"):
            raise KinemapError("'rings' must be a ring fit (kinemap.RingFit) or a ring table "
                               "read with kinemap.rings.RingModel")
        xc = xs.mean(axis=0) if xs.shape[0] > 1 else xs[mid]
        yc = ys.mean(axis=0) if ys.shape[0] > 1 else ys[mid]
        model = np.asarray(rings.model_velocity_at(xc, yc), float)
        note = getattr(rings, "model_note", "ring model at the cut's positions")
        v_sys = rings.systemic_velocity()
    ends = np.concatenate([[0.0], np.cumsum(cut.lengths)]) - cut.zero
    vertices = tuple(float(v) for v in (ends if cut.bends else ends[[0, -1]]))
    return PVDiagram(beam_along=_beam_along(cube.meta, cut), vertices=vertices, data=data, offset=offsets, velocity=np.asarray(cube.velocity, float),
                     unit=cube.meta.bunit, x=xs[mid] if xs.shape[0] % 2 else xs.mean(axis=0),
                     y=ys[mid] if ys.shape[0] % 2 else ys.mean(axis=0),
                     description=cut.description, width=w or 0.0, meta=cube.meta,
                     model_velocity=model, model_note=note or "", v_sys=v_sys,
                     seconds=time.perf_counter() - t0,
                     settings={"path": path, "center": None if center is None else str(center),
                               "position_angle": position_angle, "length": length,
                               "width": w, "region": None if region is None else str(region)})
