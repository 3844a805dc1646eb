"""Position-velocity slice of a cube along the major axis of a ring solution."""
from __future__ import annotations

from dataclasses import dataclass

import astropy.units as u
import numpy as np
from scipy import ndimage

from kinemap.units import KMS, to_value
from kinemap.errors import KinemapError

__all__ = ["PositionVelocitySlice", "major_axis_pv"]


@dataclass(frozen=True, eq=False)
class PositionVelocitySlice:
    """A position-velocity diagram with the projected ring model along the same line.

    Attributes
    ----------
    offset : Quantity [arcsec], shape (n_offset,)
        Position along the slice from the centre, positive towards the receding half of
        the major axis (the direction of ``position_angle``).
    velocity : Quantity [km/s], shape (n_channel,)
        Spectral axis.
    data : ndarray, shape (n_channel, n_offset)
        Cube values along the slice (bilinear interpolation; NaN where the cube has no
        data or the slice leaves the map), in the cube's unit (``unit``).
    unit : Unit
    model_velocity : Quantity [km/s], shape (n_offset,)
        The ring model's line-of-sight velocity at the same positions (NaN beyond the
        last ring; inside the first ring it falls linearly to v_sys at the centre).
    position_angle : Quantity [deg];  x_center, y_center : float (0-based pixels)
        The slice geometry.
    """

    offset: u.Quantity
    velocity: u.Quantity
    data: np.ndarray
    unit: u.UnitBase
    model_velocity: u.Quantity
    position_angle: u.Quantity
    x_center: float
    y_center: float


def major_axis_pv(cube, velocity_axis, result, *, position_angle=None, x_center=None, y_center=None,
                  width=None) -> PositionVelocitySlice:
    """Cut a cube along the major axis of a :class:`RingFitResult`.

    Parameters
    ----------
    cube : array_like or Quantity, shape (n_channel, ny, nx)
        Spectral-line cube on the same pixel grid as the fitted velocity field.
    velocity_axis : Quantity or array_like, shape (n_channel,)
        Velocity of each channel (plain numbers km/s).
    result : RingFitResult
        The ring solution; its stage-1 (global) centre and position angle define the slice
        unless given here.
    position_angle : Quantity or float, optional
        Slice direction (deg east of north); default the global position angle.
    x_center, y_center : float, optional
        Slice centre (0-based pixels); default the global centre.
    width : Quantity or float, optional
        Average the cube over a strip this wide (arcsec) across the slice; default one
        line of bilinear samples.

    Returns
    -------
    PositionVelocitySlice
    """
    unit = cube.unit if isinstance(cube, u.Quantity) else u.dimensionless_unscaled
    data = np.asarray(cube.value if isinstance(cube, u.Quantity) else cube, dtype=float)
    if data.ndim != 3:
        raise KinemapError(f"'cube' must be 3-D (spectral, y, x), got shape {data.shape}")
    if data.shape[1:] != result.velocity.shape:
        raise KinemapError(
            f"'cube' spatial shape {data.shape[1:]} differs from the fitted map {result.velocity.shape}; "
            "use the cube the velocity field was made from"
        )
    vaxis = np.atleast_1d(np.asarray(to_value(velocity_axis, KMS, name="velocity_axis"), float))
    if vaxis.shape != (data.shape[0],):
        raise KinemapError(f"'velocity_axis' must have one value per channel ({data.shape[0]}), got {vaxis.shape}")
    gg = result.global_geometry
    pa = float(to_value(position_angle, u.deg, name="position_angle")) if position_angle is not None \
        else float(gg["position_angle"].to_value(u.deg))
    x0 = float(x_center) if x_center is not None else float(gg["x_center"].value)
    y0 = float(y_center) if y_center is not None else float(gg["y_center"].value)
    grid = result.grid
    step = grid.pixel_scale.to_value(u.arcsec)
    rmax = float(np.nanmax(u.Quantity(result.table["radius"]).to_value(u.arcsec))) + result.ring_width.to_value(u.arcsec)
    offs = np.arange(-np.ceil(rmax / step), np.ceil(rmax / step) + 1) * step
    strip = [0.0]
    if width is not None:
        w = float(to_value(width, u.arcsec, name="width"))
        if not np.isfinite(w) or w < 0:
            raise KinemapError(f"'width' must be a positive angle, got {width!r}")
        nline = max(1, int(round(w / step)))
        strip = (np.arange(nline) - (nline - 1) / 2) * step
    par = np.deg2rad(pa)
    along = np.array([np.sin(par), np.cos(par)])  # (east, north) unit vector towards PA
    across = np.array([np.cos(par), -np.sin(par)])
    pv = np.zeros((data.shape[0], offs.size))
    count = np.zeros((data.shape[0], offs.size))
    for a in strip:
        east = offs * along[0] + a * across[0]
        north = offs * along[1] + a * across[1]
        dx, dy = grid.pixel_offsets(east, north)
        xs, ys = x0 + dx, y0 + dy
        for ch in range(data.shape[0]):
            vals = ndimage.map_coordinates(data[ch], [ys, xs], order=1, cval=np.nan, prefilter=False)
            ok = np.isfinite(vals)
            pv[ch, ok] += vals[ok]
            count[ch, ok] += 1
    with np.errstate(invalid="ignore", divide="ignore"):
        pv = np.where(count > 0, pv / count, np.nan)
    east, north = offs * along[0], offs * along[1]
    dx, dy = grid.pixel_offsets(east, north)
    # the model at the samples themselves, continuous through the centre (not the pixel
    # map, whose bilinear interpolation across the centre pixel and the hole inside the
    # first ring's inner edge put a kink in the curve there)
    from kinemap.rings.model import RingModel

    mv = RingModel(result.table, grid).model_velocity_at(x0 + dx, y0 + dy)
    return PositionVelocitySlice(
        offset=offs * u.arcsec, velocity=vaxis * KMS, data=pv, unit=unit, model_velocity=mv * KMS,
        position_angle=(pa % 360.0) * u.deg, x_center=x0, y_center=y0,
    )
