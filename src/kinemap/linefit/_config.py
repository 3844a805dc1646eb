"""Validation of the fitter's options into one private settings object."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from kinemap.units import KMS, to_value
from kinemap.errors import KinemapError
from kinemap.linefit import _kernels as K
from kinemap.linefit._axes import Axes, prepare_axes
from kinemap.linefit._model import ROLE_AMP, ROLE_SIG, ROLE_VEL, LineModel
from kinemap.spectral.response import RESPONSES, channel_noise_correlation, response_variance
from kinemap.spectral.response import noise_correlation as response_noise_correlation

__all__ = ["RESPONSES", "Config", "make_config", "channel_noise_correlation", "default_bounds"]

_RESP_CODE = {"none": K.RESP_NONE, "tophat": K.RESP_TOPHAT, "hanning": K.RESP_HANNING}
# White floor mixed into the channel correlation matrix, (1 - f) R + f I.  Hanning smoothing
# leaves almost no noise at the Nyquist frequency, so R is nearly singular there (smallest
# eigenvalue ~ 1e-7 for 128 channels); the floor caps the weight of that band at ~1/f so
# rounding or a slightly different smoothing kernel in the data cannot dominate chi2.  It
# changes the weights of the smooth (line-like) part of the residual by ~f, i.e. errors by
# ~0.05 per cent.
CORRELATION_FLOOR = 1e-3


def default_bounds(axes: Axes, model: LineModel, *, sigma_min_fraction: float = 0.25):
    """Default box bounds (lower, upper), each shape (npar,), in the model's parameter order.

    * amplitude: ``[0, inf)``;
    * velocity: inside the band of every axis whose component uses the parameter;
    * dispersion (intrinsic): ``[sigma_min_fraction * channel width, band width]`` (narrowest
      channel / widest band among the components using it);
    * baseline: unbounded.
    """
    npar = model.npar
    lower = np.full(npar, -np.inf)
    upper = np.full(npar, np.inf)
    vlo = np.full(npar, -np.inf)
    vhi = np.full(npar, np.inf)
    smin = np.full(npar, np.inf)
    smax = np.full(npar, 0.0)
    for axis, ka, _sc, kv, ks in model.components:
        vlo[kv] = max(vlo[kv], axes.band_min[axis])
        vhi[kv] = min(vhi[kv], axes.band_max[axis])
        smin[ks] = min(smin[ks], sigma_min_fraction * axes.channel_width[axis])
        smax[ks] = max(smax[ks], axes.band_max[axis] - axes.band_min[axis])
    for k, role in enumerate(model.roles):
        if role == ROLE_AMP:
            lower[k], upper[k] = 0.0, np.inf
        elif role == ROLE_VEL:
            if not vlo[k] < vhi[k]:
                raise KinemapError(
                    f"velocity parameter {k} is shared by lines whose bands do not overlap; "
                    "check the rest values of the velocity axes"
                )
            lower[k], upper[k] = vlo[k], vhi[k]
        elif role == ROLE_SIG:
            lower[k], upper[k] = smin[k], smax[k]
    return lower, upper


@dataclass(frozen=True, eq=False)
class Config:
    axes: Axes
    model: LineModel
    response: str
    resp_code: int
    resp_var: np.ndarray  # (naxes,) channel-response variance, km^2/s^2 (guesses only)
    instrument_sigma: float
    rho: tuple  # (rho1, rho2)
    snr_threshold: float
    max_iter: int
    tolerance: float
    scale_errors: bool
    split_below: float
    sigma_min_fraction: float


def _check_number(x, name, *, lo=None, lo_open=False, hi=None, integer=False):
    try:
        val = float(x)
    except (TypeError, ValueError):
        raise KinemapError(f"'{name}' must be a number, got {x!r}") from None
    if not np.isfinite(val):
        raise KinemapError(f"'{name}' must be finite, got {x!r}")
    if integer and val != int(val):
        raise KinemapError(f"'{name}' must be a whole number, got {x!r}")
    if lo is not None and (val < lo or (lo_open and val == lo)):
        raise KinemapError(f"'{name}' must be {'>' if lo_open else '>='} {lo}, got {x!r}")
    if hi is not None and val > hi:
        raise KinemapError(f"'{name}' must be <= {hi}, got {x!r}")
    return int(val) if integer else val


def make_config(velocity, nchan, model, *, instrument_sigma, response, noise_correlation,
                snr_threshold, max_iter, tolerance, scale_errors, sigma_min_fraction=0.25,
                split_below=2.0) -> Config:
    axes = prepare_axes(velocity, nchan=nchan, naxes=model.naxes)
    if response not in RESPONSES:
        raise KinemapError(f"'response' must be one of {', '.join(RESPONSES)}, got {response!r}")
    si = to_value(instrument_sigma, KMS, name="instrument_sigma")
    if np.ndim(si) != 0 or not np.isfinite(si) or si < 0:
        raise KinemapError(f"'instrument_sigma' must be a single number >= 0 km/s, got {instrument_sigma!r}")
    if noise_correlation is None:
        noise_correlation = "hanning" if response == "hanning" else "none"
    if isinstance(noise_correlation, str):
        if noise_correlation == "none":
            rho = (0.0, 0.0)
        elif noise_correlation == "hanning":
            c = response_noise_correlation("hanning")
            rho = (float(c[1]), float(c[2]))
        else:
            raise KinemapError(
                f"'noise_correlation' must be 'none', 'hanning' or (rho1, rho2), got {noise_correlation!r}"
            )
    else:
        r = np.atleast_1d(np.asarray(noise_correlation, dtype=float))
        if r.ndim != 1 or not 1 <= r.size <= 2 or not np.all(np.isfinite(r)) or np.any(np.abs(r) >= 1):
            raise KinemapError(
                "'noise_correlation' as numbers must be (rho1,) or (rho1, rho2) with |rho| < 1, "
                f"got {noise_correlation!r}"
            )
        rho = (float(r[0]), float(r[1]) if r.size == 2 else 0.0)
        n = axes.nchan
        R = np.eye(n) + rho[0] * (np.eye(n, k=1) + np.eye(n, k=-1)) + rho[1] * (np.eye(n, k=2) + np.eye(n, k=-2))
        R = (1 - CORRELATION_FLOOR) * R + CORRELATION_FLOOR * np.eye(n)
        try:
            np.linalg.cholesky(R)
        except np.linalg.LinAlgError:
            raise KinemapError(
                f"'noise_correlation' {noise_correlation!r} is not a valid correlation (matrix not positive definite); "
                "check the lag correlations"
            ) from None
    resp_var = response_variance(response, axes.channel_width)
    return Config(
        axes=axes,
        model=model,
        response=response,
        resp_code=_RESP_CODE[response],
        resp_var=np.ascontiguousarray(resp_var, dtype=np.float64),
        instrument_sigma=float(si),
        rho=rho,
        snr_threshold=_check_number(snr_threshold, "snr_threshold", lo=0.0),
        max_iter=_check_number(max_iter, "max_iter", lo=1, integer=True),
        tolerance=_check_number(tolerance, "tolerance", lo=0.0, lo_open=True),
        scale_errors=bool(scale_errors),
        split_below=float(split_below),
        sigma_min_fraction=_check_number(sigma_min_fraction, "sigma_min_fraction", lo=0.0, lo_open=True),
    )
