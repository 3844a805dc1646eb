"""The stages of :func:`kinemap.rings.stage3d.fit_rings_3d` (private)."""
from __future__ import annotations

import time
import warnings

import astropy.units as u
import numpy as np
from astropy.table import Table
from tqdm.auto import tqdm

from kinemap.errors import FitWarning, KinemapError
from kinemap.rings import fit3d
from kinemap.rings._geometry import disk_coords, unwrap_deg
from kinemap.rings._smooth import polynomial, running_median
from kinemap.rings.disk3d import GEOM_PARAMS, DiskModel
from kinemap.rings.grid import SkyGrid
from kinemap.rings.mass import dynamical_mass, physical_radius
from kinemap.rings.pressure import asymmetric_drift
from kinemap.spectral.response import check_response, response_sigma
from kinemap.status import Status
from kinemap.units import KMS, to_value

_UNITS = {"x_center": u.pix, "y_center": u.pix, "position_angle": u.deg, "inclination": u.deg,
          "v_sys": KMS}
_NORMALISATION = {
    "rings": "ring by ring: Sigma per ring, NNLS against the data's moment 0",
    "pixels": "pixel by pixel: the model's moment 0 scaled to the data's in every pixel "
              "(Sigma per ring from the NNLS, for the table)"}
_FIX_NAMES = ("center", "x_center", "y_center", "position_angle", "inclination", "v_sys", "v_exp")


def _check(cube, fix, stages, final_geometry, loss, bootstrap, smoothing, normalisation):
    if not hasattr(cube, "velocity") or np.ndim(getattr(cube, "data", None)) != 3:
        raise KinemapError("the 3D ring fit needs a cube (kinemap.read_cube); for a velocity "
                           "map use fit_rings or --model 2d")
    if cube.meta.beam is None:
        raise KinemapError("the 3D ring fit needs the cube's beam: give beam= (e.g. '30arcsec') "
                           "or --beam")
    bad = [f for f in fix if f not in _FIX_NAMES]
    if bad:
        raise KinemapError(f"'fix' names unknown parameters {bad}; use any of {', '.join(_FIX_NAMES)}")
    if 1 not in stages or not set(stages) <= {1, 2, 3}:
        raise KinemapError(f"'stages' must include 1 and be among 1, 2, 3, got {list(stages)}")
    if final_geometry not in ("median", "polynomial", "rings", "global"):
        raise KinemapError(f"'final_geometry' must be median, polynomial, rings or global, "
                           f"got {final_geometry!r}")
    if loss not in ("chi2", "absolute"):
        raise KinemapError(f"'loss' must be 'chi2' or 'absolute', got {loss!r}")
    if smoothing != "auto" and not (isinstance(smoothing, (int, float))
                                    and np.isfinite(smoothing) and smoothing >= 0):
        raise KinemapError(f"'smoothing' must be 'auto' or a number >= 0 (0: none), "
                           f"got {smoothing!r}")
    if normalisation not in _NORMALISATION:
        raise KinemapError(f"'surface_normalisation' must be 'rings' or 'pixels', got "
                           f"{normalisation!r}")
    if int(bootstrap) != bootstrap or bootstrap < 0 or bootstrap == 1:
        raise KinemapError(f"'bootstrap' must be 0 or a whole number >= 2, got {bootstrap!r}")


def _data_and_mask(cube, noise, mask, resp):
    from kinemap.maps.masks import make_mask
    from kinemap.maps.noise import estimate_noise

    data = np.asarray(cube.data, dtype=np.float64)
    if noise is None:
        noise = estimate_noise(cube, channel_response=resp)
    if mask is None:
        mask = make_mask(cube, noise=noise, channel_response=resp)
    finite = np.isfinite(data)
    m3 = mask.mask if mask.mask is not None else mask.block(slice(0, data.shape[1]), data, noise.sigma)
    m3 = np.asarray(m3, bool) & finite & np.isfinite(noise.sigma)[None]
    if m3.sum() < 50:
        raise KinemapError("the signal mask holds fewer than 50 voxels; lower the mask "
                           "threshold or check the cube")
    return np.where(finite, data, 0.0), m3, noise, mask


def _first_guess(cube, noise, mask, given, resp, progress):
    """A 2D fit of the moment-1 map (geometry and v_rot) and the moment-2 map."""
    from kinemap.maps.moments import compute_moments
    from kinemap.rings.stage import fit_velocity_arrays

    mom = compute_moments(cube, mask=mask, noise=noise, channel_response=resp, progress=False)
    v, err, inten = mom.velocity_field()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        r2d = fit_velocity_arrays(v, err, inten, cube.meta, pv_diagram=False, progress=progress,
                                  **given)
    return r2d, mom.arrays["moment2"], mom.arrays["moment0"], v


def _shape_guess(mom0, mom1, foot, jac, beam, x0, y0, v_sys):
    """PA and inclination from the shape of the moment-0 map (the beam's second moments
    subtracted; a thin circular disk seen at inclination i has axis ratio cos i, common
    practice), the receding side from moment 1.  None when the map is too small."""
    y, x = np.nonzero(foot & np.isfinite(mom0) & (mom0 > 0))
    if x.size < 10:
        return None
    w = mom0[y, x]
    east = jac[0, 0] * (x - x0) + jac[0, 1] * (y - y0)
    north = jac[1, 0] * (x - x0) + jac[1, 1] * (y - y0)
    cov = np.cov(np.vstack([east, north]), aweights=w)
    # beam covariance in (east, north): major FWHM along its PA east of north
    bpa = np.deg2rad(beam[2])
    rot = np.array([[np.sin(bpa), np.cos(bpa)], [np.cos(bpa), -np.sin(bpa)]])
    cov = cov - rot @ np.diag([beam[0] ** 2, beam[1] ** 2]) @ rot.T / (8 * np.log(2))
    vals, vecs = np.linalg.eigh(cov)
    if vals[1] <= 0:
        return None
    ratio = np.sqrt(max(vals[0], 0.0) / vals[1])
    e, n = vecs[:, 1]
    pa = np.rad2deg(np.arctan2(e, n))
    vm = mom1[y, x]
    ok = np.isfinite(vm)
    if ok.any() and np.sum(w[ok] * (vm[ok] - v_sys) * (east[ok] * e + north[ok] * n)) < 0:
        pa += 180.0  # the major axis direction points to the approaching side: flip
    return {"position_angle": float(pa % 360.0),
            "inclination": float(np.clip(np.rad2deg(np.arccos(min(ratio, 1.0))), 10.0, 85.0))}


def _trusted_geometry(r2d, given, shape):
    """``given`` with PA and inclination from the moment-0 shape where the user gave none
    and the 2D fit's failed (a map a few beams across: an inclination at the bounds or an
    error beyond 30 deg), so that stage 1 does not start in the face-on minimum, where
    v_rot sin i is all the cube constrains.  A merely uncertain 2D geometry is kept: stage 1
    corrects it, and from a different start it can settle in a different minimum of the
    rotation speeds (seen on the poorly resolved recovery mock)."""
    g = r2d.result.global_geometry
    inc = float(u.Quantity(g["inclination"]).value)
    err = [float(u.Quantity(g.get(k + "_err", np.nan)).value) for k in ("position_angle", "inclination")]
    unreliable = not np.all(np.isfinite(err)) or max(err) > 30 or not 10 <= inc <= 85
    if shape is None or not unreliable:
        return given
    out = dict(given)
    for k in ("position_angle", "inclination"):
        if out.get(k) is None:
            out[k] = shape[k]
    return out


def _radii(foot, jac, geom, beam, pix, ring_width, radii):
    if radii is not None:
        r = np.atleast_1d(to_value(radii, u.arcsec, name="radii")).astype(float)
        w = float(np.min(np.diff(r))) if r.size > 1 else float(r[0])
        return r, (to_value(ring_width, u.arcsec, name="ring_width") if ring_width else w)
    w = float(to_value(ring_width, u.arcsec, name="ring_width")) if ring_width else max(beam / 2, 1.5 * pix)
    y, x = np.nonzero(foot)
    r, _, _ = disk_coords(jac, x, y, geom["x_center"], geom["y_center"],
                          geom["position_angle"], geom["inclination"])
    nmax = int(np.ceil(r.max() / w)) + 1
    counts = np.bincount(np.minimum((r / w).astype(int), nmax), minlength=nmax + 1)[:nmax]
    k = np.arange(nmax)
    area = np.pi * ((k + 1) ** 2 - k**2) * w**2 * np.cos(np.deg2rad(geom["inclination"])) / pix**2
    covered = np.nonzero(counts / area >= 0.25)[0]
    # the mask reaches about a beam beyond the disk (smearing and the mask's smoothing)
    edge = ((covered.max() + 1) * w if covered.size else r.max()) - beam
    n = max(int(np.floor(edge / w)), 2)
    return (np.arange(n) + 0.5) * w, w


def _start(r2d, m2, radii, foot, resp_sigma, given_geom):
    t = r2d.table  # a QTable: columns are Quantities
    g = r2d.result.global_geometry
    geom = {k: float(u.Quantity(g[k]).value) for k in GEOM_PARAMS}
    geom.update({k: v for k, v in given_geom.items() if v is not None})
    r2 = np.asarray(t["radius"].to_value(u.arcsec))
    # the 2D speeds rescaled to the starting inclination when that differs from the 2D one
    i2d = np.deg2rad(np.clip(float(u.Quantity(g["inclination"]).value), 3.0, 90.0))
    v2 = np.asarray(t["v_rot"].to_value(KMS)) * np.sin(i2d) / np.sin(np.deg2rad(geom["inclination"]))
    ok = np.isfinite(v2)
    vrot = np.interp(radii, r2[ok], v2[ok]) if ok.any() else np.full(radii.size, 50.0)
    m2v = m2[foot & np.isfinite(m2)]
    s0 = np.sqrt(max(np.median(m2v) ** 2 - resp_sigma**2, 4.0)) if m2v.size else 10.0
    # moment 2 is inflated by beam smearing: start below it
    disp = np.full(radii.size, np.clip(0.8 * s0, 2.0, 60.0))
    return dict(v_rot=np.abs(vrot), v_exp=np.zeros(radii.size), dispersion=disp,
                surface_brightness=np.ones(radii.size),
                **{k: np.full(radii.size, v) for k, v in geom.items()})


def _smooth_weight(smoothing, width, beam):
    """Weight of the smoothness penalty (:func:`fit3d.smoothness_rows`).  'auto': rho^4,
    rho = exp(-4 ln 2 (width / FWHM)^2) the beam's correlation between points one ring
    width apart (a Gaussian beam; common practice): 0.0625 for rings half a beam wide,
    where neighbours trade v_rot; 1.5e-5 at one beam, nothing.  Measured on the mocks:
    rho^2 (0.25) steadied the half-beam curve best (pull rms 0.85) but bent the steep inner
    rise of a poorly resolved disk by 11.6 km/s; rho^4 keeps that within 7 km/s and the
    half-beam pulls at rms 1.26."""
    if smoothing != "auto":
        return float(smoothing)
    rho = np.exp(-4 * np.log(2) * (width / beam) ** 2)
    return float(rho**4)


def _ring_free(n, expansion):
    free = [("v_rot", k) for k in range(n)] + [("dispersion", k) for k in range(n)]
    if expansion:
        free += [("v_exp", k) for k in range(n)]
    return free


def _stage2(prob, p, fixed, bar):
    """Per-ring PA and inclination with that ring's v_rot and dispersion."""
    n = prob.model.radii.size
    geom = {name: np.asarray(p[name], float).copy() for name in ("position_angle", "inclination")}
    errs = {name: np.full(n, np.nan) for name in geom}
    names = [nm for nm in ("position_angle", "inclination") if nm not in fixed]
    for k in bar(range(n), "rings 3d: stage 2"):
        free = [(nm, k) for nm in names] + [("v_rot", k), ("dispersion", k)]
        try:
            q, res, J = fit3d.fit_params(prob, p, free, max_nfev=15)
        except (ValueError, np.linalg.LinAlgError):
            continue
        cov = np.linalg.pinv(J.T @ J) * max(1.0, 2 * res.cost / max(J.shape[0] - len(free), 1))
        for j, nm in enumerate(names):
            geom[nm][k] = q[nm][k]
            errs[nm][k] = np.sqrt(cov[j, j])
    return geom, errs


def _smooth(mode, radii, geom, errs, glob):
    out = {}
    for name, vals in geom.items():
        if mode == "global":
            out[name] = np.full(radii.size, glob[name])
        elif mode == "rings":
            out[name] = vals
        elif mode == "polynomial":
            out[name] = polynomial(radii, vals, errs[name], 2)[0]
        else:
            out[name] = running_median(vals, errs[name])[0]
        bad = ~np.isfinite(out[name])
        out[name][bad] = glob[name]
    return out


def _final(prob, p, expansion, smooth, max_nfev=30):
    """Joint v_rot, dispersion (and v_exp) of every ring with the geometry held."""
    n = prob.model.radii.size
    free = _ring_free(n, expansion)
    q, res, J = fit3d.fit_params(prob, p, free, max_nfev=max_nfev, smooth=smooth)
    return q, res, J, free


def _halves(prob, p, free, x, J, penalty):
    """v_rot of the approaching and the receding half: each half refitted from the joint
    solution with the joint Jacobian's rows of that half (:func:`fit3d.chord_fit`)."""
    m = prob.model
    c, y, xpix = prob.idx
    gx, gy = np.median(p["x_center"]), np.median(p["y_center"])
    pa = np.deg2rad(np.median(p["position_angle"]))
    east = m.jac[0, 0] * (xpix - gx) + m.jac[0, 1] * (y - gy)
    north = m.jac[1, 0] * (xpix - gx) + m.jac[1, 1] * (y - gy)
    along = east * np.sin(pa) + north * np.cos(pa)  # > 0 on the receding half
    out = []
    for rows in (along < 0, along > 0):
        try:
            q = fit3d.chord_fit(prob, p, free, x, J, rows, penalty=penalty)
            out.append(np.asarray(q["v_rot"], float))
        except (ValueError, np.linalg.LinAlgError):
            out.append(np.full(m.radii.size, np.nan))
    return out


def _bootstrap(prob, p, best, nboot, seed, expansion, smooth, noise_sigma, bar):
    rng = np.random.default_rng(seed)
    n = prob.model.radii.size
    samples = []
    for _ in bar(range(nboot), "rings 3d: bootstrap"):
        fake = best + fit3d.correlated_noise(rng, prob.model, np.nan_to_num(noise_sigma))
        sub = fit3d.Problem(prob.model, fake, prob.mask, prob.weight,
                            fake.sum(axis=0) * abs(prob.model.dv), prob.footprint, prob.loss,
                            prob.normalisation)
        q, *_ = _final(sub, p, expansion, smooth)
        samples.append(np.r_[q["v_rot"], q["dispersion"], q["v_exp"]])
    arr = np.array(samples)
    std = np.std(arr, axis=0, ddof=1)
    return std[:n], std[n:2 * n], std[2 * n:]


def _given(center, position_angle, inclination, v_sys, meta):
    from kinemap.rings.stage import _center_pixels

    x0, y0 = _center_pixels(center, meta.wcs)
    g = {"x_center": x0, "y_center": y0,
         "position_angle": None if position_angle is None else float(to_value(position_angle, u.deg, name="position_angle")),
         "inclination": None if inclination is None else float(to_value(inclination, u.deg, name="inclination")),
         "v_sys": None if v_sys is None else float(to_value(v_sys, KMS, name="v_sys"))}
    kw = dict(center=center, position_angle=g["position_angle"], inclination=g["inclination"],
              v_sys=g["v_sys"], stages=(1,))
    return g, kw


def _fixed(fix):
    fixed = set(fix)
    if "center" in fixed:
        fixed |= {"x_center", "y_center"}
    return fixed


def _sky(cube):
    """Pixel Jacobian (arcsec), beam (major, minor FWHM arcsec, PA deg), pixel size."""
    jac = np.asarray(SkyGrid.from_wcs(cube.meta.wcs, shape=cube.shape[1:]).jacobian)
    b = cube.meta.beam
    beam = (b.major.to_value(u.arcsec), b.minor.to_value(u.arcsec), b.pa.to_value(u.deg))
    return jac, beam, float(np.sqrt(abs(np.linalg.det(jac))))


def run_fit(cube, *, noise, mask, center, position_angle, inclination, v_sys, distance,
            ring_width, radii, fix, stages, final_geometry, bootstrap, seed, expansion,
            scale_height, loss, channel_response, oversample, smoothing, surface_normalisation,
            progress):
    """The whole 3D fit (see :func:`kinemap.rings.stage3d.fit_rings_3d`)."""
    from kinemap.rings.stage3d import RingFit3D

    fix, stages = tuple(fix or ()), tuple(stages or (1, 2, 3))
    _check(cube, fix, stages, final_geometry, loss, bootstrap, smoothing, surface_normalisation)
    resp = check_response(channel_response)
    fixed = _fixed(fix)
    timings, clock = {}, time.perf_counter()

    def bar(it, desc):
        return tqdm(it, desc=desc, disable=None if progress else True, leave=False)

    data, m3, noise, mask = _data_and_mask(cube, noise, mask, resp)
    given, kw2d = _given(center, position_angle, inclination, v_sys, cube.meta)
    r2d, m2, m0, m1 = _first_guess(cube, noise, mask, kw2d, resp, progress)
    jac, beam, pix = _sky(cube)
    foot = m3.any(axis=0)
    dv = float(np.mean(np.diff(cube.velocity)))
    g2 = r2d.result.global_geometry
    given = _trusted_geometry(r2d, given, _shape_guess(
        m0, m1, foot, jac, beam, *(float(u.Quantity(g2[k]).value) for k in ("x_center", "y_center", "v_sys"))))
    p = _start(r2d, m2, np.zeros(1), foot, float(response_sigma(resp, dv)), given)
    g0 = {k: float(p[k][0]) for k in GEOM_PARAMS}
    rad, width = _radii(foot, jac, g0, np.sqrt(beam[0] * beam[1]), pix, ring_width, radii)
    p = _start(r2d, m2, rad, foot, float(response_sigma(resp, dv)), given)
    h = float(to_value(scale_height, u.arcsec, name="scale_height")) if scale_height else 0.0
    model = DiskModel(cube.shape, jac, cube.velocity, rad, width, beam=beam, response=resp,
                      scale_height=h, oversample=int(oversample))
    weight = np.where(np.isfinite(noise.sigma) & (noise.sigma > 0), 1.0 / noise.sigma, 0.0)
    prob = fit3d.Problem(model, data, m3, weight, data.sum(axis=0) * abs(dv), foot, loss,
                         surface_normalisation)
    # ring by ring, Sigma comes from moment 0 and its noise goes into the covariance; pixel
    # by pixel, the data's moment 0 scales the model directly (that path is not counted)
    sb_path = (lambda q: q if surface_normalisation == "rings" else None)
    p["surface_brightness"] = prob.surface_brightness(p)
    timings["first_guess"], clock = time.perf_counter() - clock, time.perf_counter()

    # stage 1: global geometry with every ring's kinematics
    gfree = [(k, None) for k in GEOM_PARAMS if k not in fixed]
    free1 = gfree + _ring_free(rad.size, expansion and "v_exp" not in fixed)
    smooth = _smooth_weight(smoothing, width, np.sqrt(beam[0] * beam[1]))
    p, res1, J1 = fit3d.fit_params(prob, p, free1, solve_sb=bool(gfree), max_nfev=40,
                                   smooth=smooth)
    cov1, _ = fit3d.covariance(prob, J1, res1.fun, n_free=len(free1), penalty=res1.penalty,
                               p=sb_path(p))
    glob = {k: float(np.median(p[k])) for k in GEOM_PARAMS}
    glob_err = {k: np.nan for k in GEOM_PARAMS}
    for j, (name, _) in enumerate(gfree):
        glob_err[name] = float(np.sqrt(cov1[j, j]))
    timings["stage1"], clock = time.perf_counter() - clock, time.perf_counter()

    # stage 2 and the smoothed geometry
    if 2 in stages and rad.size >= 3:
        geom2, err2 = _stage2(prob, p, fixed, bar)
        geom2["position_angle"] = unwrap_deg(geom2["position_angle"], glob["position_angle"])
        mode = final_geometry if 3 in stages else "rings"
        p.update(_smooth(mode, rad, geom2, err2, glob))
        p["surface_brightness"] = prob.surface_brightness(p)
    timings["stage2"], clock = time.perf_counter() - clock, time.perf_counter()

    # final pass: the errors
    free_exp = expansion and "v_exp" not in fixed
    p, res3, J3, free3 = _final(prob, p, free_exp, smooth)
    cov3, chi2 = fit3d.covariance(prob, J3, res3.fun, n_free=len(free3), penalty=res3.penalty,
                                  p=sb_path(p))
    err3 = np.sqrt(np.diag(cov3))
    n = rad.size
    f_vrot, f_disp = err3[:n], err3[n:2 * n]
    f_vexp = err3[2 * n:3 * n] if free_exp else np.full(n, np.nan)
    best = model.render(p)
    timings["stage3"], clock = time.perf_counter() - clock, time.perf_counter()
    v_app, v_rec = _halves(prob, p, free3, res3.x, J3, res3.penalty)
    timings["halves"], clock = time.perf_counter() - clock, time.perf_counter()
    if bootstrap:
        f_vrot, f_disp, bs_vexp = _bootstrap(prob, p, best, int(bootstrap), seed, free_exp,
                                             smooth, noise.sigma, bar)
        if free_exp:
            f_vexp = bs_vexp
    timings["bootstrap"], clock = time.perf_counter() - clock, time.perf_counter()

    table = _table(p, rad, width, beam, glob_err, f_vrot, f_disp, f_vexp, v_app, v_rec,
                   res3, J3, chi2, distance, bool(bootstrap))
    table.meta["settings"] = dict(stages=list(stages), fix=list(fix), final_geometry=final_geometry,
                                  bootstrap=int(bootstrap), expansion=bool(expansion),
                                  scale_height_arcsec=h, loss=loss, channel_response=resp,
                                  oversample=int(oversample), ring_width_arcsec=width,
                                  smoothing=float(smooth),
                                  surface_normalisation=surface_normalisation,
                                  surface_brightness_normalisation=_NORMALISATION[surface_normalisation])
    timings["model"] = time.perf_counter() - clock
    nfail = int(np.sum(np.asarray(table["status"]) != Status.OK))
    if nfail >= max(1, n // 4):
        warnings.warn(f"{nfail} of {n} rings of the 3D fit were not fitted cleanly (see the "
                      "'status' column)", FitWarning, stacklevel=3)
    geometry = {k: float(np.median(p[k])) for k in GEOM_PARAMS}
    geometry.update({k + "_err": v for k, v in glob_err.items()})
    return RingFit3D(table=table, model=best, residual=(data - best), data=data.astype(np.float32),
                     velocity=np.asarray(cube.velocity), rings_2d=r2d, meta=cube.meta, mask=m3,
                     geometry=geometry, settings=dict(table.meta["settings"]), timings=timings)


def _status(p, sb, j_cols_ok):
    n = sb.size
    st = np.full(n, int(Status.OK))
    disp = np.asarray(p["dispersion"])
    st[(disp <= fit3d._BOUNDS["dispersion"][0] + 1e-3)] = int(Status.AT_BOUND)
    st[~j_cols_ok] = int(Status.NO_DATA)
    st[sb <= 0] = int(Status.NO_DATA)
    return st


def _table(p, rad, width, beam, glob_err, f_vrot, f_disp, f_vexp, v_app, v_rec, res, J, chi2,
           distance, boot):
    n = rad.size
    vrot, disp = np.asarray(p["v_rot"], float), np.asarray(p["dispersion"], float)
    half = np.abs(v_rec - v_app) / 2
    vrot_err = np.sqrt(f_vrot**2 + np.nan_to_num(half) ** 2)
    ok_cols = np.abs(J[:, :n]).sum(axis=0) > 0
    status = _status(p, np.asarray(p["surface_brightness"]), ok_cols)
    bad = status == Status.NO_DATA
    t = Table()
    t["radius"] = rad * u.arcsec
    t["v_rot"] = np.where(bad, np.nan, vrot) * KMS
    t["v_rot_err"] = np.where(bad, np.nan, vrot_err) * KMS
    t["v_exp"] = np.asarray(p["v_exp"], float) * KMS
    t["v_exp_err"] = f_vexp * KMS
    for name in GEOM_PARAMS:
        vals = np.asarray(p[name], float)
        t[name] = (vals % 360.0 if name == "position_angle" else vals) * _UNITS[name]
    t["npoints"] = np.zeros(n, int)
    t["v_rot_approaching"] = v_app * KMS
    t["v_rot_receding"] = v_rec * KMS
    t["beam_smeared"] = rad < 2 * np.sqrt(beam[0] * beam[1])
    t["dispersion"] = np.where(bad, np.nan, disp) * KMS
    t["dispersion_err"] = np.where(bad, np.nan, f_disp) * KMS
    t["surface_brightness"] = np.asarray(p["surface_brightness"], float)
    ad = asymmetric_drift(rad, t["v_rot"].value, t["v_rot_err"].value, t["dispersion"].value,
                          f_disp, t["surface_brightness"].value)
    t["asymmetric_drift"] = ad["asymmetric_drift"] * KMS
    t["v_circ"] = ad["v_circ"] * KMS
    t["v_circ_err"] = ad["v_circ_err"] * KMS
    if distance is not None:
        r_kpc = physical_radius(rad, float(to_value(distance, u.Mpc, name="distance")))
        t["radius_kpc"] = r_kpc
        speed = np.where(np.isfinite(ad["v_circ"]), ad["v_circ"], t["v_rot"].value)
        t["mass_enclosed"] = dynamical_mass(speed, r_kpc).to(u.M_sun)
    t["status"] = status
    for name in GEOM_PARAMS:
        t[name + "_err"] = np.full(n, glob_err[name]) * _UNITS[name]
    t["v_rot_err_formal"] = f_vrot * KMS
    t["dispersion_err_formal"] = f_disp * KMS
    t.meta.update(
        ring_width=float(width), stage="final", model="3d", chi2_reduced=float(chi2),
        v_rot_err=("sqrt(random^2 + ((v_rot_receding - v_rot_approaching)/2)^2); random = "
                   + ("bootstrap over noise realisations" if boot else
                      "formal sandwich covariance for beam-correlated noise")),
        asymmetric_drift="V_A^2 = -R sigma^2 dln(Sigma sigma^2)/dR, ln(Sigma sigma^2) fitted "
                         "with a straight line in R; V_c^2 = v_rot^2 + V_A^2",
        status_codes="kinemap.status.Status: 0 OK, 2 AT_BOUND, 5 NO_DATA",
        conventions="PA east of north to the receding half of the major axis; inclination 0 "
                    "= face-on; surface_brightness face-on, cube unit x km/s")
    return t
