"""Numerical core of the tilted-ring fitter (private; plain floats, km/s, arcsec, pixels).

The rotation and expansion velocities enter the Begeman (1989) model linearly, so every
fit here is a *variable-projection* fit: for trial geometry (centre, PA, inclination,
systemic velocity) the per-ring v_rot and v_exp are solved exactly by weighted linear
least squares, and only the geometry goes to scipy.optimize.least_squares.  Points are
assigned to rings with the geometry at the start of an outer iteration and the
assignment is frozen during the inner least-squares call (so the cost is smooth); outer
iterations repeat until the assignment settles.

Error recipe (all errors 1 sigma; the beam factor is applied by the caller)
-------------------------------------------------------------------------
* Geometry: covariance from the Jacobian J of the profiled residual (rows sqrt(W) times
  the derivative of the model with v_rot, v_exp re-solved; for variable projection this
  is the geometry block of the full covariance, Golub & Pereyra 1973; from memory), in
  the sandwich form A^-1 B A^-1 because the angular weights are not inverse variances.
* Linear parameters (v_rot, v_exp): the same sandwich form per ring, conditional on
  the geometry.
* Noise scale s^2: without an error map the reduced chi^2 (of all points for the
  geometry, of the ring's points for v_rot, v_exp).  With an error map the errors are
  absolute, s^2 = 1, unless the reduced chi^2 exceeds 1: then s^2 = chi^2_red, because
  residuals larger than the stated errors mean the model or the errors are off (moment-1
  biases, non-circular motions, beam smearing), and the stated errors would understate the
  uncertainty (common practice: errors scaled by sqrt(chi^2_red) when it exceeds 1).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import least_squares

from kinemap.status import Status
from kinemap.rings._geometry import GEOM_NAMES, angular_weight, disk_coords

# outer iterations stop when the geometry moves less than this between them
# (pixels for the centre, degrees for angles, km/s for v_sys)
_SETTLED_STEP = {"x_center": 0.05, "y_center": 0.05, "position_angle": 0.05, "inclination": 0.05, "v_sys": 0.05}
# above this many points, the geometry is first found on a regular subsample of about
# this size and then polished on all points (same answer, a fraction of the time)
_COARSE_SIZE = 25000

# inclination is kept away from 0 (no rotation signal) and 90 deg (rings degenerate to lines)
INCL_BOUNDS = (1.0, 89.0)


@dataclass(frozen=True)
class Points:
    """Valid pixels of the velocity field."""

    x: np.ndarray
    y: np.ndarray
    v: np.ndarray
    inv_var: np.ndarray  # 1/sigma^2, ones without an error map
    absolute: bool  # True when inv_var comes from a real error map
    shape: tuple[int, int]

    @classmethod
    def from_maps(cls, velocity, error=None):
        valid = np.isfinite(velocity)
        if error is not None:
            valid &= np.isfinite(error) & (error > 0)
        yy, xx = np.nonzero(valid)
        v = velocity[valid].astype(float)
        iv = (1.0 / error[valid].astype(float) ** 2) if error is not None else np.ones_like(v)
        return cls(xx.astype(float), yy.astype(float), v, iv, error is not None, velocity.shape)

    def take(self, idx):
        return Points(self.x[idx], self.y[idx], self.v[idx], self.inv_var[idx], self.absolute, self.shape)

    @property
    def size(self):
        return self.v.size


@dataclass
class Settings:
    weighting: str = "cos"
    wedge: float = 20.0
    min_points: int = 20
    min_side: int = 5
    max_outer: int = 6


def same_geometry(geom) -> bool:
    return all(np.all(geom[k] == geom[k][0]) for k in GEOM_NAMES)


def assign(pts: Points, jac, geom, edges):
    """Ring membership: return (point index, ring index) arrays.

    A point belongs to ring k when its disk-plane radius under ring k's geometry lies in
    [inner_k, outer_k).  Rings with identical geometry share one projection; otherwise
    each ring is projected separately (a point may then sit in two rings, or none).
    """
    n = len(edges)
    inner, outer = edges[:, 0], edges[:, 1]
    if same_geometry(geom) and np.all(inner[1:] >= outer[:-1] - 1e-9):
        r, _, _ = disk_coords(jac, pts.x, pts.y, *(geom[k][0] for k in GEOM_NAMES[:4]))
        k = np.searchsorted(outer, r, side="right")
        ok = k < n
        ok[ok] &= r[ok] >= inner[k[ok]]
        idx = np.nonzero(ok)[0]
        return idx, k[idx]
    idx_list, ring_list = [], []
    for j in range(n):
        r, _, _ = disk_coords(jac, pts.x, pts.y, *(geom[name][j] for name in GEOM_NAMES[:4]))
        sel = np.nonzero((r >= inner[j]) & (r < outer[j]))[0]
        idx_list.append(sel)
        ring_list.append(np.full(sel.size, j))
    return np.concatenate(idx_list), np.concatenate(ring_list)


def entry_geometry(geom, ring, free, pvec):
    """Per-entry geometry values, with shared free parameters taken from ``pvec``."""
    out = {}
    for name in GEOM_NAMES:
        if name in free:
            out[name] = pvec[free.index(name)]
        else:
            out[name] = geom[name][ring]
    return out


@dataclass
class LinearSolution:
    v_rot: np.ndarray
    v_exp: np.ndarray
    ok: np.ndarray
    resid: np.ndarray  # per entry, unweighted (data - model)


def solve_linear(ring, n, d, c, s, w, vexp_free, vexp_fixed):
    """Weighted LS per ring of d = v_rot c + v_exp s (c, s already multiplied by sin i)."""
    if vexp_fixed is not None:
        d = d - vexp_fixed[ring] * s
    scc = np.bincount(ring, w * c * c, n)
    bc = np.bincount(ring, w * c * d, n)
    with np.errstate(invalid="ignore", divide="ignore"):
        if vexp_free:
            sss = np.bincount(ring, w * s * s, n)
            scs = np.bincount(ring, w * c * s, n)
            bs = np.bincount(ring, w * s * d, n)
            det = scc * sss - scs * scs
            ok = (scc > 0) & (sss > 0) & (det > 1e-10 * scc * sss)
            vrot = np.where(ok, (bc * sss - bs * scs) / np.where(ok, det, 1), np.nan)
            vexp = np.where(ok, (bs * scc - bc * scs) / np.where(ok, det, 1), np.nan)
        else:
            ok = scc > 0
            vrot = np.where(ok, bc / np.where(ok, scc, 1), np.nan)
            vexp = np.zeros(n) if vexp_fixed is None else vexp_fixed.astype(float).copy()
    vr = np.nan_to_num(vrot[ring])
    ve = np.nan_to_num(vexp[ring]) if vexp_free else 0.0
    resid = d - vr * c - ve * s
    if not vexp_free and vexp_fixed is not None:
        vexp = vexp_fixed.astype(float).copy()
    return LinearSolution(vrot, vexp, ok, resid)


def linear_errors(ring, n, c, s, w, wa, inv_var, resid, vexp_free, absolute, extra_dof):
    """1-sigma errors of the per-ring linear parameters (sandwich form for angular weights).

    The angular weights are not inverse variances, so the covariance is
    A^-1 B A^-1 with A = sum W x x^T, B = sum W wa x x^T (W = wa / sigma^2), times the
    noise scale s^2: the per-ring reduced chi^2 of the points used, floored at 1 with an
    error map (absolute errors, inflated only when the residuals exceed them).
    ``extra_dof`` is the number of nonlinear parameters fitted per ring.
    """
    used = wa > 0
    a00 = np.bincount(ring, w * c * c, n)
    b00 = np.bincount(ring, w * wa * c * c, n)
    npts = np.bincount(ring, used.astype(float), n)
    p = (2 if vexp_free else 1) + extra_dof
    chi = np.bincount(ring, np.where(used, resid * resid * inv_var, 0.0), n)
    with np.errstate(invalid="ignore", divide="ignore"):
        s2 = np.where(npts > p, chi / (npts - p), np.nan)
    if absolute:
        s2 = np.fmax(s2, 1.0)  # NaN (too few points for a chi^2) -> 1
    with np.errstate(invalid="ignore", divide="ignore"):
        if vexp_free:
            a11 = np.bincount(ring, w * s * s, n)
            a01 = np.bincount(ring, w * c * s, n)
            b11 = np.bincount(ring, w * wa * s * s, n)
            b01 = np.bincount(ring, w * wa * c * s, n)
            det = a00 * a11 - a01 * a01
            i00, i01, i11 = a11 / det, -a01 / det, a00 / det
            var_r = i00 * i00 * b00 + 2 * i00 * i01 * b01 + i01 * i01 * b11
            var_e = i01 * i01 * b00 + 2 * i01 * i11 * b01 + i11 * i11 * b11
        else:
            var_r = b00 / (a00 * a00)
            var_e = np.full(n, np.nan)
        return np.sqrt(var_r * s2), np.sqrt(var_e * s2), npts


@dataclass
class GeometryFit:
    """Result of fitting shared geometry (stage 1) or one ring's geometry (stage 2)."""

    geom: dict
    geom_err: dict
    v_rot: np.ndarray
    v_rot_err: np.ndarray
    v_exp: np.ndarray
    v_exp_err: np.ndarray
    npoints: np.ndarray
    status: np.ndarray
    fit_status: int
    idx: np.ndarray = field(repr=False)
    ring: np.ndarray = field(repr=False)
    chi2_red: float = np.nan


def _bounds(free, shape):
    ny, nx = shape
    lo, hi = [], []
    for name in free:
        if name == "x_center":
            lo.append(-0.5), hi.append(nx - 0.5)
        elif name == "y_center":
            lo.append(-0.5), hi.append(ny - 0.5)
        elif name == "inclination":
            lo.append(INCL_BOUNDS[0]), hi.append(INCL_BOUNDS[1])
        else:
            lo.append(-np.inf), hi.append(np.inf)
    return np.array(lo), np.array(hi)


def _side_check(ring, n, cos_t, wa, cfg: Settings):
    used = wa > 0
    npts = np.bincount(ring, used.astype(float), n)
    rec = np.bincount(ring, (used & (cos_t > 0)).astype(float), n)
    app = np.bincount(ring, (used & (cos_t < 0)).astype(float), n)
    return (npts >= cfg.min_points) & (rec >= cfg.min_side) & (app >= cfg.min_side)


def make_residual(sub: Points, ring, n, jac, geom, free, vexp_free, vexp_fixed, w):
    """Residual function of the free shared geometry with v_rot, v_exp profiled out."""
    sqw = np.sqrt(w)

    def fun(p):
        g = entry_geometry(geom, ring, free, p)
        _, c, s = disk_coords(jac, sub.x, sub.y, g["x_center"], g["y_center"], g["position_angle"], g["inclination"])
        si = np.sin(np.deg2rad(g["inclination"]))
        sol = solve_linear(ring, n, sub.v - g["v_sys"], c * si, s * si, w, vexp_free, vexp_fixed)
        return sqw * sol.resid

    return fun


def _prepare(pts, jac, geom, edges, n, cfg, members):
    """Membership, angular weights and the usable rings for the current geometry."""
    idx, ring = members if members is not None else assign(pts, jac, geom, edges)
    sub = pts.take(idx)
    g = entry_geometry(geom, ring, (), None)
    _, c, _ = disk_coords(jac, sub.x, sub.y, g["x_center"], g["y_center"], g["position_angle"], g["inclination"])
    wa = angular_weight(c, cfg.weighting, cfg.wedge)
    ring_ok = _side_check(ring, n, c, wa, cfg)
    keep = ring_ok[ring] & (wa > 0)
    return idx[keep], ring[keep], sub.take(keep), wa[keep], ring_ok


def fit_geometry(pts: Points, jac, edges, geom0, free, vexp_free, vexp_fixed, cfg: Settings,
                 *, members=None, max_nfev=200):
    """Fit geometry parameters ``free`` (shared by all rings in ``edges``).

    ``geom0`` maps each name in GEOM_NAMES to a per-ring float array (start values; the
    fixed ones stay).  ``vexp_fixed`` is a per-ring array used when v_exp is not free.
    ``members`` = (idx, ring) freezes the membership (used by the bootstrap).
    """
    n = len(edges)
    free = tuple(free)
    geom = {k: np.array(geom0[k], dtype=float) for k in GEOM_NAMES}
    polish = False
    if free and members is None and pts.size > 2 * _COARSE_SIZE:
        stride = int(np.ceil(pts.size / _COARSE_SIZE))
        coarse = fit_geometry(pts.take(slice(None, None, stride)), jac, edges, geom0, free, vexp_free, vexp_fixed,
                              cfg, max_nfev=max_nfev)
        if coarse.fit_status != Status.NO_DATA:
            for name in free:
                geom[name][:] = coarse.geom[name]
            polish = True
    lo, hi = _bounds(free, pts.shape)
    p = np.array([geom[name][0] for name in free], dtype=float)
    span = np.where(np.isfinite(hi - lo), hi - lo, 1.0)
    p = np.clip(p, np.where(np.isfinite(lo), lo + 1e-6 * span, -np.inf), np.where(np.isfinite(hi), hi - 1e-6 * span, np.inf))
    fit_status = Status.OK
    jac_res = wa_jac = None
    idx, ring, sub, wa, ring_ok = _prepare(pts, jac, geom, edges, n, cfg, members)
    step_prev = None
    n_outer = 1 if members is not None else (3 if polish else cfg.max_outer)
    for _ in range(n_outer):
        if not free or not ring_ok.any():
            break
        w = wa * sub.inv_var
        p_start = p.copy()
        fun = make_residual(sub, ring, n, jac, geom, free, vexp_free, vexp_fixed, w)
        res = least_squares(fun, p, bounds=(lo, hi), method="trf", x_scale="jac", max_nfev=max_nfev)
        p = res.x
        jac_res, wa_jac = res.jac, wa
        if res.status == 0:
            fit_status = Status.NOT_CONVERGED
        elif np.any(res.active_mask != 0):
            fit_status = Status.AT_BOUND
        else:
            fit_status = Status.OK
        for j, name in enumerate(free):
            geom[name][:] = p[j]
        if members is not None:
            break
        new = _prepare(pts, jac, geom, edges, n, cfg, None)
        # settled when (almost) no point changed ring -- a point or two sitting on a ring
        # edge may flip back and forth without changing the solution -- or when the
        # membership changes no longer move the geometry
        changed = np.setxor1d(new[0] * n + new[1], idx * n + ring, assume_unique=True).size
        step = p - p_start
        settled = changed <= max(2, int(1e-3 * max(idx.size, 1))) or np.all(
            np.abs(step) <= np.array([_SETTLED_STEP[f] for f in free]))
        if not settled and step_prev is not None and np.dot(step, step_prev) < 0:
            # the membership makes the solution swing back and forth: damp by starting
            # the next round half-way
            p = p_start + 0.5 * step
            for j, name in enumerate(free):
                geom[name][:] = p[j]
            new = _prepare(pts, jac, geom, edges, n, cfg, None)
        step_prev = step
        idx, ring, sub, wa, ring_ok = new
        if settled:
            break
    else:
        if free and members is None and fit_status == Status.OK:
            # the membership kept changing; the last solution is kept but flagged
            fit_status = Status.NOT_CONVERGED

    return _final_solution(pts, jac, geom, free, vexp_free, vexp_fixed, n, fit_status, jac_res, wa_jac,
                           idx, ring, sub, wa, ring_ok)


def _final_solution(pts, jac, geom, free, vexp_free, vexp_fixed, n, fit_status, jac_res, wa_jac,
                    idx, ring, sub, wa, ring_ok) -> GeometryFit:
    """v_rot, v_exp and every error with the geometry and membership :func:`fit_geometry`
    settled on (``jac_res``, ``wa_jac``: the least-squares Jacobian and the angular weights
    it was computed with, None if nothing was fitted)."""
    geom_err = {k: np.full(n, np.nan) for k in GEOM_NAMES}
    vrot = np.full(n, np.nan)
    vexp = np.full(n, np.nan)
    vrot_err = np.full(n, np.nan)
    vexp_err = np.full(n, np.nan)
    npoints = np.zeros(n, int)
    status = np.full(n, int(Status.NO_DATA))
    chi2_red = np.nan
    if idx.size == 0 or not ring_ok.any():
        return GeometryFit(geom, geom_err, vrot, vrot_err, vexp, vexp_err, npoints, status,
                           int(Status.NO_DATA), idx, ring)

    # final linear solution with the final geometry and membership
    g = entry_geometry(geom, ring, (), None)
    _, c, s = disk_coords(jac, sub.x, sub.y, g["x_center"], g["y_center"], g["position_angle"], g["inclination"])
    si = np.sin(np.deg2rad(g["inclination"]))
    w = wa * sub.inv_var
    sol = solve_linear(ring, n, sub.v - g["v_sys"], c * si, s * si, w, vexp_free, vexp_fixed)
    n_nonlin_per_ring = len(free) / max(int(ring_ok.sum()), 1)
    er, ee, npts = linear_errors(ring, n, c * si, s * si, w, wa, sub.inv_var, sol.resid, vexp_free,
                                 pts.absolute, n_nonlin_per_ring)
    good = ring_ok & sol.ok
    vrot[good], vexp[good] = sol.v_rot[good], sol.v_exp[good]
    vrot_err[good] = er[good]
    if vexp_free:
        vexp_err[good] = ee[good]
    npoints[:] = npts.astype(int)
    status[good] = int(fit_status)
    status[ring_ok & ~sol.ok] = int(Status.FAILED)
    m = int(wa.size)
    n_par = len(free) + int(good.sum()) * (2 if vexp_free else 1)
    if m > n_par:
        chi2_red = float(np.sum(sol.resid**2 * sub.inv_var)) / (m - n_par)

    if free and jac_res is not None:
        cov = _sandwich_cov(jac_res, wa_jac, noise_scale(chi2_red, pts.absolute))
        if cov is not None:
            for j, name in enumerate(free):
                geom_err[name][:] = np.sqrt(max(cov[j, j], 0.0))
    for name in GEOM_NAMES:
        if name not in free:
            geom_err[name][:] = 0.0
    return GeometryFit(geom, geom_err, vrot, vrot_err, vexp, vexp_err, npoints, status, int(fit_status),
                       idx, ring, chi2_red)


def noise_scale(chi2_red: float, absolute: bool) -> float:
    """s^2 multiplying the formal covariance (see the module docstring)."""
    if absolute:
        return max(1.0, chi2_red) if np.isfinite(chi2_red) else 1.0
    return chi2_red


def _sandwich_cov(jr, wa, s2):
    """A^-1 B A^-1 s^2 for the profiled residual Jacobian (rows sqrt(W) dmodel)."""
    a = jr.T @ jr
    b = jr.T @ (jr * wa[:, None])
    try:
        ainv = np.linalg.inv(a)
    except np.linalg.LinAlgError:
        return None
    if not np.all(np.isfinite(ainv)) or not np.isfinite(s2):
        return None
    return ainv @ b @ ainv * s2
