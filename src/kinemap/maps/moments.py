"""Moment maps with analytic uncertainties.

For the channels i that count as signal in a spectrum (inside the mask, finite), with
intensities I_i, velocities v_i (km/s) and channel widths dv_i = |v_i+1 - v_i-1| / 2:

* moment 0 (integrated intensity)  S  = sum_i I_i dv_i
* moment 1 (intensity-weighted velocity)  m1 = sum_i I_i dv_i v_i / S
* moment 2 (intensity-weighted dispersion, a sigma)  m2 = sqrt(M2),
  M2 = sum_i I_i dv_i (v_i - m1)^2 / S
* peak intensity, the velocity of the peak channel, the number of channels used.

Uncertainties (1 sigma) come from linear propagation of the per-channel noise sigma of the
spectrum.  Each moment is (to first order) a weighted sum of the I_i, so
Var = sigma^2 sum_ij w_i w_j rho_|i-j| with rho the noise correlation between channels
(rho = [1] for top-hat channels; [1, 2/3, 1/6] after Hanning smoothing, see
:mod:`kinemap.spectral.response`) and weights

* moment 0: w_i = dv_i
* moment 1: w_i = dv_i (v_i - m1) / S
* moment 2: w_i = dv_i ((v_i - m1)^2 - M2) / S for M2, and sigma(m2) = sigma(M2) / (2 m2).

These are first-order (small-noise) errors: they become optimistic when S/N of S is below
a few, and they do not include the bias a threshold mask imposes.  A pixel with no signal
channels, or with S <= 0, gets NaN in moments 1 and 2.  A pixel with a single signal
channel gets that channel's velocity with the error dv / sqrt(12) (a top-hat channel's
sigma) and NaN for moment 2.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field

import astropy.units as u
import numpy as np

from kinemap.units import KMS
from kinemap.parallel.blocks import DEFAULT_MAX_MEMORY, map_blocks
from kinemap.io.products import Product
from kinemap.maps._moments_kernel import USE_FINITE, USE_MASK, USE_THRESHOLD, moments_kernel
from kinemap.spectral.response import check_response, noise_correlation

__all__ = ["MomentMaps", "compute_moments"]


@dataclass(frozen=True)
class MomentMaps:
    """Moment maps of a cube (arrays (ny, nx); velocities km/s, intensities in the cube unit).

    ``moment0`` is in cube unit x km/s.  NaN where undefined.
    """

    moment0: np.ndarray
    moment1: np.ndarray
    moment2: np.ndarray
    moment0_err: np.ndarray
    moment1_err: np.ndarray
    moment2_err: np.ndarray
    peak: np.ndarray
    velocity_at_peak: np.ndarray
    nchan: np.ndarray
    bunit: u.UnitBase
    channel_response: str
    noise: np.ndarray | None = None
    signal_footprint: np.ndarray | None = None
    settings: dict = field(default_factory=dict)
    seconds: float = 0.0

    def velocity_field(self, *, min_snr: float = 5.0):
        """(velocity, velocity error, intensity) maps for a ring fit; pixels whose moment 0
        has S/N below ``min_snr`` are left out (NaN)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            keep = self.moment0 / self.moment0_err >= min_snr
        return (np.where(keep, self.moment1, np.nan), np.where(keep, self.moment1_err, np.nan),
                self.moment0)

    def products(self) -> list[Product]:
        b = self.bunit
        out = [
            Product("moment0", self.moment0, b * KMS, "integrated intensity (moment 0)", "intensity"),
            Product("moment1", self.moment1, KMS, "intensity-weighted velocity (moment 1)", "velocity"),
            Product("moment2", self.moment2, KMS,
                    "intensity-weighted dispersion (moment 2, a Gaussian sigma)", "dispersion"),
            Product("moment0_err", self.moment0_err, b * KMS, "1-sigma error of moment 0", "error"),
            Product("moment1_err", self.moment1_err, KMS, "1-sigma error of moment 1", "error"),
            Product("moment2_err", self.moment2_err, KMS, "1-sigma error of moment 2", "error"),
            Product("peak", self.peak, b, "peak intensity", "intensity"),
            Product("velocity_at_peak", self.velocity_at_peak, KMS,
                    "velocity of the peak channel", "velocity"),
            Product("nchan", self.nchan.astype(np.int16), u.one, "number of channels used", "count"),
        ]
        if self.noise is not None:
            out.append(Product("noise", self.noise, b, "1-sigma noise per channel", "noise"))
        if self.signal_footprint is not None:
            out.append(Product("mask", self.signal_footprint.astype(np.uint8), u.one,
                               f"1 where the spectrum has channels in the signal mask "
                               f"({self.settings.get('mask', 'none')})", "mask"))
        return out


_KEYS = ("moment0", "moment1", "moment2", "moment0_err", "moment1_err", "moment2_err",
         "peak", "velocity_at_peak", "nchan")


def _moments_block(block, *, sigma, footprint, mask, velocity, dv, mode, threshold, rho):
    """Moments of one block (nchan, rows, nx): runs in this process or on a worker."""
    nchan, rows, nx = block.shape
    flat = block.reshape(nchan, -1)
    sig = np.ascontiguousarray(sigma.reshape(-1), dtype=np.float64)
    fp = (np.ones(flat.shape[1], dtype=np.bool_) if footprint is None
          else np.ascontiguousarray(footprint.reshape(-1)))
    m = (np.zeros((1, 1), dtype=np.bool_) if mask is None
         else np.ascontiguousarray(mask.reshape(nchan, -1)))
    res = np.empty((len(_KEYS), flat.shape[1]))
    moments_kernel(flat, velocity, dv, mode, threshold, sig, m, fp, rho, res)
    return {k: res[i].reshape(rows, nx) for i, k in enumerate(_KEYS)}


def compute_moments(cube, *, mask=None, noise=None, channel_response: str = "tophat",
                    max_memory: int = DEFAULT_MAX_MEMORY, progress: bool = False,
                    client=None) -> MomentMaps:
    """Moment maps of ``cube`` over the signal channels of ``mask``.

    Parameters
    ----------
    cube : kinemap.io.cube.Cube
    mask : kinemap.maps.masks.SignalMask, optional
        None uses every finite channel.
    noise : kinemap.maps.noise.NoiseMap, optional
        Needed for the error maps and for a 'threshold' mask; without it errors are NaN.
    channel_response : {'tophat', 'hanning', 'none'}
        Sets the channel-to-channel noise correlation in the errors.
    client : distributed.Client, optional
        Run the blocks on a dask.distributed cluster (identical results).

    Returns
    -------
    MomentMaps
    """
    t0 = time.perf_counter()
    response = check_response(channel_response)
    rho = noise_correlation(response)
    nchan, ny, nx = cube.shape
    v = np.ascontiguousarray(cube.velocity, dtype=np.float64)
    dv = np.ascontiguousarray(cube.channel_width, dtype=np.float64)
    sigma_map = noise.sigma if noise is not None else np.full((ny, nx), np.nan)
    mode, threshold = USE_FINITE, 0.0
    if mask is not None and mask.method == "threshold":
        mode, threshold = USE_THRESHOLD, float(mask.threshold)
    elif mask is not None and mask.method == "smooth":
        mode = USE_MASK

    def block_args(ys):
        return {"sigma": sigma_map[ys],
                "footprint": None if cube.footprint is None else cube.footprint[ys],
                "mask": mask.mask[:, ys, :] if mode == USE_MASK else None}

    out = map_blocks(cube, _moments_block, outputs={k: ((), np.float64, np.nan) for k in _KEYS},
                     max_memory=max_memory, factor=2.5, block_args=block_args,
                     progress=progress and "moments", client=client, velocity=v, dv=dv,
                     mode=mode, threshold=threshold, rho=np.ascontiguousarray(rho, np.float64))
    footprint = out["nchan"] > 0
    return MomentMaps(**out, bunit=cube.meta.bunit, channel_response=response,
                      noise=noise.sigma if noise is not None else None,
                      signal_footprint=footprint,
                      settings={"mask": mask.method if mask is not None else "none",
                                "channel_response": response},
                      seconds=time.perf_counter() - t0)
