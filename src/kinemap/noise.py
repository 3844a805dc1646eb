"""Robust noise per pixel from line-free channels.

The estimator is the median absolute deviation scaled to a Gaussian sigma,
``1.4826 * median(|x - median(x)|)`` (common practice).  With line-free velocity ranges it
runs over those channels of each spectrum.  Without them ('auto') it runs over the second
differences of neighbouring channels, scaled by their noise factor given the channel
correlation (sqrt(6) for independent channels, 1 after Hanning smoothing): a line several
channels wide nearly cancels in them, so the estimate works even when emission fills most
of the band, as in many molecular-cloud cubes.  Lines only a few channels wide bias it
upwards a little; give line-free ranges for those.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass

import astropy.units as u
import numpy as np

from ._units import KMS, to_value
from .cube._blocks import DEFAULT_MAX_MEMORY, iter_blocks
from .response import noise_correlation, variance_of_sum
from .errors import KinemapError, NoiseWarning

__all__ = ["NoiseMap", "estimate_noise", "MAD_TO_SIGMA"]

MAD_TO_SIGMA = 1.482602218505602  # 1 / Phi^-1(3/4), Gaussian consistency (common practice)


@dataclass(frozen=True)
class NoiseMap:
    """1-sigma noise per channel for every pixel.

    Attributes
    ----------
    sigma : ndarray (ny, nx)
        Noise in the cube's unit; NaN where it could not be estimated.
    nchan_used : ndarray (ny, nx)
        Channels the estimate rests on.
    unit : Unit
    method : str
        'line-free ranges' or 'MAD of second differences'.
    """

    sigma: np.ndarray
    nchan_used: np.ndarray
    unit: u.UnitBase
    method: str

    @property
    def median(self) -> float:
        return float(np.nanmedian(self.sigma)) if np.isfinite(self.sigma).any() else float("nan")


def _mad_sigma(x, keep):
    """Column-wise MAD sigma of x (nchan, n) over channels where keep is True."""
    y = np.where(keep & np.isfinite(x), x, np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        med = np.nanmedian(y, axis=0)
        return MAD_TO_SIGMA * np.nanmedian(np.abs(y - med), axis=0), med


_SECOND_DIFF = np.array([1.0, -2.0, 1.0])


def _difference_sigma(x, finite, rho):
    """Sigma from the MAD of second differences x_i-1 - 2 x_i + x_i+1.

    A line many channels wide nearly cancels in second differences (its gradient exactly,
    its curvature mostly) while the noise adds: Var = sigma^2 sum_jk w_j w_k rho_|j-k| with
    w = (1, -2, 1), i.e. 6 sigma^2 for independent channels and 1 sigma^2 after Hanning
    smoothing.  The MAD keeps the few large values at sharp line edges from biasing it.
    """
    d = x[:-2] - 2.0 * x[1:-1] + x[2:]
    ok = finite[:-2] & finite[1:-1] & finite[2:]
    s, _ = _mad_sigma(d, ok)
    factor = float(np.sqrt(variance_of_sum(_SECOND_DIFF[:, None], 1.0, rho))[0])
    return s / factor, ok


def line_free_channels(velocity: np.ndarray, ranges) -> np.ndarray:
    """Boolean per channel: inside any of ``ranges`` = [(v1, v2), ...] (km/s)."""
    if ranges and not isinstance(ranges[0], (list, tuple)):
        ranges = [ranges]
    keep = np.zeros(velocity.size, bool)
    for pair in ranges:
        if len(pair) != 2:
            raise KinemapError(f"'line_free' ranges must be pairs of velocities, got {pair!r}")
        lo, hi = sorted(to_value(v, KMS, name="line_free") for v in pair)
        keep |= (velocity >= lo) & (velocity <= hi)
    if keep.sum() < 5:
        raise KinemapError(
            f"'line_free' ranges {ranges} hold {int(keep.sum())} channels; give ranges "
            f"with at least 5 channels inside {velocity.min():.4g} to {velocity.max():.4g} km/s")
    return keep


def estimate_noise(cube, *, line_free=None, channel_response: str = "tophat",
                   max_memory: int = DEFAULT_MAX_MEMORY,
                   progress: bool = False) -> NoiseMap:
    """Estimate the noise of every spectrum of ``cube``.

    Parameters
    ----------
    cube : kinemap.cube.Cube
    line_free : None, 'auto' or list of (v1, v2) velocity pairs (km/s or Quantity)
        Channels to use.  ``None``/'auto' uses differences of neighbouring channels.
    channel_response : {'tophat', 'hanning', 'none'}
        Sets the neighbour correlation used by the automatic estimate.
    """
    nchan, ny, nx = cube.shape
    rho = noise_correlation(channel_response)
    auto = line_free is None or (isinstance(line_free, str) and line_free.lower() == "auto")
    fixed = None if auto else line_free_channels(cube.velocity, line_free)
    sigma = np.full((ny, nx), np.nan)
    nused = np.zeros((ny, nx), np.int32)
    any_finite = False
    for ys, block in iter_blocks(cube, max_memory=max_memory, progress=progress and "noise"):
        flat = block.reshape(nchan, -1)
        finite = np.isfinite(flat)
        any_finite |= bool(finite.any())
        if fixed is not None:
            keep = np.broadcast_to(fixed[:, None], flat.shape) & finite
            s, _ = _mad_sigma(flat, keep)
        else:
            s, keep = _difference_sigma(flat, finite, rho)
        n = keep.sum(axis=0)
        s = np.where(n >= 3, s, np.nan)
        s = np.where(s > 0, s, np.nan)  # zero MAD: constant data, no noise estimate
        sigma[ys] = s.reshape(-1, nx)
        nused[ys] = n.reshape(-1, nx)
    if not any_finite:
        raise KinemapError("the cube holds no finite values (all NaN); check the input file")
    bad = ~np.isfinite(sigma)
    if bad.all():
        raise KinemapError("the noise could not be estimated for any pixel (constant or "
                           "too few channels); give line-free ranges with --line-free")
    if bad.mean() > 0.5:
        warnings.warn(f"noise undetermined for {bad.mean():.0%} of pixels", NoiseWarning,
                      stacklevel=2)
    return NoiseMap(sigma=sigma, nchan_used=nused, unit=cube.meta.bunit,
                    method="MAD of second differences" if auto else "line-free ranges")
