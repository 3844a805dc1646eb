"""The three stages of :func:`kinemap.rings.fit_rings` and their bookkeeping (private).

Each stage is one function working on a :class:`RingProblem` (the valid points, rings and
options shared by all stages) and returning what the next stage and the result need; the
order of the numerical steps is that of the stages in the ``fit`` module docstring.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import astropy.units as u
import numpy as np
from astropy.table import Table

from kinemap.units import KMS
from kinemap.errors import KinemapError
from kinemap.status import Status
from kinemap.rings._core import INCL_BOUNDS, GeometryFit, Points, Settings, fit_geometry, solve_linear
from kinemap.rings._geometry import GEOM_NAMES, angular_weight, disk_coords, unwrap_deg
from kinemap.rings._smooth import polynomial, running_median
from kinemap.rings.mass import dynamical_mass, physical_radius

_UNITS = {
    "x_center": u.pix, "y_center": u.pix, "position_angle": u.deg, "inclination": u.deg, "v_sys": KMS,
}
# Gaussian beam solid angle = pi / (4 ln 2) FWHM^2 (common practice)
_BEAM_AREA_FACTOR = np.pi / (4 * np.log(2))


@dataclass(frozen=True, eq=False)
class RingProblem:
    """What every stage works on: the valid points, the rings and the fixed options.

    ``vexp0`` is the per-ring v_exp held while it is not fitted; ``bar`` wraps an iterable
    in a progress bar (or not, as the user chose).
    """

    pts: Points
    jac: np.ndarray
    radii: np.ndarray
    edges: np.ndarray
    width: float
    cfg: Settings
    vexp0: np.ndarray
    vexp_geom_free: bool
    vexp_final_free: bool
    err_scale: float
    bar: Callable

    @property
    def n(self) -> int:
        return self.radii.size

    def vexp_held(self, free: bool):
        """The v_exp values to hold when v_exp is not free, else None."""
        return None if free else self.vexp0


def error_scale(beam, scale_errors_by_beam: bool, pixel_area_arcsec2: float) -> float:
    """sqrt(pixels per beam), at least 1, when errors are to be scaled by the beam; else 1.

    Neighbouring pixels inside one beam are not independent, so formal errors computed as
    if they were are too small by about this factor.
    """
    if beam and scale_errors_by_beam:
        return max(1.0, float(np.sqrt(_BEAM_AREA_FACTOR * beam**2 / pixel_area_arcsec2)))
    return 1.0


@dataclass(frozen=True, eq=False)
class GlobalStage:
    """Stage 1: the shared geometry ('glob', position angle in [0, 360)) and its errors."""

    fit: GeometryFit
    geom: dict
    geom_err: dict
    table: Table


def stage_global(prob: RingProblem, geom0: dict, free: tuple) -> GlobalStage:
    """Stage 1: one geometry for all rings (the parameters in ``free``), v_rot per ring."""
    s1 = fit_geometry(prob.pts, prob.jac, prob.edges, geom0, free, prob.vexp_geom_free,
                      prob.vexp_held(prob.vexp_geom_free), prob.cfg)
    if not np.any(np.isfinite(s1.v_rot)):
        raise KinemapError(
            "no ring could be fitted: every ring has too few points on one side of the minor axis; "
            "check the centre and ring radii, or lower 'min_points' / 'exclude_minor_axis'"
        )
    glob = {name: s1.geom[name].copy() for name in GEOM_NAMES}
    glob_err = {name: s1.geom_err[name].copy() for name in GEOM_NAMES}
    glob["position_angle"] = glob["position_angle"] % 360.0
    es = prob.err_scale
    table = _stage_table(prob.radii, s1.v_rot, s1.v_rot_err * es, s1.v_exp, s1.v_exp_err * es, glob,
                         _scaled(glob_err, es), s1.npoints, s1.status, prob.width, "global")
    table.meta["chi2_reduced"] = _plain(s1.chi2_red)
    return GlobalStage(s1, glob, glob_err, table)


@dataclass(frozen=True, eq=False)
class RingStage:
    """Stage 2: per-ring geometry, errors and status (stage-1 values where it did not run).

    ``table`` is None when stage 2 did not run.
    """

    geom: dict
    geom_err: dict
    status: np.ndarray
    table: Table | None


def stage_rings(prob: RingProblem, glob: GlobalStage, free_ring: tuple, run: bool) -> RingStage:
    """Stage 2: the parameters in ``free_ring`` and v_rot fitted ring by ring, the rest held
    at their stage-1 values.  A ring that cannot be fitted gets NaN geometry."""
    n = prob.n
    ring_geom = {name: glob.geom[name].copy() for name in GEOM_NAMES}
    ring_err = {name: glob.geom_err[name].copy() for name in GEOM_NAMES}
    ring_status = glob.fit.status.copy()
    if not run:
        return RingStage(ring_geom, ring_err, ring_status, None)
    vr2 = np.full(n, np.nan)
    vr2e = np.full(n, np.nan)
    ve2 = np.full(n, np.nan)
    ve2e = np.full(n, np.nan)
    np2 = np.zeros(n, int)
    for k in prob.bar(range(n), "rings: stage 2"):
        gk = {name: ring_geom[name][k:k + 1].copy() for name in GEOM_NAMES}
        vf = None if prob.vexp_geom_free else prob.vexp0[k:k + 1]
        fit = fit_geometry(prob.pts, prob.jac, prob.edges[k:k + 1], gk, free_ring, prob.vexp_geom_free, vf,
                           prob.cfg)
        ring_status[k] = fit.status[0]
        np2[k] = fit.npoints[0]
        if np.isfinite(fit.v_rot[0]):
            vr2[k], vr2e[k], ve2[k], ve2e[k] = fit.v_rot[0], fit.v_rot_err[0], fit.v_exp[0], fit.v_exp_err[0]
            for name in free_ring:
                ring_geom[name][k] = fit.geom[name][0]
                ring_err[name][k] = fit.geom_err[name][0]
        else:
            for name in free_ring:
                ring_geom[name][k] = np.nan
                ring_err[name][k] = np.nan
    ring_geom["position_angle"] = unwrap_deg(ring_geom["position_angle"], glob.geom["position_angle"][0])
    shown = dict(ring_geom)
    shown["position_angle"] = ring_geom["position_angle"] % 360.0
    es = prob.err_scale
    table = _stage_table(prob.radii, vr2, vr2e * es, ve2, ve2e * es, shown, _scaled(ring_err, es), np2,
                         ring_status, prob.width, "rings")
    return RingStage(ring_geom, ring_err, ring_status, table)


@dataclass(frozen=True, eq=False)
class FinalStage:
    """Stage 3: the final refit, its geometry as shown in the table, and the table."""

    fit: GeometryFit
    geom: dict
    status: np.ndarray
    table: Table


def stage_final(prob: RingProblem, glob: GlobalStage, rings: RingStage, *, stages_t, free_ring, final_geometry,
                polynomial_degree, n_bootstrap, seed, beam, distance, error_map: bool) -> FinalStage:
    """Stage 3: the geometry smoothed (or kept, or replaced) as ``final_geometry`` says, v_rot
    and v_exp refitted with it, then the errors: random (formal or bootstrap) combined with
    the approaching/receding difference, all times the beam factor."""
    final_g, final_e, how = _final_geometry(stages_t, final_geometry, polynomial_degree, prob.radii, glob.geom,
                                            glob.geom_err, rings.geom, rings.geom_err, free_ring)
    final_g["inclination"] = np.clip(final_g["inclination"], *INCL_BOUNDS)
    free = prob.vexp_final_free
    s3 = fit_geometry(prob.pts, prob.jac, prob.edges, final_g, (), free, prob.vexp_held(free), prob.cfg)
    v_app, v_rec = _halves(prob.pts, prob.jac, s3, final_g, prob.n, prob.cfg, free, prob.vexp_held(free))
    random_r = s3.v_rot_err.copy()
    random_e = s3.v_exp_err.copy()
    geom_random = {name: final_e[name].copy() for name in GEOM_NAMES}
    if n_bootstrap:
        rng = np.random.default_rng(seed)
        bs = _bootstrap(prob.pts, prob.jac, prob.edges, final_g, s3, free_ring, free, prob.vexp_held(free),
                        prob.cfg, int(n_bootstrap), rng, prob.bar)
        random_r, random_e = bs["v_rot"], bs["v_exp"]
        for name in free_ring:
            geom_random[name] = bs[name]
    es = prob.err_scale
    sys_half = np.abs(v_rec - v_app) / 2
    v_rot_err = np.sqrt((random_r * es) ** 2 + np.nan_to_num(sys_half) ** 2)
    v_exp_err = random_e * es
    status = s3.status.copy()
    if 2 in stages_t and how == "rings":
        # the ring's own stage-2 verdict (e.g. inclination at a bound) carries over
        carry = (status == Status.OK) & np.isin(rings.status, (Status.NOT_CONVERGED, Status.AT_BOUND))
        status[carry] = rings.status[carry]
    failed = ~np.isfinite(s3.v_rot)
    final_shown = {name: np.where(failed, np.nan, final_g[name]) for name in GEOM_NAMES}
    final_shown["position_angle"] = final_shown["position_angle"] % 360.0
    final_err = {name: np.where(failed, np.nan, geom_random[name] * es) for name in GEOM_NAMES}

    table = _stage_table(prob.radii, s3.v_rot, v_rot_err, s3.v_exp, v_exp_err, final_shown, final_err,
                         s3.npoints, status, prob.width, "final", v_app=v_app, v_rec=v_rec,
                         beam=beam, distance=distance)
    _final_meta(table.meta, how, s3.chi2_red, n_bootstrap, es, error_map, free_ring)
    return FinalStage(s3, final_shown, status, table)


def _final_meta(meta, how, chi2_red, n_bootstrap, err_scale, error_map, free_ring):
    """The final table's header: error recipes in words, geometry used, reduced chi^2 (in
    this order, which is the order written to files)."""
    meta["v_rot_err"] = (
        "sqrt(random^2 + ((v_rot_receding - v_rot_approaching)/2)^2); random = "
        + ("bootstrap" if n_bootstrap else "formal" + (" (x sqrt(chi2_reduced of the ring) when that exceeds 1)"
                                                      if error_map else ""))
        + (f" x {err_scale:.3g} (pixels per beam)" if err_scale > 1 else "")
    )
    meta["geometry"] = how
    meta["chi2_reduced"] = _plain(chi2_red)
    meta["geometry_err"] = (
        _GEOMETRY_ERR_RECIPE + (f"; x {err_scale:.3g} (pixels per beam)" if err_scale > 1 else "")
        + ("; bootstrap for " + ", ".join(free_ring) if n_bootstrap and free_ring else "")
        + f"; values and errors from {how!r} geometry")


def global_summary(glob: GlobalStage, rings: RingStage, err_scale: float, free_ring, ran_rings: bool) -> dict:
    """``RingFitResult.global_geometry``: stage-1 values and errors with units, and the
    stage-2 ring scatter of each parameter fitted per ring."""
    gg = {}
    for name in GEOM_NAMES:
        # one shared value; the median when the user fixed per-ring values
        gg[name] = float(np.median(glob.geom[name])) * _UNITS[name]
        gg[name + "_err"] = float(np.median(glob.geom_err[name])) * err_scale * _UNITS[name]
    if ran_rings:
        for name in free_ring:
            gg[name + "_ring_scatter"] = _ring_scatter(rings.geom[name], rings.status) * _UNITS[name]
    return gg


# ---------------------------------------------------------------------------- helpers
_GEOMETRY_ERR_RECIPE = (
    "formal (J^T W J)^-1 in sandwich form for the angular weights; absolute with an error map "
    "(x sqrt(chi2_reduced of the fit) when that exceeds 1), scaled by the scatter about the fit without one"
)


def _plain(x) -> float | None:
    """A float for a table's YAML header (None for NaN)."""
    return float(x) if np.isfinite(x) else None


def _ring_scatter(values, status):
    """Standard deviation of the cleanly fitted stage-2 ring values over sqrt(their number).

    An empirical error of a global value, to set beside the formal one: independent of
    the error map and the noise model, larger when the disk warps.  NaN for < 3 rings.
    """
    v = np.asarray(values, float)[(np.asarray(status) == Status.OK) & np.isfinite(values)]
    if v.size < 3:
        return np.nan
    return float(np.std(v, ddof=1) / np.sqrt(v.size))


def _scaled(errs, factor):
    return {k: v * factor for k, v in errs.items()}


def default_radii(pts: Points, jac, guess, width, pix, min_coverage=0.25):
    """Rings from the centre out to the last one at least ``min_coverage`` covered."""
    r, _, _ = disk_coords(jac, pts.x, pts.y, guess["x_center"], guess["y_center"], guess["position_angle"],
                          guess["inclination"])
    nmax = int(np.ceil(r.max() / width)) if r.size else 0
    if nmax == 0:
        raise KinemapError("'velocity' has no valid pixels away from the centre; check the map and the centre")
    counts = np.bincount(np.minimum((r / width).astype(int), nmax), minlength=nmax + 1)[:nmax]
    k = np.arange(nmax)
    area = np.pi * ((k + 1) ** 2 - k**2) * width**2 * np.cos(np.deg2rad(guess["inclination"]))
    expected = area / (pix * pix)
    covered = np.nonzero(counts / expected >= min_coverage)[0]
    if covered.size == 0:
        raise KinemapError(
            "no ring is at least 25% covered by valid pixels; give 'radii' and 'ring_width' explicitly"
        )
    nring = int(covered.max()) + 1
    return (np.arange(nring) + 0.5) * width


def _final_geometry(stages_t, mode, degree, radius, glob, glob_err, ring_geom, ring_err, free_ring):
    final = {name: glob[name].copy() for name in GEOM_NAMES}
    errs = {name: glob_err[name].copy() for name in GEOM_NAMES}
    if 2 not in stages_t:
        return final, errs, "global"
    how = "rings" if 3 not in stages_t else mode
    if how == "global":
        return final, errs, how
    for name in free_ring:
        vals, e = ring_geom[name], ring_err[name]
        if how == "polynomial":
            sm, se = polynomial(radius, vals, e, degree)
        elif how == "median":
            sm, se = running_median(vals, e)
        else:
            sm, se = vals.copy(), e.copy()
        # rings without a usable stage-2 value take the nearest ring's value (linear
        # between rings, constant beyond the ends); the global value if no ring has one
        bad = ~np.isfinite(sm)
        if bad.all():
            sm, se = glob[name].copy(), glob_err[name].copy()
        elif bad.any():
            good = ~bad
            sm[bad] = np.interp(radius[bad], radius[good], sm[good])
            se[bad] = np.interp(radius[bad], radius[good], np.nan_to_num(se[good], nan=np.nanmax(se[good]) if np.isfinite(se[good]).any() else 0.0))
        final[name], errs[name] = sm, se
    return final, errs, how


def _halves(pts, jac, fit, geom, n, cfg, vexp_free, vexp_fixed):
    """v_rot of the approaching (cos theta < 0) and receding (cos theta > 0) halves."""
    app = np.full(n, np.nan)
    rec = np.full(n, np.nan)
    if fit.idx.size == 0:
        return app, rec
    sub = pts.take(fit.idx)
    ring = fit.ring
    g = {name: geom[name][ring] for name in GEOM_NAMES}
    _, c, s = disk_coords(jac, sub.x, sub.y, g["x_center"], g["y_center"], g["position_angle"], g["inclination"])
    si = np.sin(np.deg2rad(g["inclination"]))
    wa = angular_weight(c, cfg.weighting, cfg.wedge)
    w = wa * sub.inv_var
    ok_rings = np.isfinite(fit.v_rot)
    for sign, out in ((-1, app), (1, rec)):
        side = (np.sign(c) == sign) & (wa > 0)
        sol = solve_linear(ring[side], n, sub.v[side] - g["v_sys"][side], (c * si)[side], (s * si)[side], w[side],
                           vexp_free, vexp_fixed)
        cnt = np.bincount(ring[side], minlength=n)
        good = ok_rings & sol.ok & (cnt >= cfg.min_side)
        out[good] = sol.v_rot[good]
    return app, rec


def _bootstrap(pts, jac, edges, geom, fit, free_ring, vexp_free, vexp_fixed, cfg, nboot, rng, bar):
    """Std of each ring's parameters over ``nboot`` resamplings of its points."""
    n = len(edges)
    out = {name: np.full(n, np.nan) for name in ("v_rot", "v_exp", *GEOM_NAMES)}
    for k in bar(range(n), "rings: bootstrap"):
        if not np.isfinite(fit.v_rot[k]):
            continue
        members = fit.idx[fit.ring == k]
        gk = {name: geom[name][k:k + 1].copy() for name in GEOM_NAMES}
        vf = None if vexp_fixed is None else vexp_fixed[k:k + 1]
        samples = []
        for _ in range(nboot):
            pick = rng.integers(0, members.size, members.size)
            res = fit_geometry(pts, jac, edges[k:k + 1], gk, free_ring, vexp_free, vf, cfg,
                               members=(members[pick], np.zeros(members.size, int)))
            samples.append([res.v_rot[0], res.v_exp[0]] + [res.geom[name][0] for name in GEOM_NAMES])
        arr = np.array(samples, float)
        arr[:, 2 + GEOM_NAMES.index("position_angle")] = unwrap_deg(
            arr[:, 2 + GEOM_NAMES.index("position_angle")], geom["position_angle"][k])
        good = np.all(np.isfinite(arr[:, :1]), axis=1)
        if good.sum() >= 2:
            std = np.nanstd(arr[good], axis=0, ddof=1)
            for j, name in enumerate(("v_rot", "v_exp", *GEOM_NAMES)):
                out[name][k] = std[j]
    if not vexp_free:
        out["v_exp"][:] = np.nan
    return out


def _stage_table(radius, v_rot, v_rot_err, v_exp, v_exp_err, geom, geom_err, npoints, status, width, stage,
                 *, v_app=None, v_rec=None, beam=None, distance=None):
    t = Table()
    t["radius"] = radius * u.arcsec
    t["v_rot"] = v_rot * KMS
    t["v_rot_err"] = v_rot_err * KMS
    t["v_exp"] = v_exp * KMS
    t["v_exp_err"] = v_exp_err * KMS
    for name in ("position_angle", "inclination", "v_sys", "x_center", "y_center"):
        t[name] = geom[name] * _UNITS[name]
    t["npoints"] = np.asarray(npoints, int)
    if stage == "final":
        t["v_rot_approaching"] = v_app * KMS
        t["v_rot_receding"] = v_rec * KMS
        smeared = radius < 2 * beam if beam else np.zeros(radius.size, bool)
        t["beam_smeared"] = smeared
        if distance is not None:
            r_kpc = physical_radius(radius, distance)
            t["radius_kpc"] = r_kpc
            t["mass_enclosed"] = dynamical_mass(v_rot, r_kpc).to(u.M_sun)
    t["status"] = np.asarray(status, int)
    for name in ("position_angle", "inclination", "v_sys", "x_center", "y_center"):
        t[name + "_err"] = geom_err[name] * _UNITS[name]
    t.meta["ring_width"] = float(width)
    t.meta["stage"] = stage
    t.meta["status_codes"] = "kinemap.status.Status: 0 OK, 1 NOT_CONVERGED, 2 AT_BOUND, 5 NO_DATA, 7 FAILED"
    t.meta["conventions"] = (
        "PA east of north to the receding half of the major axis; inclination 0 = face-on; "
        "x_center, y_center 0-based pixels; v_exp > 0: minor-axis half at PA+90 deg redshifted"
    )
    return t
