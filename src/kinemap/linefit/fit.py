"""Array-level Gaussian line fitting of many spectra at once.

Model
-----
Each spectrum is modelled as a sum of Gaussian components plus an optional baseline
(:class:`~kinemap.linefit.LineModel`).  Component ``j`` lives on velocity axis ``a_j``
(channel-centre velocities in km/s, one axis per spectral line) and has amplitude ``A``,
centroid ``v0`` and intrinsic dispersion ``sigma``.  What a channel records is:

1. the instrument: a Gaussian instrumental profile of dispersion ``s_instr`` adds in
   quadrature, ``s_obs^2 = sigma^2 + s_instr^2``;
2. the channel response:

   * ``'tophat'`` (default): the profile averaged over the channel's velocity edges,
     ``A sqrt(2 pi) s_obs [Phi(z_hi) - Phi(z_lo)] / (v_hi - v_lo)`` with ``z = (v - v0) / s_obs``
     and ``Phi`` the normal CDF; edges are midpoints between channel centres, so
     non-uniform axes work (the two end channels get the spacing of their neighbour);
   * ``'hanning'``: the top-hat values convolved along channels with ``[1/4, 1/2, 1/4]``;
     the model is evaluated on one extra channel beyond each end of the band so the end
     channels are smoothed like all others (as a spectrometer smooths a longer spectrum);
   * ``'none'``: the profile sampled at the channel centre.

The **amplitude** ``A`` is the peak of the instrument-convolved Gaussian before channel
averaging; the integrated intensity is ``A sqrt(2 pi) s_obs`` (data unit x km/s) whatever the
channel response.  The reported dispersion is the intrinsic ``sigma`` (instrument and
channel response are in the model); ``s_obs`` is reported as ``observed_dispersion``.

Fitter
------
Levenberg-Marquardt (Levenberg 1944; Marquardt 1963) compiled with numba and run in
parallel over spectra, with an analytic Jacobian and box bounds by projection (trial points
are clipped onto the box; a parameter on a bound whose gradient points outward is frozen
for that iteration).  NaN channels are left out of chi2.  chi2 uses the per-spectrum noise
(1 sigma per channel) and, for correlated channels, the full banded noise covariance by
whitening with its banded Cholesky factor (generalised least squares): with
``response='hanning'`` the default channel correlation is that of white noise smoothed by
``[1/4, 1/2, 1/4]`` (rho1 = 2/3, rho2 = 1/6, see :func:`channel_noise_correlation`).  The
errors are ``sqrt(diag((J^T C^-1 J)^-1))``, not rescaled by the reduced chi2 unless
``scale_errors=True``.  For one component with white noise (the common case) the steps
near the minimum (Gauss-Newton decrement below 3) use the full Hessian of chi2 (Newton,
quadratic convergence; about 3.5 iterations per fit instead of 4.8); the convergence test
and the errors are the same on every path.  Each line is set to exactly 0 farther than 8
observed dispersions from its centre, where it is below 1.3e-14 of its peak.

Statuses (:class:`kinemap.status.Status`): ``NO_DATA`` (fewer finite channels than
parameters + 1, or noise not a positive number), ``MASKED`` (``mask`` False),
``TOO_FAINT`` (peak S/N below ``snr_threshold``; not fitted), ``OK``, ``AT_BOUND``
(converged with a parameter on a bound; values kept), ``NOT_CONVERGED`` (iteration limit)
and ``FAILED`` (non-finite model or singular covariance).  Spectra whose status is not
``OK``/``AT_BOUND`` get NaN values; no spectrum raises.
"""
from __future__ import annotations

import inspect
import math

import numpy as np

from kinemap.errors import KinemapError
from kinemap.status import Status
from kinemap.linefit import _kernels as K
from kinemap.linefit._axes import prepare_axes
from kinemap.linefit._compile import announce_compile
from kinemap.linefit._config import CORRELATION_FLOOR, Config, default_bounds, make_config
from kinemap.linefit._model import LineModel, as_model
from kinemap.linefit._result import LineFitResult

__all__ = ["fit_spectra", "fit_block", "initial_guess", "model_spectra", "model_block", "parameter_bounds"]

_SQRT2PI = math.sqrt(2.0 * math.pi)
ORDERS = ("velocity", "flux")
SEPARATION_UNITS = ("sigma", "channel")
COMPONENT_SNR_KINDS = ("noise", "error")


# ============================================================================ helpers
def _resolve_models(ncomp, baseline, model, max_components):
    if isinstance(ncomp, str):
        if ncomp != "auto":
            raise KinemapError(f"'ncomp' must be 1, 2, 3 or 'auto', got {ncomp!r}")
        if model is not None:
            raise KinemapError("'ncomp'='auto' works with independent components only; leave 'model' unset")
        if isinstance(max_components, bool) or max_components not in (2, 3):
            raise KinemapError(f"'max_components' must be 2 or 3, got {max_components!r}")
        return [LineModel.single(n, baseline=baseline) for n in range(1, max_components + 1)], True
    if model is not None and (ncomp != 1 or baseline != "none"):
        raise KinemapError("give either 'model' or 'ncomp'/'baseline', not both (the model carries its baseline)")
    return [as_model(model, ncomp, baseline)], False


def _as_data(data, name="data") -> np.ndarray:
    arr = np.asarray(data)
    if arr.ndim != 2:
        raise KinemapError(
            f"'{name}' must have shape (nspec, nchan), got shape {arr.shape}; use data[None, :] for one spectrum"
        )
    if not (np.issubdtype(arr.dtype, np.floating) or np.issubdtype(arr.dtype, np.integer)):
        raise KinemapError(f"'{name}' must hold real numbers, got dtype {arr.dtype}")
    return arr


def _as_noise(noise, nspec) -> np.ndarray:
    try:
        nz = np.asarray(noise, dtype=np.float64)
    except (TypeError, ValueError):
        raise KinemapError(f"'noise' must be a number or an array of numbers, got {type(noise).__name__}") from None
    if nz.ndim == 0:
        nz = np.full(nspec, float(nz))
    if nz.shape != (nspec,):
        raise KinemapError(f"'noise' must be a scalar or have shape ({nspec},) (one value per spectrum), got {nz.shape}")
    return nz


def _as_mask(mask, nspec):
    if mask is None:
        return None
    m = np.asarray(mask)
    if m.dtype != bool or m.shape != (nspec,):
        raise KinemapError(f"'mask' must be a boolean array of shape ({nspec},) (True = fit), got {m.dtype} {m.shape}")
    return m


def _per_spectrum(arr, nspec, npar, name):
    """(npar,) or (nspec, npar) float array or None."""
    if arr is None:
        return None
    try:
        a = np.asarray(arr, dtype=np.float64)
    except (TypeError, ValueError):
        raise KinemapError(f"'{name}' must be an array of numbers") from None
    if a.shape not in ((npar,), (nspec, npar)):
        raise KinemapError(f"'{name}' must have shape ({npar},) or ({nspec}, {npar}), got {a.shape}")
    return a


def parameter_bounds(velocity, *, ncomp=1, baseline: str = "none", model: LineModel | None = None,
                     lower=None, upper=None, nspec: int | None = None,
                     sigma_min_fraction: float = 0.25):
    """Box bounds used by the fitter: the defaults with any finite user values put in.

    Parameters
    ----------
    velocity : array-like or Quantity, shape (nchan,) or (naxes, nchan)
        Channel-centre velocities (km/s if plain numbers).
    ncomp, baseline, model
        The model, as in :func:`fit_spectra` (``ncomp`` 1-3).
    lower, upper : array-like, shape (npar,) or (nspec, npar), optional
        User bounds; NaN entries keep the default.
    nspec : int, optional
        Broadcast the result to (nspec, npar).
    sigma_min_fraction : float
        Lower dispersion bound as a fraction of the channel width (default 0.25).

    Returns
    -------
    lower, upper : ndarray
        Shape (npar,) or (nspec, npar).  Defaults: amplitude [0, inf); velocity inside the
        band (of every line sharing it); dispersion [sigma_min_fraction x channel width,
        band width]; baseline unbounded.
    """
    models, auto = _resolve_models(ncomp, baseline, model, 3)
    if auto:
        raise KinemapError("'ncomp' must be 1, 2 or 3 here; bounds for 'auto' are those of the 1-component model")
    mdl = models[0]
    axes = prepare_axes(velocity, naxes=mdl.naxes)
    return _bounds(axes, mdl, lower, upper, nspec, sigma_min_fraction)


def _bounds(axes, mdl, lower, upper, nspec, sigma_min_fraction):
    lo0, hi0 = default_bounds(axes, mdl, sigma_min_fraction=sigma_min_fraction)
    n = 1 if nspec is None else nspec
    lo = np.broadcast_to(lo0, (n, mdl.npar)).copy()
    hi = np.broadcast_to(hi0, (n, mdl.npar)).copy()
    for arr, out, name in ((lower, lo, "lower"), (upper, hi, "upper")):
        a = _per_spectrum(arr, n, mdl.npar, name)
        if a is not None:
            a = np.broadcast_to(a, out.shape)
            good = ~np.isnan(a)
            out[good] = a[good]
    if np.any(lo > hi):
        k = int(np.argwhere(lo > hi)[0][1])
        raise KinemapError(
            f"'lower' exceeds 'upper' for parameter '{mdl.param_names[k]}'; give lower <= upper"
        )
    for k, role in enumerate(mdl.roles):
        if role == 2 and np.any(~(lo[:, k] > 0)):
            raise KinemapError(
                f"the lower bound of '{mdl.param_names[k]}' must be > 0 km/s (a zero width has no derivative); "
                "give a small positive value"
            )
    if nspec is None:
        return lo[0], hi[0]
    return lo, hi


def _expand_auto_bounds(arr, n, nbase):
    """1-component bounds (3 + nbase,) or (nspec, 3 + nbase) -> n-component layout."""
    if arr is None:
        return None
    a = np.asarray(arr, dtype=np.float64)
    if a.shape[-1] != 3 + nbase:
        raise KinemapError(
            f"with ncomp='auto', 'lower'/'upper' are given for one component ({3 + nbase} values: "
            f"amplitude, velocity, dispersion{', baseline' * (nbase > 0)}{', slope' * (nbase > 1)}), got {a.shape[-1]}"
        )
    line = a[..., :3]
    return np.concatenate([line] * n + [a[..., 3:]], axis=-1)


def _derived(mdl: LineModel, params, cov, si):
    """Per-component velocity, dispersion, observed dispersion, amplitude, integrated (+errors)."""
    cax, cia, csc, civ, cis, _, _ = mdl.arrays()
    with np.errstate(invalid="ignore"):
        amp = csc * params[:, cia]
        amp_e = csc * np.sqrt(cov[:, cia, cia])
        v = params[:, civ]
        v_e = np.sqrt(cov[:, civ, civ])
        sg = params[:, cis]
        sg_e = np.sqrt(cov[:, cis, cis])
        so = np.sqrt(sg**2 + si**2)
        so_e = sg / so * sg_e
        integ = amp * _SQRT2PI * so
        dA = csc * _SQRT2PI * so
        dS = amp * _SQRT2PI * sg / so
        var = dA**2 * cov[:, cia, cia] + 2 * dA * dS * cov[:, cia, cis] + dS**2 * cov[:, cis, cis]
        integ_e = np.sqrt(np.maximum(var, 0.0))
        integ_e[np.isnan(var)] = np.nan
    return {
        "velocity": v, "velocity_err": v_e,
        "dispersion": sg, "dispersion_err": sg_e,
        "observed_dispersion": so, "observed_dispersion_err": so_e,
        "amplitude": amp, "amplitude_err": amp_e,
        "integrated": integ, "integrated_err": integ_e,
    }


_COMP_KEYS = ("velocity", "velocity_err", "dispersion", "dispersion_err", "observed_dispersion",
              "observed_dispersion_err", "amplitude", "amplitude_err", "integrated", "integrated_err")


def _order(out, mdl: LineModel, order):
    """Sort the components of independent-component fits by velocity or by flux (in place)."""
    n = mdl.ncomp
    if not mdl.is_single or n < 2:
        return
    if order == "velocity":
        key = out["velocity"]
    else:
        key = -out["integrated"]
    key = np.where(np.isnan(key), np.inf, key)
    idx = np.argsort(key, axis=1, kind="stable")
    for name in _COMP_KEYS:
        out[name] = np.take_along_axis(out[name], idx, axis=1)
    cols = (3 * idx[:, :, None] + np.arange(3)[None, None, :]).reshape(idx.shape[0], 3 * n)
    for name in ("params", "errors"):
        arr = out[name]
        arr[:, : 3 * n] = np.take_along_axis(arr[:, : 3 * n], cols, axis=1)


def _fit_batch(cfg: Config, mdl: LineModel, y, noise, lo, hi, p0, prestat_in, order):
    """Guess + fit + derived quantities for one batch (float64 (nb, nchan) data)."""
    nb, nchan = y.shape
    npar = mdl.npar
    cax, cia, csc, civ, cis, roles, bkind = mdl.arrays()
    ax = cfg.axes
    s2 = cfg.instrument_sigma**2
    p0g = np.empty((nb, npar))
    peak = np.empty(nb)
    nfin = np.empty(nb, dtype=np.int64)
    announce_compile()
    K.guess_kernel(y, noise, ax.centres, ax.channel_width, cax, cia, csc, civ, cis, roles,
                   mdl.n_line_params, bkind, s2, cfg.resp_var, lo, hi, cfg.split_below, p0g, peak, nfin)
    if p0 is not None:
        good = ~np.isnan(p0)
        p0g[good] = p0[good]
    prestat = np.zeros(nb, dtype=np.int64)
    bad_noise = ~(np.isfinite(noise) & (noise > 0))
    too_faint = ~(peak >= cfg.snr_threshold)
    prestat[too_faint] = Status.TOO_FAINT
    prestat[(nfin < npar + 1) | bad_noise] = Status.NO_DATA
    if prestat_in is not None:
        keep = prestat_in != 0
        prestat[keep] = prestat_in[keep]
    params = np.empty((nb, npar))
    cov = np.empty((nb, npar, npar))
    chi2 = np.empty(nb)
    nfit = np.empty(nb, dtype=np.int64)
    neff = np.empty(nb)
    status = np.empty(nb, dtype=np.int64)
    niter = np.empty(nb, dtype=np.int64)
    K.fit_kernel(y, noise, p0g, lo, hi, prestat, ax.centres, ax.edges_ext, ax.inv_width_ext, cax, cia, csc, civ, cis,
                 mdl.n_line_params, bkind, s2, cfg.resp_code, cfg.rho[0], cfg.rho[1],
                 _floor(cfg), cfg.max_iter, cfg.tolerance, params, cov, chi2, nfit, neff, status, niter)
    # with correlated channels the expected chi2 of pure noise is the effective number of
    # channels tr(R'^-1 R) (a little below n_channels because of the white floor)
    dof = neff - npar
    with np.errstate(invalid="ignore", divide="ignore"):
        chi2_red = np.where(dof > 0, chi2 / np.maximum(dof, 1), np.nan)
        bic = chi2 + npar * np.log(np.maximum(nfit, 1))
    if cfg.scale_errors:
        cov = cov * chi2_red[:, None, None]
    with np.errstate(invalid="ignore"):
        errors = np.sqrt(np.einsum("sii->si", cov))
    out = {"params": params, "errors": errors, "status": status, "n_iter": niter, "n_channels": nfit,
           "chi2": chi2, "chi2_reduced": chi2_red, "bic": bic, "peak_snr": peak}
    out.update(_derived(mdl, params, cov, cfg.instrument_sigma))
    bad = ~np.isin(status, (Status.OK, Status.AT_BOUND))
    for name in ("params", "errors", "chi2", "chi2_reduced", "bic") + _COMP_KEYS:
        out[name][bad] = np.nan
    out["ncomp"] = np.where(bad, 0, mdl.ncomp)
    _order(out, mdl, order)
    return out


def _floor(cfg):
    return CORRELATION_FLOOR if (cfg.rho[0] != 0 or cfg.rho[1] != 0) else 0.0


def _select(cands, models, noise, axes, *, min_separation, separation_unit, min_component_snr, component_snr):
    """Choose per spectrum the candidate with the lowest BIC among the acceptable ones."""
    nb = noise.shape[0]
    best = np.zeros(nb, dtype=np.int64)
    best_bic = np.full(nb, np.inf)
    for i, (out, mdl) in enumerate(zip(cands, models)):
        st = out["status"]
        if mdl.ncomp == 1:
            ok = np.isin(st, (Status.OK, Status.AT_BOUND))
        else:
            ok = st == Status.OK
            v = out["velocity"]
            so = out["observed_dispersion"]
            with np.errstate(invalid="ignore"):
                if separation_unit == "sigma":
                    scale = np.maximum(so[:, :, None], so[:, None, :])
                else:
                    scale = axes.channel_width[0]
                sep = np.abs(v[:, :, None] - v[:, None, :]) / scale
                iu = np.triu_indices(mdl.ncomp, 1)
                ok &= np.all(sep[:, iu[0], iu[1]] >= min_separation, axis=1)
                if component_snr == "noise":
                    snr = out["amplitude"] / noise[:, None]
                else:
                    snr = out["amplitude"] / out["amplitude_err"]
                ok &= np.all(snr >= min_component_snr, axis=1)
        bic = np.where(ok, out["bic"], np.inf)
        take = bic < best_bic
        best[take] = i
        best_bic[take] = bic[take]
    return best


def _assemble_auto(cands, models, best):
    """Put the chosen candidate of each spectrum into the layout of the largest model."""
    big = models[-1]
    nb = best.shape[0]
    nmax = big.ncomp
    nbase = big.npar - 3 * nmax
    out = {
        "params": np.full((nb, big.npar), np.nan),
        "errors": np.full((nb, big.npar), np.nan),
    }
    for key in _COMP_KEYS:
        out[key] = np.full((nb, nmax), np.nan)
    for key in ("status", "n_iter", "n_channels", "ncomp"):
        out[key] = np.zeros(nb, dtype=np.int64)
    for key in ("chi2_reduced", "bic", "peak_snr"):
        out[key] = np.full(nb, np.nan)
    for i, (c, mdl) in enumerate(zip(cands, models)):
        sel = best == i
        if not np.any(sel):
            continue
        n = mdl.ncomp
        for key in ("params", "errors"):
            out[key][sel, : 3 * n] = c[key][sel, : 3 * n]
            if nbase:
                out[key][sel, 3 * nmax:] = c[key][sel, 3 * n:]
        for key in _COMP_KEYS:
            out[key][sel, :n] = c[key][sel]
        for key in ("status", "n_channels", "ncomp", "chi2_reduced", "bic"):
            out[key][sel] = c[key][sel]
    # iterations: total over all candidate fits; peak S/N from the first candidate
    out["n_iter"] = sum(c["n_iter"] for c in cands)
    out["peak_snr"] = cands[0]["peak_snr"]
    out["n_channels"] = cands[0]["n_channels"]
    return out


# ============================================================================ public API
def fit_spectra(
    data,
    noise,
    velocity,
    *,
    ncomp: int | str = 1,
    baseline: str = "none",
    model: LineModel | None = None,
    instrument_sigma=0.0,
    response: str = "tophat",
    noise_correlation=None,
    p0=None,
    lower=None,
    upper=None,
    mask=None,
    snr_threshold: float = 3.0,
    max_iter: int = 200,
    tolerance: float = 1e-8,
    scale_errors: bool = False,
    order: str = "velocity",
    max_components: int = 3,
    min_separation: float = 1.0,
    separation_unit: str = "sigma",
    min_component_snr: float = 3.0,
    component_snr: str = "noise",
    sigma_min_fraction: float = 0.25,
    batch_size: int = 4096,
    progress=None,
) -> LineFitResult:
    """Fit Gaussian components to many spectra at once.

    Parameters
    ----------
    data : array-like, shape (nspec, nchan)
        Spectra (any real dtype; float32 is fine, each batch is converted to float64).
        NaN channels are ignored.  Not modified.
    noise : float or array-like, shape (nspec,)
        1-sigma noise per channel of each spectrum as the data stand (for Hanning-smoothed
        data: the noise of the smoothed channels, e.g. measured in line-free channels),
        data units.  Spectra with a non-finite or non-positive noise get ``NO_DATA``.
    velocity : array-like or Quantity, shape (nchan,) or (naxes, nchan)
        Channel-centre velocities (km/s if plain numbers); one row per line axis.
    ncomp : {1, 2, 3, 'auto'}
        Number of independent components of one line.  ``'auto'`` fits 1 to
        ``max_components`` components and keeps, per spectrum, the acceptable fit with the
        lowest BIC = chi2 + k ln n (Schwarz 1978; n finite channels).  A candidate with 2 or
        more components is acceptable only if its status is OK, every pair of components
        is at least ``min_separation`` apart (in units of the larger observed dispersion, or
        of the channel width with ``separation_unit='channel'``) and every component has
        amplitude / noise (``component_snr='noise'``) or amplitude / its error (``'error'``)
        of at least ``min_component_snr``.
    baseline : {'none', 'constant', 'linear'}
        Baseline of the independent-component model.
    model : LineModel, optional
        A general (e.g. tied multi-line) model instead of ``ncomp``/``baseline``.
    instrument_sigma : float or Quantity
        Gaussian instrumental dispersion (km/s), may be 0.
    response : {'tophat', 'hanning', 'none'}
        Channel response, see the module docstring.
    noise_correlation : {None, 'none', 'hanning'} or (rho1[, rho2])
        Correlation of the noise between adjacent channels.  ``None`` means ``'hanning'``
        (rho1 = 2/3, rho2 = 1/6) when ``response='hanning'``, else ``'none'``.  Correlated
        noise enters chi2 through the banded covariance (generalised least squares), with a
        white floor of 0.1 per cent of the variance (see ``_config.CORRELATION_FLOOR``).
    p0 : array-like, shape (npar,) or (nspec, npar), optional
        Starting parameters; NaN entries (or ``None``) use :func:`initial_guess`.  Not
        allowed with ``ncomp='auto'``.
    lower, upper : array-like, shape (npar,) or (nspec, npar), optional
        Box bounds; NaN entries keep the defaults of :func:`parameter_bounds`.  With
        ``ncomp='auto'`` give them for one component (amplitude, velocity, dispersion,
        baseline...); they apply to every component.
    mask : bool array, shape (nspec,), optional
        False for spectra to skip (status ``MASKED``).
    snr_threshold : float
        Spectra whose baseline-subtracted peak is below ``snr_threshold * noise`` are not
        fitted (``TOO_FAINT``).  On pure white noise the single-channel peak exceeds 3 sigma
        with probability 1 - Phi(3)^nchan (16 per cent for 128 channels), so a threshold of 3
        lets some noise spectra through; their fits usually hit the amplitude bound or fail
        the component S/N test.
    max_iter : int
        Iteration limit (``NOT_CONVERGED`` beyond).
    tolerance : float
        Convergence when the Gauss-Newton decrement g^T A^-1 g (chi2 units, i.e. the squared
        distance to the minimum in error-ellipse units) is below
        ``tolerance * max(1, chi2_reduced)``; the default 1e-8 puts the parameters within
        1e-4 of their error bar from the minimum.
    scale_errors : bool
        Multiply the covariance by the reduced chi2 (off by default: errors follow the given
        noise).
    order : {'velocity', 'flux'}
        Order of independent components: increasing velocity or decreasing integrated
        intensity.  Tied models keep the order of their components.
    max_components, min_separation, separation_unit, min_component_snr, component_snr
        Options of ``ncomp='auto'`` (see above).
    sigma_min_fraction : float
        Default lower bound of the dispersion as a fraction of the channel width.
    batch_size : int
        Spectra per batch; temporary memory is about
        ``batch_size * (nchan + npar^2) * 8 bytes`` plus the outputs.
    progress : callable, optional
        Called as ``progress(n)`` after each batch with the number of spectra just done
        (e.g. ``tqdm.update``).

    Returns
    -------
    LineFitResult
        Arrays with one row per spectrum (``spatial_shape == (nspec,)``).

    Notes
    -----
    Failed spectra never raise: they get a status code and NaN values.  Bad arguments raise
    :class:`~kinemap.errors.KinemapError`.
    """
    arr = _as_data(data)
    nspec, nchan = arr.shape
    return _fit_core(arr, noise, velocity, (nspec,), ncomp=ncomp, baseline=baseline, model=model,
                     instrument_sigma=instrument_sigma, response=response,
                     noise_correlation=noise_correlation, p0=p0, lower=lower, upper=upper, mask=mask,
                     snr_threshold=snr_threshold, max_iter=max_iter, tolerance=tolerance,
                     scale_errors=scale_errors, order=order, max_components=max_components,
                     min_separation=min_separation, separation_unit=separation_unit,
                     min_component_snr=min_component_snr, component_snr=component_snr,
                     sigma_min_fraction=sigma_min_fraction, batch_size=batch_size, progress=progress)


def _fit_core(arr, noise, velocity, spatial_shape, *, ncomp, baseline, model, instrument_sigma, response,
              noise_correlation, p0, lower, upper, mask, snr_threshold, max_iter, tolerance, scale_errors,
              order, max_components, min_separation, separation_unit, min_component_snr, component_snr,
              sigma_min_fraction, batch_size, progress):
    nspec, nchan = arr.shape
    models, auto = _resolve_models(ncomp, baseline, model, max_components)
    if order not in ORDERS:
        raise KinemapError(f"'order' must be one of {', '.join(ORDERS)}, got {order!r}")
    if separation_unit not in SEPARATION_UNITS:
        raise KinemapError(f"'separation_unit' must be one of {', '.join(SEPARATION_UNITS)}, got {separation_unit!r}")
    if component_snr not in COMPONENT_SNR_KINDS:
        raise KinemapError(f"'component_snr' must be one of {', '.join(COMPONENT_SNR_KINDS)}, got {component_snr!r}")
    for val, name in ((min_separation, "min_separation"), (min_component_snr, "min_component_snr")):
        if not (isinstance(val, (int, float, np.number)) and np.isfinite(val) and val >= 0):
            raise KinemapError(f"'{name}' must be a number >= 0, got {val!r}")
    if isinstance(batch_size, bool) or not isinstance(batch_size, (int, np.integer)) or batch_size < 1:
        raise KinemapError(f"'batch_size' must be a positive integer, got {batch_size!r}")
    cfg = make_config(velocity, nchan, models[-1], instrument_sigma=instrument_sigma, response=response,
                      noise_correlation=noise_correlation, snr_threshold=snr_threshold, max_iter=max_iter,
                      tolerance=tolerance, scale_errors=scale_errors, sigma_min_fraction=sigma_min_fraction)
    nz = _as_noise(noise, nspec)
    msk = _as_mask(mask, nspec)
    if auto:
        if p0 is not None:
            raise KinemapError("'p0' cannot be used with ncomp='auto'; fix ncomp or leave 'p0' unset")
        nbase = models[0].npar - 3
        bounds = [_bounds(cfg.axes, m, _expand_auto_bounds(lower, m.ncomp, nbase),
                          _expand_auto_bounds(upper, m.ncomp, nbase), nspec, sigma_min_fraction) for m in models]
        p0a = None
    else:
        bounds = [_bounds(cfg.axes, models[0], lower, upper, nspec, sigma_min_fraction)]
        p0a = _per_spectrum(p0, nspec, models[0].npar, "p0")
        if p0a is not None:
            p0a = np.broadcast_to(p0a, (nspec, models[0].npar))
    big = models[-1]
    res = {
        "params": np.full((nspec, big.npar), np.nan),
        "errors": np.full((nspec, big.npar), np.nan),
    }
    for key in _COMP_KEYS:
        res[key] = np.full((nspec, big.ncomp), np.nan)
    for key, dt in (("status", np.int8), ("ncomp", np.int8), ("n_iter", np.int32), ("n_channels", np.int32)):
        res[key] = np.zeros(nspec, dtype=dt)
    for key in ("chi2_reduced", "bic", "peak_snr"):
        res[key] = np.full(nspec, np.nan)
    for i0 in range(0, nspec, batch_size):
        sl = slice(i0, min(nspec, i0 + batch_size))
        y = np.ascontiguousarray(arr[sl], dtype=np.float64)
        nzb = np.ascontiguousarray(nz[sl])
        pre = None
        if msk is not None:
            pre = np.where(msk[sl], 0, int(Status.MASKED)).astype(np.int64)
        if not auto:
            p0b = None if p0a is None else np.ascontiguousarray(p0a[sl])
            out = _fit_batch(cfg, models[0], y, nzb, np.ascontiguousarray(bounds[0][0][sl]),
                             np.ascontiguousarray(bounds[0][1][sl]), p0b, pre, order)
        else:
            cands = []
            for m, (lo, hi) in zip(models, bounds):
                c = _fit_batch(cfg, m, y, nzb, np.ascontiguousarray(lo[sl]), np.ascontiguousarray(hi[sl]),
                               None, pre, order)
                cands.append(c)
                if pre is None:
                    # spectra not fitted with one component are not fitted with more
                    pre = np.where(np.isin(c["status"], (Status.TOO_FAINT, Status.NO_DATA, Status.MASKED)),
                                   c["status"], 0).astype(np.int64)
            best = _select(cands, models, nzb, cfg.axes, min_separation=min_separation,
                           separation_unit=separation_unit, min_component_snr=min_component_snr,
                           component_snr=component_snr)
            out = _assemble_auto(cands, models, best)
        for key in res:
            res[key][sl] = out[key]
        if progress is not None:
            progress(sl.stop - sl.start)
    return LineFitResult(
        params=res["params"], errors=res["errors"], param_names=big.param_names, status=res["status"],
        ncomp=res["ncomp"], n_iter=res["n_iter"], n_channels=res["n_channels"],
        chi2_reduced=res["chi2_reduced"], bic=res["bic"], peak_snr=res["peak_snr"],
        velocity=res["velocity"], velocity_err=res["velocity_err"],
        dispersion=res["dispersion"], dispersion_err=res["dispersion_err"],
        observed_dispersion=res["observed_dispersion"],
        observed_dispersion_err=res["observed_dispersion_err"],
        amplitude=res["amplitude"], amplitude_err=res["amplitude_err"],
        integrated=res["integrated"], integrated_err=res["integrated_err"],
        model=big, instrument_sigma=cfg.instrument_sigma, response=cfg.response,
        spatial_shape=tuple(spatial_shape),
    )


def _block_maps(arr, nspec, name):
    """(k, *spatial) maps or (k,) vectors -> (nspec, k) or (k,)."""
    if arr is None:
        return None
    a = np.asarray(arr, dtype=np.float64)
    if a.ndim <= 1:
        return a
    return a.reshape(a.shape[0], -1).T if a[0].size == nspec else a


def fit_block(block, noise, velocity, *, mask=None, p0=None, lower=None, upper=None, **options) -> LineFitResult:
    """Fit every spectrum of a cube block ``(nchan, ny, nx)`` (or ``(nchan, n)``).

    The block is processed in batches of ``batch_size`` spectra (transposed one batch at a
    time), so temporary memory stays bounded; call it once per spatial block of a cube.

    Parameters
    ----------
    block : array-like, shape (nchan, ny, nx) or (nchan, n)
        Data in the cube's (spectral, y, x) order; NaN = no data.  Not modified.
    noise : float or array-like, shape (ny, nx)
        1-sigma channel noise of each spectrum (data units).
    velocity : array-like or Quantity, shape (nchan,) or (naxes, nchan)
        Channel-centre velocities, km/s if plain numbers.
    mask : bool array, shape (ny, nx), optional
        False where not to fit (status ``MASKED``).
    p0, lower, upper : optional
        Per-parameter vectors (npar,) or maps (npar, ny, nx).
    **options
        Any keyword of :func:`fit_spectra` (ncomp, baseline, model, instrument_sigma,
        response, snr_threshold, batch_size, ...).

    Returns
    -------
    LineFitResult
        With ``spatial_shape == (ny, nx)``; ``result.maps()`` gives (k, ny, nx) arrays.
    """
    arr = np.asarray(block)
    if arr.ndim not in (2, 3):
        raise KinemapError(f"'block' must have shape (nchan, ny, nx) or (nchan, n), got shape {arr.shape}")
    nchan = arr.shape[0]
    spatial = arr.shape[1:]
    nspec = int(np.prod(spatial))
    flat = arr.reshape(nchan, nspec).T  # a view; batches are copied one at a time
    nz = np.asarray(noise, dtype=np.float64)
    if nz.ndim != 0:
        if nz.shape != spatial:
            raise KinemapError(f"'noise' must be a scalar or have the block's spatial shape {spatial}, got {nz.shape}")
        nz = nz.reshape(nspec)
    if mask is not None:
        mk = np.asarray(mask)
        if mk.shape != spatial or mk.dtype != bool:
            raise KinemapError(f"'mask' must be a boolean array of shape {spatial} (True = fit), got {mk.dtype} {mk.shape}")
        mask = mk.reshape(nspec)
    _as_data(flat, "block")
    return _fit_core(flat, nz, velocity, spatial, mask=mask, p0=_block_maps(p0, nspec, "p0"),
                     lower=_block_maps(lower, nspec, "lower"), upper=_block_maps(upper, nspec, "upper"),
                     **_fit_defaults(options))


def _fit_defaults(options):
    sig = inspect.signature(fit_spectra)
    allowed = {k: v.default for k, v in sig.parameters.items() if v.kind == inspect.Parameter.KEYWORD_ONLY}
    for k in ("p0", "lower", "upper", "mask"):
        allowed.pop(k)
    unknown = set(options) - set(allowed)
    if unknown:
        raise KinemapError(f"unknown option {sorted(unknown)[0]!r}; see kinemap.linefit.fit_spectra for the options")
    allowed.update(options)
    return allowed


def initial_guess(data, noise, velocity, *, ncomp: int = 1, baseline: str = "none", model: LineModel | None = None,
                  instrument_sigma=0.0, response: str = "tophat", lower=None, upper=None,
                  sigma_min_fraction: float = 0.25) -> np.ndarray:
    """Starting parameters from peaks and windowed moments, vectorised over spectra.

    Baseline first: the median (constant) or a line through the medians of the outer
    quarters of the channels (linear).  Then, for each velocity parameter in order of first
    use: the velocity at which the lines sharing it have the largest summed residual
    (baseline-subtracted, smoothed with [1/4, 1/2, 1/4] so single-channel noise spikes do
    not win; for one line simply its peak channel), refined by the first moment over the
    contiguous channels above ``max(noise, 0.2 * peak)``; amplitude = residual at that
    velocity / the component's scale; dispersion from the second moment over the same
    window corrected for the truncation of a Gaussian at that level, minus the
    channel-response variance (dv^2/12 for top-hat, + dv^2/2 for Hanning) and the
    instrument.  With a single velocity parameter, a parabola fitted to ln(data) around the
    peak with weights data^2 (Guo 2011) replaces the moments when it succeeds: it lands
    closer to the optimum.  The guessed components are subtracted before the next velocity
    parameter is placed, so 2-3 components go to successive residual peaks; when the
    residual peak is below 2 noise, the extra component is placed half a dispersion to the
    side of the first.  Everything is clipped to the bounds.  The peak S/N used for
    ``TOO_FAINT`` is the unsmoothed peak above the baseline guess divided by the noise.

    Returns
    -------
    ndarray, shape (nspec, npar)
        NaN rows for spectra without finite data or with a bad noise value.
    """
    arr = _as_data(data)
    nspec, nchan = arr.shape
    models, auto = _resolve_models(ncomp, baseline, model, 3)
    if auto:
        raise KinemapError("'ncomp' must be 1, 2 or 3 for initial_guess")
    mdl = models[0]
    cfg = make_config(velocity, nchan, mdl, instrument_sigma=instrument_sigma, response=response,
                      noise_correlation="none", snr_threshold=0.0, max_iter=1, tolerance=1.0,
                      scale_errors=False, sigma_min_fraction=sigma_min_fraction)
    nz = _as_noise(noise, nspec)
    lo, hi = _bounds(cfg.axes, mdl, lower, upper, nspec, sigma_min_fraction)
    cax, cia, csc, civ, cis, roles, bkind = mdl.arrays()
    p0 = np.empty((nspec, mdl.npar))
    peak = np.empty(nspec)
    nfin = np.empty(nspec, dtype=np.int64)
    announce_compile()
    K.guess_kernel(np.ascontiguousarray(arr, dtype=np.float64), nz, cfg.axes.centres, cfg.axes.channel_width,
                   cax, cia, csc, civ, cis, roles, mdl.n_line_params, bkind, cfg.instrument_sigma**2,
                   cfg.resp_var, lo, hi, cfg.split_below, p0, peak, nfin)
    return p0


def model_spectra(params, velocity, *, ncomp: int = 1, baseline: str = "none", model: LineModel | None = None,
                  instrument_sigma=0.0, response: str = "tophat", dtype=np.float64) -> np.ndarray:
    """Model spectra for given parameters (for model and residual cubes).

    Parameters
    ----------
    params : array-like, shape (nspec, npar) or (npar,)
        Parameters in the model's order (e.g. ``LineFitResult.params``).  A component whose
        amplitude, velocity and dispersion are all NaN is left out (unused components of
        ``ncomp='auto'`` fits); a spectrum whose parameters are all NaN gives NaN channels.
    velocity, ncomp, baseline, model, instrument_sigma, response
        As in :func:`fit_spectra` (use the result's ``model``, ``instrument_sigma`` and
        ``response``).
    dtype : numpy dtype
        Output dtype (float32 halves the memory of model cubes).

    Returns
    -------
    ndarray, shape (nspec, nchan) (or (nchan,) for 1-D ``params``)
    """
    models, auto = _resolve_models(ncomp, baseline, model, 3)
    if auto:
        raise KinemapError("'ncomp' must be 1, 2 or 3 for model_spectra; pass the result's 'model' instead")
    mdl = models[0]
    p = np.asarray(params, dtype=np.float64)
    one = p.ndim == 1
    p = np.atleast_2d(p)
    if p.ndim != 2 or p.shape[1] != mdl.npar:
        raise KinemapError(f"'params' must have shape (nspec, {mdl.npar}) for this model, got {np.shape(params)}")
    cfg = make_config(velocity, None, mdl, instrument_sigma=instrument_sigma, response=response,
                      noise_correlation="none", snr_threshold=0.0, max_iter=1, tolerance=1.0,
                      scale_errors=False)
    cax, cia, csc, civ, cis, roles, bkind = mdl.arrays()
    p = p.copy()
    allnan = np.all(np.isnan(p), axis=1)
    for j in range(mdl.ncomp):
        gone = np.isnan(p[:, cia[j]]) & np.isnan(p[:, civ[j]]) & np.isnan(p[:, cis[j]]) & ~allnan
        p[gone, cia[j]] = 0.0
        p[gone, civ[j]] = 0.0
        p[gone, cis[j]] = 1.0
    out = np.empty((p.shape[0], cfg.axes.nchan))
    announce_compile()
    K.model_kernel(p, cfg.axes.centres, cfg.axes.edges_ext, cfg.axes.inv_width_ext, cax, cia, csc, civ, cis, mdl.n_line_params,
                   bkind, cfg.instrument_sigma**2, cfg.resp_code, out)
    out = out.astype(dtype, copy=False)
    return out[0] if one else out


def model_block(param_maps, velocity, **options) -> np.ndarray:
    """Model cube ``(nchan, ny, nx)`` from parameter maps ``(npar, ny, nx)``.

    ``options`` are those of :func:`model_spectra`.  ``LineFitResult.maps()['params']``
    has the right layout.
    """
    pm = np.asarray(param_maps, dtype=np.float64)
    if pm.ndim < 2:
        raise KinemapError(f"'param_maps' must have shape (npar, ny, nx), got shape {pm.shape}")
    spatial = pm.shape[1:]
    flat = pm.reshape(pm.shape[0], -1).T
    mod = model_spectra(flat, velocity, **options)
    return np.ascontiguousarray(mod.T).reshape((mod.shape[1],) + spatial)
