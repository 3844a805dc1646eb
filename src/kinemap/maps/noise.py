"""Robust noise per pixel from line-free channels.

The estimator is an iteratively clipped RMS: values beyond 3.5 sigma of the mean are
dropped until the kept set settles, and the result is divided by the sigma of a Gaussian
truncated at +-3.5 (0.9969) so it is unbiased for Gaussian noise.  It is as robust as the
median absolute deviation against a minority of outliers at a fraction of the cost (two
median selections per spectrum dominated the run time on survey cubes).  With line-free
velocity ranges it runs over those channels of each spectrum.  Without them ('auto') it runs over the second
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

from kinemap.units import KMS, to_value
from kinemap.parallel.blocks import DEFAULT_MAX_MEMORY, map_blocks
from kinemap.parallel.store import any_true, finite_fraction, nanmedian
from kinemap.maps._noise_kernel import noise_kernel
from kinemap.errors import KinemapError, NoiseWarning
from kinemap.spectral.response import noise_correlation, variance_of_sum

__all__ = ["NoiseMap", "estimate_noise", "clip_correction", "CLIP", "noise_settings",
           "noise_map"]

CLIP = 3.5  # clip at 3.5 sigma: drops 0.05 % of Gaussian noise, lines and edges beyond


def clip_correction(c: float) -> float:
    """sigma of a unit Gaussian truncated at +-c: sqrt(1 - 2 c phi(c) / (2 Phi(c) - 1))."""
    from math import erf, exp, pi, sqrt

    phi = exp(-0.5 * c * c) / sqrt(2.0 * pi)
    mass = erf(c / sqrt(2.0))
    return sqrt(1.0 - 2.0 * c * phi / mass)



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
        'line-free ranges' or 'clipped RMS of second differences'.
    """

    sigma: np.ndarray
    nchan_used: np.ndarray
    unit: u.UnitBase
    method: str

    @property
    def median(self) -> float:
        return nanmedian(self.sigma)


# Second differences x_i-1 - 2 x_i + x_i+1: a line many channels wide nearly cancels in
# them (its gradient exactly, its curvature mostly) while the noise adds with
# Var = sigma^2 sum_jk w_j w_k rho_|j-k| for w = (1, -2, 1): 6 sigma^2 for independent
# channels, 1 sigma^2 after Hanning smoothing.  The MAD keeps the few large values at
# sharp line edges from biasing the estimate.
_SECOND_DIFF = np.array([1.0, -2.0, 1.0])
# the clipped RMS needs three values (_noise_kernel), three second differences five channels
_MIN_CHANNELS = 5


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


def _noise_block(block, *, fixed, factor_2nd, clip, correction):
    """Noise of one block (nchan, rows, nx): runs in this process or on a worker."""
    nchan, rows, nx = block.shape
    flat = block.reshape(nchan, -1)
    s = np.empty(flat.shape[1])
    n = np.empty(flat.shape[1], dtype=np.int64)
    nf = np.empty(flat.shape[1], dtype=np.int64)
    keep = np.ones(nchan, dtype=np.bool_) if fixed is None else fixed
    noise_kernel(flat, fixed is None, keep, factor_2nd if fixed is None else 1.0, clip,
                 correction, s, n, nf)
    return {"sigma": s.reshape(rows, nx), "nused": n.reshape(rows, nx),
            "finite": (nf > 0).reshape(rows, nx)}


def estimate_noise(cube, *, line_free="auto", channel_response: str = "tophat",
                   max_memory: int = DEFAULT_MAX_MEMORY, progress: bool = False,
                   client=None) -> NoiseMap:
    """Estimate the noise of every spectrum of ``cube``.

    Parameters
    ----------
    cube : kinemap.io.cube.Cube
    line_free : None, 'auto' or list of (v1, v2) velocity pairs (km/s or Quantity)
        Channels to use.  ``None``/'auto' uses differences of neighbouring channels.
    channel_response : {'tophat', 'hanning', 'none'}
        Sets the neighbour correlation used by the automatic estimate.
    client : distributed.Client, optional
        Run the blocks on a dask.distributed cluster (identical results).
    """
    auto, fixed, factor = noise_settings(cube, line_free, channel_response)
    out = map_blocks(cube, _noise_block, outputs={"sigma": ((), np.float64, np.nan),
                                                  "nused": ((), np.int32, 0),
                                                  "finite": ((), np.bool_, False)},
                     max_memory=max_memory, factor=2.0, progress=progress and "noise",
                     client=client, fixed=fixed, factor_2nd=factor, clip=CLIP,
                     correction=clip_correction(CLIP))
    return noise_map(out["sigma"], out["nused"], out["finite"], cube.meta.bunit, auto,
                     nchan=cube.shape[0])


def noise_settings(cube, line_free, channel_response):
    """(auto, line-free channels or None, noise factor of second differences): what the
    noise kernels need besides the data, from the public arguments."""
    rho = noise_correlation(channel_response)
    auto = line_free is None or (isinstance(line_free, str) and line_free.lower() == "auto")
    fixed = None if auto else np.ascontiguousarray(line_free_channels(cube.velocity, line_free))
    factor = float(np.sqrt(variance_of_sum(_SECOND_DIFF[:, None], 1.0, rho))[0])
    return auto, fixed, factor


def noise_map(sigma, nused, finite, unit, auto, *, stacklevel=3, nchan=None) -> NoiseMap:
    """The :class:`NoiseMap` of the kernels' per-pixel outputs, refusing a cube with nothing
    to measure (``KinemapError``, naming the likely cause; ``nchan`` is the cube's number
    of channels) and warning when most pixels are undetermined."""
    if not any_true(finite):
        raise KinemapError("the cube holds no finite values (all NaN); check the input file")
    bad = 1.0 - finite_fraction(sigma)  # maps may be on disk: counted band by band
    if bad == 1.0 and auto and nchan is not None and nchan < _MIN_CHANNELS:
        raise KinemapError(
            f"the cube has {nchan} channel{'s' if nchan != 1 else ''}: too few to measure the "
            f"noise or a line (at least {_MIN_CHANNELS} are needed); give a cube with more "
            "channels")
    if bad == 1.0:
        raise KinemapError("the noise could not be estimated for any pixel: the spectra are "
                           "constant, or NaN channels leave no three finite neighbours; give "
                           "line-free ranges with --line-free")
    if bad > 0.5:
        warnings.warn(f"noise undetermined for {bad:.0%} of pixels", NoiseWarning,
                      stacklevel=stacklevel)
    return NoiseMap(sigma=sigma, nchan_used=nused, unit=unit,
                    method="clipped RMS of second differences" if auto else "line-free ranges")
