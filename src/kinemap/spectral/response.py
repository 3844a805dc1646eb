"""Channel responses: how a spectrometer channel samples the sky spectrum.

The one definition of the responses kinemap knows: their names, widths and the noise
correlation they cause.

* ``tophat``: each channel averages the spectrum over its width dv; the equivalent
  Gaussian sigma of a top-hat is dv / sqrt(12) (exact for the second moment); noise in
  neighbouring channels is independent.
* ``hanning``: top-hat channels then smoothed with the kernel [1/4, 1/2, 1/4] (common
  practice for radio spectrometers); the resolution is about 2 channels FWHM and white
  noise becomes correlated between neighbours with coefficients rho_1 = 2/3, rho_2 = 1/6
  (autocorrelation of the kernel: (1/4*1/2 + 1/2*1/4) / (1/16 + 1/4 + 1/16) and
  (1/16) / (3/8)), and its variance drops to 3/8 of the unsmoothed value.
* ``none``: the spectrum sampled at channel centres (an idealisation).
"""
from __future__ import annotations

import numpy as np

from kinemap.errors import KinemapError

__all__ = [
    "RESPONSES",
    "HANNING_KERNEL",
    "check_response",
    "channel_noise_correlation",
    "noise_correlation",
    "response_sigma",
    "response_variance",
    "variance_of_sum",
]

RESPONSES = ("tophat", "hanning", "none")

HANNING_KERNEL = (0.25, 0.5, 0.25)


def channel_noise_correlation(kernel=HANNING_KERNEL) -> np.ndarray:
    """Correlation coefficients of white noise after smoothing along channels with ``kernel``.

    For a kernel ``h`` the noise at lag ``k`` has covariance ``sum_i h_i h_{i+k}``; divided by
    the lag-0 value this gives the correlation.  For Hanning ``[1/4, 1/2, 1/4]``:
    variance 3/8, lag 1: 1/4 -> rho1 = 2/3, lag 2: 1/16 -> rho2 = 1/6, zero beyond.

    Returns
    -------
    ndarray, shape (len(kernel),)
        ``[1, rho1, rho2, ...]``.
    """
    h = np.asarray(kernel, dtype=float)
    if h.ndim != 1 or h.size == 0 or not np.all(np.isfinite(h)) or not np.any(h):
        raise KinemapError(f"'kernel' must be a 1-D sequence of finite numbers, got {kernel!r}")
    full = np.correlate(h, h, mode="full")[h.size - 1:]
    return full / full[0]


# every sum in the Hanning autocorrelation is exact in binary, so these are exactly the
# doubles nearest 2/3 and 1/6
_RHO = {"tophat": (1.0,), "none": (1.0,),
        "hanning": tuple(float(c) for c in channel_noise_correlation(HANNING_KERNEL))}


def check_response(name) -> str:
    n = "tophat" if name is None else str(name).strip().lower().replace("-", "")
    if n not in RESPONSES:
        raise KinemapError(f"'channel_response' must be one of {', '.join(RESPONSES)}, got {name!r}")
    return n


def noise_correlation(name) -> np.ndarray:
    """Correlation coefficients of the noise at lags 0, 1, 2, ... channels."""
    return np.asarray(_RHO[check_response(name)], dtype=float)


def response_sigma(name, channel_width):
    """Equivalent Gaussian sigma (km/s) of the channel response for a channel width in km/s."""
    n = check_response(name)
    dv = np.abs(np.asarray(channel_width, dtype=float))
    if n == "tophat":
        return dv / np.sqrt(12.0)
    if n == "hanning":
        # second moment of top-hat (dv^2/12) plus that of [1/4,1/2,1/4] (dv^2/2)
        return dv * np.sqrt(1.0 / 12.0 + 0.5)
    return np.zeros_like(dv)


def response_variance(name, channel_width):
    """Second moment (km^2/s^2) of the channel response for a channel width in km/s.

    The square of :func:`response_sigma` (to rounding); the sign of the width does not
    matter.
    """
    n = check_response(name)
    w = np.asarray(channel_width, dtype=float)
    if n == "tophat":
        return w**2 / 12.0
    if n == "hanning":
        # top-hat dv^2/12 plus the kernel's sum_k h_k k^2 dv^2 = dv^2/2
        return w**2 / 12.0 + 0.5 * w**2
    return 0.0 * w


def variance_of_sum(weights: np.ndarray, sigma2: np.ndarray, rho: np.ndarray) -> np.ndarray:
    """Var(sum_i w_i x_i) for noise of variance ``sigma2`` correlated by ``rho`` along axis 0.

    ``weights`` has channels on axis 0; the result has the remaining shape.  Exact for
    stationary noise with the given correlation (banded covariance).
    """
    total = np.nansum(weights * weights, axis=0)
    for lag in range(1, len(rho)):
        if rho[lag] == 0:
            continue
        total = total + 2.0 * rho[lag] * np.nansum(weights[lag:] * weights[:-lag], axis=0)
    return sigma2 * total
