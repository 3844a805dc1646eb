"""Fitting the 3D disk model to a cube: the least-squares machinery (private to rings).

The cube is compared with :class:`kinemap.rings.disk3d.DiskModel` inside the signal mask,
each voxel weighted by 1 / (noise of its pixel).  Free parameters are either shared by
all rings (``(name, None)``: the global geometry) or belong to one ring (``(name, k)``).
The Jacobian columns of a ring's kinematics (v_rot, dispersion, v_exp) are exact
(:meth:`DiskModel.ring_gradients`); those of geometry are finite differences, a ring's
re-rendering only the annuli it touches (:meth:`DiskModel.render_rings`).  Either is
computed on the pixel box and channels the ring can reach after the beam: an outer ring
costs a part of a full model, an inner one almost nothing.  An optional smoothness
penalty on v_rot and dispersion between rings (:func:`smoothness_rows`) adds rows to
the residual.

The surface brightness is not a free parameter: for a given geometry the model's moment
0 is linear in the rings' Sigma_k, which are solved by non-negative least squares against
the data's moment 0 (ring-by-ring normalisation; see :meth:`Problem.surface_brightness`);
with pixel-by-pixel normalisation the model is also rescaled to the data's moment 0 in
every pixel (:meth:`Problem.pixel_scale`).

Errors: the covariance is the sandwich A^-1 B A^-1 with A = J^T J and B = J^T R J, R the
correlation of the noise between voxels: the beam's shape across pixels (an
interferometer image's noise is correlated like its beam; the same assumption as the
"independent pixels per beam" scaling of the 2D fit, which this makes exact for any
Jacobian) and the channel response's correlation along the spectrum; A holds the
penalty, B the noise that moment 0 passes to Sigma (:func:`covariance`).  It is
multiplied by the reduced chi^2 when that exceeds 1 (common practice).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft
from scipy.optimize import least_squares, nnls

from kinemap.rings.disk3d import DiskModel, beam_kernel
from kinemap.spectral.response import noise_correlation

__all__ = ["Problem", "fit_params", "chord_fit", "covariance", "STEPS"]

# finite-difference steps (small against any fitted change, large against round-off)
STEPS = {"x_center": 0.02, "y_center": 0.02, "position_angle": 0.05, "inclination": 0.05,
         "v_sys": 0.1, "v_rot": 0.1, "v_exp": 0.1, "dispersion": 0.05}
_EXACT = ("v_rot", "dispersion", "v_exp")  # columns from the derivative kernel
_SMOOTHED = ("v_rot", "dispersion")  # second differences penalised with 'smooth' 
_BOUNDS = {"inclination": (3.0, 88.0), "dispersion": (0.3, 300.0), "v_rot": (-2000.0, 2000.0),
           "v_exp": (-2000.0, 2000.0)}


@dataclass(eq=False)
class Problem:
    """The data side of a 3D fit: cube, voxels used, weights, moment 0."""

    model: DiskModel
    data: np.ndarray          # (nchan, ny, nx) float64, NaN replaced by 0
    mask: np.ndarray          # (nchan, ny, nx) bool: voxels compared
    weight: np.ndarray        # (ny, nx): 1 / noise sigma (0 where unknown)
    moment0: np.ndarray       # (ny, nx): data summed over all channels x |dv|
    footprint: np.ndarray     # (ny, nx) bool: pixels with any masked voxel
    loss: str = "chi2"
    normalisation: str = "rings"  # or "pixels": see pixel_scale

    def __post_init__(self):
        self.idx = np.nonzero(self.mask)
        self.w = self.weight[self.idx[1], self.idx[2]]
        self.d = self.data[self.idx] * self.w

    def restricted(self, keep2d) -> "Problem":
        """The same problem with only the pixels where ``keep2d`` (a half of the disk)."""
        return Problem(self.model, self.data, self.mask & keep2d[None], self.weight,
                       self.moment0, self.footprint & keep2d, self.loss, self.normalisation)

    def pixel_scale(self, cube):
        """Per-pixel factors that give the model cube the data's moment 0 (pixel-by-pixel
        normalisation: the model sets the line shapes, the data the intensity; common
        practice beside ring-by-ring).  None for ring-by-ring normalisation.  Pixels
        where the model has under 1e-3 of its peak moment 0 keep factor 1; a negative
        data moment 0 (noise) counts as 0."""
        if self.normalisation != "pixels":
            return None
        m0 = cube.sum(axis=0) * abs(self.model.dv)
        ok = self.footprint & (m0 > 1e-3 * max(float(m0.max()), 1e-300))
        scale = np.ones_like(m0)
        scale[ok] = np.maximum(self.moment0[ok], 0.0) / m0[ok]
        return scale

    def resid(self, cube, scale=None):
        scale = self.pixel_scale(cube) if scale is None else scale
        if scale is not None:
            return self.d - cube[self.idx] * (self.w * scale[self.idx[1], self.idx[2]])
        return self.d - cube[self.idx] * self.w

    def box_column(self, sub, box, chan0=0, scale=None):
        """Weighted values of a box cube ``sub`` (channels from ``chan0``) at the masked
        voxels (0 outside the box), times the pixel ``scale`` when given."""
        ys, xs = box
        c, y, x = self.idx
        inside = ((y >= ys.start) & (y < ys.stop) & (x >= xs.start) & (x < xs.stop)
                  & (c >= chan0) & (c < chan0 + sub.shape[0]))
        col = np.zeros(c.size)
        col[inside] = (sub[c[inside] - chan0, y[inside] - ys.start, x[inside] - xs.start]
                       * self.w[inside])
        if scale is not None:
            col *= scale[y, x]
        return col

    def surface_brightness(self, p):
        """Face-on Sigma per ring whose model moment 0 best matches the data's (NNLS over the
        mask's footprint, pixels weighted by their noise).

        Rings half a beam wide make this a deconvolution, so a weak penalty on the second
        difference of Sigma between rings (Tikhonov regularisation; common practice) keeps
        neighbouring rings from trading flux in an alternating pattern."""
        a, b = self._surface_system(p)
        sol, _ = nnls(a, b, maxiter=50 * a.shape[1])
        return sol

    def _surface_system(self, p):
        basis = self.model.surface_basis(p)
        fp = self.footprint
        w = self.weight[fp]
        a = (basis[:, fp] * w).T
        b = self.moment0[fp] * w
        n = basis.shape[0]
        if n >= 3:
            d2 = np.diff(np.eye(n), 2, axis=0)
            lam = 1e-3 * np.trace(a.T @ a) / n
            a = np.vstack([a, np.sqrt(lam) * d2])
            b = np.concatenate([b, np.zeros(n - 2)])
        return a, b

    def surface_gain(self, p, sb):
        """G = d Sigma / d b: how the solved Sigma follow the noise-weighted moment 0 ``b``
        of the footprint's pixels (the regularised least squares of the rings not held at
        0 by the non-negativity; those stay 0)."""
        a, _ = self._surface_system(p)
        n_fp = int(self.footprint.sum())
        gain = np.zeros((a.shape[1], n_fp))
        free = np.asarray(sb) > 0
        if free.any():
            af = a[:, free]
            gain[free] = np.linalg.pinv(af.T @ af) @ af[:n_fp].T
        return gain

    def surface_columns(self, p):
        """K: the weighted model at the masked voxels per unit Sigma of each ring (the
        model is linear in Sigma; ring k's hat function on the annuli it touches)."""
        model = self.model
        n = model.radii.size
        out = np.zeros((self.d.size, n))
        for k in range(n):
            e = np.zeros(n)
            e[k] = 1.0
            q = dict(p, surface_brightness=e)
            box = model.ring_box(q, k)
            sub, chan0 = model.render_rings(q, k, box)
            out[:, k] = self.box_column(sub, box, chan0)
        return out


def _get(p, name, k):
    v = np.asarray(p[name], float)
    return float(v[0] if k is None and v.ndim else (v if v.ndim == 0 else v[k]))


def _apply(p, free, x, solve_sb, prob):
    q = {key: (np.array(val, float) if np.ndim(val) else val) for key, val in p.items()}
    n = prob.model.radii.size
    for (name, k), val in zip(free, x):
        arr = np.broadcast_to(np.asarray(q.get(name, 0.0), float), (n,)).copy()
        if k is None:
            arr[:] = val
        else:
            arr[k] = val
        q[name] = arr
    if solve_sb:
        q["surface_brightness"] = prob.surface_brightness(q)
    return q


def _step(x, j, name, hi):
    h = STEPS.get(name, 1e-3)
    return h if x[j] + h <= hi[j] else -h


def _stepped(x, j, name, hi):
    xp = x.copy()
    xp[j] += _step(x, j, name, hi)
    return xp


def _ring_columns(prob, p, free, x, q, k, cols, hi, out, scale):
    """Jacobian columns of ring k's parameters, on the pixel box and channels ring k can
    reach: exact derivatives for its kinematics (:meth:`DiskModel.ring_gradients`), finite
    differences of the ring's own contribution for its geometry.  The surface brightness
    is held (it is re-solved between steps, not inside the Jacobian).  With pixel
    normalisation the columns take the trial's pixel ``scale`` (exact for the kinematics,
    which leave the model's moment 0 unchanged; the change of the scale with a ring's
    geometry is left out of its column)."""
    model = prob.model
    box = model.ring_box(q, k)
    ann = model.annuli(q)
    window = model.ring_window(ann, k)
    chan0 = model.window_channels(window)[0]
    kin = [j for j in cols if free[j][0] in _EXACT]
    if kin:
        grads = model.ring_gradients(q, k, box, window,
                                     expansion=any(free[j][0] == "v_exp" for j in kin))
        for j in kin:
            out[:, j] = -prob.box_column(grads[free[j][0]], box, chan0, scale)
    other = [j for j in cols if free[j][0] not in _EXACT]
    if other:
        base, _ = model.render_rings(q, k, box, window, ann)
        for j in other:
            qp = _apply(p, free, _stepped(x, j, free[j][0], hi), False, prob)
            qp["surface_brightness"] = q["surface_brightness"]
            sub, _ = model.render_rings(qp, k, box, window)
            out[:, j] = (-prob.box_column(sub - base, box, chan0, scale)
                         / _step(x, j, free[j][0], hi))


def _one_ring_resid(prob, p, free):
    """When every free parameter belongs to one ring k, the residual of a trial is the
    starting model's plus the change of ring k's own contribution on its pixel box (all
    channels: the trial may move the emission): a fraction of a whole model.  None
    otherwise."""
    rings = {k for _, k in free}
    if len(rings) != 1 or None in rings:
        return None
    (k,) = rings
    model = prob.model
    box = model.ring_box(p, k)
    window = (0, model._nchan_render())
    r_base = prob.resid(model.render(p))
    base, chan0 = model.render_rings(p, k, box, window)

    def resid(q):
        sub, _ = model.render_rings(q, k, box, window)
        return r_base - prob.box_column(sub - base, box, chan0)
    return resid


def smoothness_rows(free, J, weight):
    """Rows P of the smoothness penalty |P x|^2 on the second differences of v_rot and of
    the dispersion over consecutive free rings (Tikhonov regularisation; common
    practice).  A second difference is measured in units of the quantity's typical
    per-ring error from the data alone, 1 / sqrt(median_k (J^T J)_kk), so ``weight`` is
    the chi^2 a second difference of one such error costs.  Empty when ``weight`` is 0."""
    rows = []
    for name in _SMOOTHED:
        cols = sorted((k, j) for j, (nm, k) in enumerate(free) if nm == name and k is not None)
        ks = [k for k, _ in cols]
        if weight <= 0 or len(cols) < 3 or ks != list(range(ks[0], ks[0] + len(ks))):
            continue
        js = [j for _, j in cols]
        info = np.sum(J[:, js] ** 2, axis=0)
        if not np.any(info > 0):
            continue
        scale = np.sqrt(weight * np.median(info[info > 0]))
        for i in range(len(js) - 2):
            row = np.zeros(len(free))
            row[[js[i], js[i + 1], js[i + 2]]] = np.array([1.0, -2.0, 1.0]) * scale
            rows.append(row)
    return np.array(rows).reshape(-1, len(free))


def fit_params(prob: Problem, p: dict, free, *, solve_sb=False, max_nfev=40, smooth=0.0):
    """Least-squares fit of the parameters ``free`` (list of (name, ring or None)).

    Returns (parameters, least_squares result, weighted Jacobian at the solution).
    ``solve_sb`` re-solves the surface brightness for every trial geometry.  ``smooth``
    adds the penalty of :func:`smoothness_rows` (scaled by the Jacobian at the start and
    then held, so the objective is a fixed function); its rows are ``result.penalty``
    and ``result.fun`` holds the data's residuals only.
    """
    model = prob.model
    x0 = np.array([_get(p, name, k) for name, k in free])
    lo = np.array([_BOUNDS.get(name, (-np.inf, np.inf))[0] for name, _ in free])
    hi = np.array([_BOUNDS.get(name, (-np.inf, np.inf))[1] for name, _ in free])
    x0 = np.clip(x0, lo + 1e-6, hi - 1e-6)
    cache = {}
    one_ring = not solve_sb and prob.normalisation == "rings"
    resid = _one_ring_resid(prob, p, free) if one_ring else None
    if resid is None:
        def resid(q):
            cube = model.render(q)
            cache["scale"] = prob.pixel_scale(cube)
            return prob.resid(cube, cache["scale"])

    def fun(x):
        q = _apply(p, free, x, solve_sb, prob)
        r = resid(q)
        cache.update(x=x.copy(), q=q, r=r)
        return r

    def jac(x):
        if np.array_equal(cache.get("Jx"), x):
            return cache["J"]
        if "x" not in cache or not np.array_equal(cache["x"], x):
            fun(x)
        q, r0 = cache["q"], cache["r"]
        out = np.empty((r0.size, len(free)))
        by_ring = {}
        for j, (name, k) in enumerate(free):
            if k is None:
                qp = _apply(p, free, _stepped(x, j, name, hi), solve_sb, prob)
                out[:, j] = (prob.resid(model.render(qp)) - r0) / _step(x, j, name, hi)
            else:
                by_ring.setdefault(k, []).append(j)
        for k, cols in by_ring.items():
            _ring_columns(prob, p, free, x, q, k, cols, hi, out, cache.get("scale"))
        cache.update(J=out, Jx=x.copy())
        return out

    loss = "linear" if prob.loss == "chi2" else "soft_l1"
    scale = np.array([max(STEPS.get(name, 1e-3) * 20, 1e-3) for name, _ in free])
    # stop when a step lowers chi^2 by less than 0.1 (the parameters then move by well
    # under their 1-sigma errors; scipy's ftol is relative to the cost, chi^2 / 2)
    cost0 = 0.5 * float(np.sum(fun(x0) ** 2))
    ftol = float(np.clip(0.05 / max(cost0, 1e-30), 1e-10, 1e-4))
    pen = smoothness_rows(free, jac(x0), smooth) if smooth > 0 else np.zeros((0, len(free)))
    ndata = cache["r"].size
    res = least_squares(lambda x: np.concatenate([fun(x), pen @ x]), x0,
                        jac=lambda x: np.vstack([jac(x), pen]), bounds=(lo, hi), x_scale=scale,
                        loss=loss, max_nfev=max_nfev, xtol=1e-6, ftol=ftol, method="trf")
    q = _apply(p, free, res.x, solve_sb, prob)
    # the solver's last Jacobian is at its solution unless it stopped inside a step
    J = jac(res.x)
    res.fun = res.fun[:ndata]
    res.penalty = pen
    return q, res, J


def chord_fit(prob: Problem, p: dict, free, x0, J, rows, *, steps=3, penalty=None):
    """Refit ``free`` on a subset of the voxels (``rows`` of ``prob``'s residual, e.g. one
    half of the disk) starting from ``x0``, the solution on all voxels: Gauss-Newton steps
    with the Jacobian ``J`` of the full solution kept fixed (the chord method; it needs
    one model per step and no new Jacobian, and converges where the subset's solution is
    near the full one, as the two halves of a disk are).  ``penalty``: the full fit's
    smoothness rows, kept.  Returns the parameters."""
    lo = np.array([_BOUNDS.get(name, (-np.inf, np.inf))[0] for name, _ in free])
    hi = np.array([_BOUNDS.get(name, (-np.inf, np.inf))[1] for name, _ in free])
    jr = J[rows]
    pen = np.zeros((0, len(free))) if penalty is None else penalty
    a = jr.T @ jr + pen.T @ pen
    a += 1e-6 * np.diag(np.diag(a)) + 1e-12 * np.eye(a.shape[0])
    x = np.asarray(x0, float).copy()
    for _ in range(steps):
        q = _apply(p, free, x, False, prob)
        r = prob.resid(prob.model.render(q))[rows]
        x = np.clip(x - np.linalg.solve(a, jr.T @ r + pen.T @ (pen @ x)), lo, hi)
    return _apply(p, free, x, False, prob)


def covariance(prob: Problem, J, resid, *, n_free, penalty=None, p=None):
    """Sandwich covariance of the parameters from the weighted Jacobian ``J`` (see the
    module docstring); returns (cov, reduced chi^2).  With the smoothness ``penalty``
    rows P the estimator solves (J^T J + P^T P) dx = J^T r, so A = J^T J + P^T P while
    B (the noise) is unchanged: the penalty narrows the errors as it narrows the scatter
    of the fitted values (it adds no noise), and its bias is not in them.

    Given the parameters ``p`` (with the Sigma solved from the data's moment 0 and then
    held), the noise that moment 0 passed to Sigma is propagated too: the fit's gradient
    J^T r moves with the noise e as J^T (e_mask - K G s(e)), s the noise summed over all
    channels at the footprint's pixels (x |dv|), G = d Sigma / d b
    (:meth:`Problem.surface_gain`), K the model per unit Sigma
    (:meth:`Problem.surface_columns`); B is that vector's covariance under the noise
    correlation.  At a peak signal-to-noise of 20 this was the main part of the inner
    rings' missing error (tests/rings/test_rings3d_pulls.py)."""
    model = prob.model
    a = J.T @ J
    if penalty is not None and penalty.size:
        a = a + penalty.T @ penalty
    a_inv = np.linalg.pinv(a)
    u = None
    if p is not None:
        sb = np.asarray(p["surface_brightness"], float)
        u = (J.T @ prob.surface_columns(p)) @ prob.surface_gain(p, sb) * abs(model.dv)
    b = _noise_products(prob, J, u, model)
    cov = a_inv @ b @ a_inv
    dof = max(resid.size - n_free, 1)
    chi2 = float(resid @ resid) / dof
    return cov * max(1.0, chi2), chi2


def _noise_products(prob, J, u, model):
    """B = V^T R V with V_j the cube of parameter j's noise weights: J_j at the masked
    voxels, less u_j (the moment-0 path, per footprint pixel) in every channel; R the
    noise correlation (the beam's shape across pixels, the response's along channels)."""
    rho = noise_correlation(model.response)
    nchan, ny, nx = model.shape
    tf = None
    shape = (ny, nx)
    if model.beam is not None:
        m = model.margin
        shape = (sfft.next_fast_len(ny + 2 * m), sfft.next_fast_len(nx + 2 * m))
        k = beam_kernel(shape, *model.beam, model.jac)
        tf = sfft.rfft2(k / k.max())  # correlation 1 at zero lag, the beam's shape
    c, y, x = prob.idx
    fy, fx = np.nonzero(prob.footprint)
    n = J.shape[1]
    b = np.empty((n, n))
    for j in range(n):
        cube = np.zeros((nchan, *shape))
        cube[c, y, x] = J[:, j]
        if u is not None:
            cube[:, fy, fx] -= u[j][None, :]
        if tf is not None:
            cube = sfft.irfft2(sfft.rfft2(cube, axes=(1, 2), workers=-1) * tf, s=shape,
                               axes=(1, 2), workers=-1)
        if rho.size > 1:
            acc = cube.copy()
            for lag in range(1, rho.size):
                acc[lag:] += rho[lag] * cube[:-lag]
                acc[:-lag] += rho[lag] * cube[lag:]
            cube = acc
        b[:, j] = J.T @ cube[c, y, x]
        if u is not None:
            b[:, j] -= u @ cube[:, fy, fx].sum(axis=0)
    return 0.5 * (b + b.T)


def correlated_noise(rng, model: DiskModel, sigma2d):
    """One realisation of noise with the beam as spatial correlation and the response's
    channel correlation, scaled to ``sigma2d`` per pixel (for the bootstrap)."""
    nchan, ny, nx = model.shape
    extra = 2 if model.response == "hanning" else 0
    if model.beam is None:
        white = rng.standard_normal((nchan + extra, ny, nx))
    else:
        m = model.margin
        shape = (sfft.next_fast_len(ny + 2 * m), sfft.next_fast_len(nx + 2 * m))
        b = model.beam
        # white noise smoothed by beam / sqrt(2) has the beam as its correlation
        k = beam_kernel(shape, b[0] / np.sqrt(2), b[1] / np.sqrt(2), b[2], model.jac)
        white = rng.standard_normal((nchan + extra, *shape))
        white = sfft.irfft2(sfft.rfft2(white, axes=(1, 2)) * sfft.rfft2(k), s=shape,
                            axes=(1, 2))[:, m:m + ny, m:m + nx]
    if extra:
        white = 0.25 * white[:-2] + 0.5 * white[1:-1] + 0.25 * white[2:]
    white /= white.std()
    return white * sigma2d[None]
