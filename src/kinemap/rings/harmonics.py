"""Harmonic expansion of the velocities along each ring (Schoenmakers, Franx & de Zeeuw 1997).

Along a ring with azimuth psi in the disk plane (measured from the receding major axis,
the same angle theta as in the tilted-ring model)

    v_los(psi) = c0 + sum_{m=1..3} [c_m cos(m psi) + s_m sin(m psi)],

fitted by linear least squares.  For a pure tilted ring c0 = v_sys, c1 = v_rot sin i,
s1 = v_exp sin i and all other terms vanish; non-zero c2, s2, c3, s3 measure
non-circular motions (bars, spiral arms, lopsidedness) or a geometry error.
"""
from __future__ import annotations

import warnings

import astropy.units as u
import numpy as np
from astropy.table import Table

from kinemap.units import KMS
from kinemap.errors import FitWarning
from kinemap.status import Status
from kinemap.rings import _validate as val
from kinemap.rings._core import Points, noise_scale
from kinemap.rings._geometry import disk_coords
from kinemap.rings.grid import as_grid
from kinemap.rings.model import _plain

__all__ = ["harmonic_expansion", "HARMONIC_TERMS"]

HARMONIC_TERMS = ("c0", "c1", "s1", "c2", "s2", "c3", "s3")


def harmonic_expansion(
    velocity,
    rings: Table,
    grid,
    *,
    velocity_err=None,
    min_points: int = 20,
) -> Table:
    """Third-order harmonic expansion of the velocity field along each ring.

    Parameters
    ----------
    velocity : array_like or Quantity, shape (ny, nx)
        Line-of-sight velocities (plain numbers km/s); NaN = no data.
    rings : Table
        Ring geometry (a table from :func:`fit_velocity_field`; its ``meta['ring_width']`` and the
        columns radius, position_angle, inclination, x_center, y_center are used).
    grid : SkyGrid or Quantity
        Sky geometry of the pixels.
    velocity_err : array_like or Quantity, optional
        1-sigma errors; points are weighted by 1/error^2 and the coefficient errors are
        absolute, multiplied by sqrt(reduced chi^2) of the ring when that exceeds 1 (as in
        :func:`fit_velocity_field`).  Pixels with error 0 or below 1e-6 of the median error are
        skipped with a FitWarning.  Without it, points are weighted equally and the errors
        are scaled by the scatter about the fit.
    min_points : int, optional
        Fewer points in a ring, or no points on one side of the minor axis, give a row of
        NaNs with status NO_DATA.

    Returns
    -------
    Table
        radius, c0, c0_err, c1, c1_err, ..., s3, s3_err [km/s], npoints, status.
        All points in the ring are used (no minor-axis wedge, no angular weighting),
        because the expansion needs the whole ring.
    """
    vel = val.velocity_map(velocity)
    err = val.error_map(velocity_err, vel.shape)
    err, n_zero_err = val.drop_roundoff_errors(err, vel)
    if n_zero_err:
        warnings.warn(f"{n_zero_err} pixels with a velocity have 'velocity_err' 0 (or below "
                      f"{val.ROUNDOFF_ERROR_FRACTION:g} of the median error) and were skipped", FitWarning,
                      stacklevel=2)
    grid = as_grid(grid)
    radius = _plain(rings["radius"], u.arcsec)
    width = rings.meta.get("ring_width", float(np.min(np.diff(radius))) if radius.size > 1 else None)
    geom = {
        "x_center": _plain(rings["x_center"], u.pix),
        "y_center": _plain(rings["y_center"], u.pix),
        "position_angle": _plain(rings["position_angle"], u.deg),
        "inclination": _plain(rings["inclination"], u.deg),
    }
    pts = Points.from_maps(vel, err)
    edges = np.column_stack([radius - width / 2, radius + width / 2])
    return harmonics_table(pts, grid.jacobian, radius, edges, geom, int(min_points))


def harmonics_table(pts: Points, jac, radius, edges, geom, min_points, progress=None) -> Table:
    n = radius.size
    coef = np.full((n, 7), np.nan)
    errs = np.full((n, 7), np.nan)
    npoints = np.zeros(n, int)
    status = np.full(n, int(Status.NO_DATA))
    rows = range(n) if progress is None else progress(range(n))
    for k in rows:
        g = [geom[name][k] for name in ("x_center", "y_center", "position_angle", "inclination")]
        if not np.all(np.isfinite(g)):
            continue
        r, c, s = disk_coords(jac, pts.x, pts.y, *g)
        sel = (r >= edges[k, 0]) & (r < edges[k, 1])
        npoints[k] = int(sel.sum())
        cs = c[sel]
        if npoints[k] < max(min_points, 14) or (cs > 0).sum() < 3 or (cs < 0).sum() < 3:
            continue
        psi = np.arctan2(s[sel], cs)
        a = np.column_stack([np.ones_like(psi)] + [f(m * psi) for m in (1, 2, 3) for f in (np.cos, np.sin)])
        sw = np.sqrt(pts.inv_var[sel])
        aw = a * sw[:, None]
        bw = pts.v[sel] * sw
        try:
            sol, *_ = np.linalg.lstsq(aw, bw, rcond=None)
            cov = np.linalg.inv(aw.T @ aw)
        except np.linalg.LinAlgError:
            status[k] = int(Status.FAILED)
            continue
        if np.linalg.cond(aw) > 1e8:
            status[k] = int(Status.FAILED)
            continue
        dof = npoints[k] - 7
        chi2_red = float(np.sum((aw @ sol - bw) ** 2)) / dof
        # absolute errors are inflated, never shrunk, by the misfit (see _core.noise_scale)
        cov = cov * noise_scale(chi2_red, pts.absolute)
        coef[k] = sol
        errs[k] = np.sqrt(np.clip(np.diag(cov), 0, None))
        status[k] = int(Status.OK)
    t = Table()
    t["radius"] = radius * u.arcsec
    for j, name in enumerate(HARMONIC_TERMS):
        t[name] = coef[:, j] * KMS
        t[name + "_err"] = errs[:, j] * KMS
    t["npoints"] = npoints
    t["status"] = status
    t.meta["ring_width"] = float(edges[0, 1] - edges[0, 0]) if n else np.nan
    t.meta["expansion"] = "v = c0 + sum_{m=1..3} c_m cos(m psi) + s_m sin(m psi); psi from the receding major axis"
    return t
