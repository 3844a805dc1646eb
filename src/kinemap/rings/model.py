"""Model velocity field from a ring solution."""
from __future__ import annotations

import astropy.units as u
import numpy as np
from astropy.table import Table

from kinemap.units import KMS
from kinemap.errors import KinemapError
from kinemap.rings._geometry import disk_coords
from kinemap.rings.grid import as_grid

__all__ = ["model_velocity_field", "RingModel", "MODEL_NOTE"]


def model_velocity_field(rings: Table, shape: tuple[int, int], grid) -> u.Quantity:
    """Line-of-sight velocity of a tilted-ring solution on a pixel grid.

    Parameters
    ----------
    rings : `~astropy.table.Table`
        A ring table as made by :func:`kinemap.rings.fit_velocity_field` (columns radius, v_rot,
        v_exp, position_angle, inclination, v_sys, x_center, y_center; ``meta['ring_width']``
        in arcsec).  Rows with NaN in any of those columns are skipped.
    shape : (ny, nx)
        Shape of the output map.
    grid : SkyGrid or Quantity
        Sky geometry of the pixels (or the pixel scale: north up, east left).

    Returns
    -------
    Quantity [km/s], shape (ny, nx)
        NaN outside the rings (beyond half a ring width past the last ring or inside the
        inner edge of the first).

    Notes
    -----
    Interpolation between rings (the usual scheme): for each pixel and each ring k,
    f_k = r_k - R_k, where r_k is the pixel's disk-plane radius under ring k's geometry.
    The pixel lies between the last ring k-1 whose ellipse it is outside of and the first
    ring k whose ellipse contains it; all ring parameters (geometry and velocities) are
    interpolated linearly with weight t = f_{k-1} / (f_{k-1} - f_k) and v_los is evaluated
    with the interpolated ring.  Inside the first ring the geometry is the first ring's
    and v_rot, v_exp fall linearly to 0 at the centre (so the model is continuous there);
    within half a ring width outside the last ring the last ring is used unchanged.
    """
    grid = as_grid(grid)
    if len(shape) != 2:
        raise KinemapError(f"'shape' must be (ny, nx), got {shape!r}")
    params, width = _ring_params(rings)
    return model_field(params, float(width), tuple(shape), grid.jacobian) * KMS


MODEL_NOTE = ("ring model evaluated at each sample of the cut (no pixel interpolation); "
              "inside the first ring v_rot and v_exp fall linearly to 0 at the centre, so the "
              "curve passes v_sys continuously (not beam-smeared)")


def _ring_params(rings: Table):
    """(per-ring parameter arrays, ring width in arcsec) of a ring table."""
    needed = ("radius", "v_rot", "v_exp", "position_angle", "inclination", "v_sys", "x_center", "y_center")
    missing = [c for c in needed if c not in rings.colnames]
    if missing:
        raise KinemapError(f"'rings' table lacks column(s) {', '.join(missing)}; pass a table from fit_velocity_field")
    width = rings.meta.get("ring_width")
    radius = _plain(rings["radius"], u.arcsec)
    if width is None:
        if radius.size < 2:
            raise KinemapError("'rings' has one row and no meta['ring_width']; add the ring width in arcsec")
        width = float(np.min(np.diff(radius)))
    params = {
        "radius": radius,
        "v_rot": _plain(rings["v_rot"], KMS),
        "v_exp": _plain(rings["v_exp"], KMS),
        "position_angle": _plain(rings["position_angle"], u.deg),
        "inclination": _plain(rings["inclination"], u.deg),
        "v_sys": _plain(rings["v_sys"], KMS),
        "x_center": _plain(rings["x_center"], u.pix),
        "y_center": _plain(rings["y_center"], u.pix),
    }
    return params, float(width)


class RingModel:
    """A ring solution as a velocity model that can be evaluated anywhere on its grid.

    ``RingModel(table, grid)``: ``table`` a ring table (a ``rotation_curve.ecsv`` read back
    works: radius, v_rot, v_exp, geometry; x_center, y_center in 0-based pixels of the map
    the rings were fitted on), ``grid`` a SkyGrid or the WCS of that map.
    :meth:`model_velocity_at` is what :func:`kinemap.pv_diagram` draws.
    """

    model_note = MODEL_NOTE

    def __init__(self, table: Table, grid):
        from kinemap.rings.grid import SkyGrid

        if not hasattr(grid, "jacobian"):
            grid = SkyGrid.from_wcs(grid)
        self.params, self.width = _ring_params(table)
        self.grid = grid

    def model_velocity_at(self, x, y) -> np.ndarray:
        """km/s at 0-based pixel positions (arrays of one shape); NaN beyond the last ring."""
        x, y = np.asarray(x, float), np.asarray(y, float)
        out = model_at(self.params, self.width, x.ravel(), y.ravel(), self.grid.jacobian,
                       to_centre=True)
        return out.reshape(x.shape)

    def systemic_velocity(self) -> float | None:
        v = self.params["v_sys"][np.isfinite(self.params["v_sys"])]
        return float(np.median(v)) if v.size else None


def _plain(col, unit):
    q = u.Quantity(col)
    if q.unit == u.dimensionless_unscaled:
        return np.asarray(q.value, float)
    return q.to_value(unit)


def model_field(params, width, shape, jac):
    """Plain-float model field; ``params`` maps names to per-ring arrays (NaN rows skipped)."""
    yy, xx = np.indices(shape, dtype=float)
    return model_at(params, width, xx.ravel(), yy.ravel(), jac).reshape(shape)


_NAMES = ("radius", "v_rot", "v_exp", "position_angle", "inclination", "v_sys", "x_center",
          "y_center")


def model_at(params, width, xx, yy, jac, *, to_centre: bool = False):
    """The model's line-of-sight velocity at pixel positions ``xx``, ``yy`` (1-D arrays,
    0-based, any fractional values); NaN where the model does not reach.

    ``to_centre``: inside the inner edge of the first ring too, with v_rot and v_exp
    falling linearly to 0 at the centre (solid-body rotation inside the first ring), so
    that a cut through the centre passes v_sys continuously instead of leaving a gap.
    """
    ok = np.all([np.isfinite(np.asarray(params[n], float)) for n in _NAMES], axis=0)
    p = {n: np.asarray(params[n], float)[ok] for n in _NAMES}
    xx, yy = np.asarray(xx, float), np.asarray(yy, float)
    npix = xx.size
    out = np.full(npix, np.nan)
    n = p["radius"].size
    if n == 0:
        return out
    # PA interpolation must not jump across 0/360
    p["position_angle"] = np.rad2deg(np.unwrap(np.deg2rad(p["position_angle"])))
    lower = np.full(npix, -1)  # ring index k (pixel between k-1 and k); -1 = not yet placed
    tfrac = np.zeros(npix)
    prev_f = None
    for k in range(n):
        r, _, _ = disk_coords(jac, xx, yy, p["x_center"][k], p["y_center"][k], p["position_angle"][k],
                              p["inclination"][k])
        f = r - p["radius"][k]
        new = (lower < 0) & (f <= 0)
        if k == 0:
            inside = new & (to_centre | (r >= p["radius"][0] - width / 2 - 1e-9))
            lower[new] = 0
            # fraction of the first ring's velocities: r / R_0 (0 at the centre)
            tfrac[new] = r[new] / p["radius"][0] if p["radius"][0] > 0 else 1.0
            lower[new & ~inside] = -2  # inside the inner edge: no model
        else:
            fp = prev_f[new]
            with np.errstate(invalid="ignore", divide="ignore"):
                t = np.where(fp - f[new] > 0, fp / (fp - f[new]), 1.0)
            lower[new] = k
            tfrac[new] = np.clip(t, 0.0, 1.0)
        prev_f = f
    outer = (lower == -1) & (prev_f <= width / 2 + 1e-9)
    lower[outer] = n - 1
    tfrac[outer] = 1.0
    placed = lower >= 0
    k = lower[placed]
    t = tfrac[placed]
    km1 = np.maximum(k - 1, 0)

    def interp(name):
        a = p[name]
        return a[km1] * (1 - t) + a[k] * t

    g = {name: interp(name) for name in _NAMES}
    first = k == 0
    for name in ("x_center", "y_center", "position_angle", "inclination", "v_sys"):
        g[name][first] = p[name][0]
    for name in ("v_rot", "v_exp"):
        g[name][first] = p[name][0] * t[first]
    _, c, s = disk_coords(jac, xx[placed], yy[placed], g["x_center"], g["y_center"], g["position_angle"],
                          g["inclination"])
    si = np.sin(np.deg2rad(g["inclination"]))
    out[np.nonzero(placed)[0]] = g["v_sys"] + si * (g["v_rot"] * c + g["v_exp"] * s)
    return out
