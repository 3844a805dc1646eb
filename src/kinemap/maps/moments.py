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
import warnings
from dataclasses import dataclass, field, replace
from typing import ClassVar

import astropy.units as u
import numpy as np

from kinemap.units import KMS
from kinemap.parallel.blocks import DEFAULT_MAX_MEMORY, map_blocks
from kinemap.parallel.store import any_finite, any_true, derive, nanmedian
from kinemap.errors import KinemapError, NoiseWarning
from kinemap.io.products import Product
from kinemap.io.results import StageResult
from kinemap.maps.masks import as_mask
from kinemap.maps.noise import CLIP, clip_correction, noise_map, noise_settings
from kinemap.maps._fused_kernel import fused_kernel, fused_kernel_swapped
from kinemap.maps._moments_kernel import (USE_FINITE, USE_MASK, USE_MASK_THRESHOLD,
                                          USE_THRESHOLD, moments_kernel)
from kinemap.spectral.response import check_response, noise_correlation

__all__ = ["MomentMaps", "compute_moments", "noise_and_moments"]


# key -> (unit kind: 'b' cube unit, 'bv' cube unit x km/s, 'v' km/s, '1'), description, kind
_PRODUCTS = {
    "moment0": ("bv", "integrated intensity (moment 0)", "intensity"),
    "moment1": ("v", "intensity-weighted velocity (moment 1)", "velocity"),
    "moment2": ("v", "intensity-weighted dispersion (moment 2, a Gaussian sigma)", "dispersion"),
    "moment0_err": ("bv", "1-sigma error of moment 0", "error"),
    "moment1_err": ("v", "1-sigma error of moment 1", "error"),
    "moment2_err": ("v", "1-sigma error of moment 2", "error"),
    "peak": ("b", "peak intensity", "intensity"),
    "velocity_at_peak": ("v", "velocity of the peak channel", "velocity"),
    "nchan": ("1", "number of channels used", "count"),
}


@dataclass(frozen=True)
class MomentMaps(StageResult):
    """Moment maps of a cube.

    Every product is an attribute: ``moment0`` (cube unit x km/s), ``moment1``,
    ``moment2`` (km/s, moment 2 is a Gaussian sigma), their ``_err`` maps, ``peak``,
    ``velocity_at_peak``, ``nchan``, ``noise`` and ``mask``; each a
    ``spectral_cube.Projection`` with the cube's celestial WCS and beam, NaN where
    undefined.  ``arrays`` holds the same maps as plain float64 arrays (ny, nx).
    """

    name: ClassVar[str] = "moments"

    arrays: dict
    meta: object
    channel_response: str
    settings: dict = field(default_factory=dict)
    seconds: float = 0.0

    def velocity_field(self, *, min_snr: float = 5.0):
        """(velocity, velocity error, intensity) arrays for a ring fit (km/s, km/s, cube
        unit x km/s); pixels whose moment 0 has S/N below ``min_snr`` are NaN."""
        a = self.arrays
        with np.errstate(invalid="ignore", divide="ignore"):
            keep = a["moment0"] / a["moment0_err"] >= min_snr
        return (np.where(keep, a["moment1"], np.nan), np.where(keep, a["moment1_err"], np.nan),
                a["moment0"])

    def systemic_velocity(self) -> float | None:
        v = nanmedian(self.arrays["moment1"])
        return v if np.isfinite(v) else None

    def products(self) -> list[Product]:
        b = self.meta.bunit
        units = {"b": b, "bv": b * KMS, "v": KMS, "1": u.one}
        out = [Product(k, self.arrays[k], units[uk], desc, kind)
               for k, (uk, desc, kind) in _PRODUCTS.items()]
        out[-1] = replace(out[-1], data=derive(self.arrays["nchan"], _as_int16, np.int16))
        if self.arrays.get("noise") is not None:
            out.append(Product("noise", self.arrays["noise"], b, "1-sigma noise per channel",
                               "noise"))
        if self.arrays.get("mask") is not None:
            out.append(Product("mask", derive(self.arrays["mask"], _as_uint8, np.uint8), u.one,
                               f"1 where the spectrum has channels in the signal mask "
                               f"({self.settings.get('mask', 'none')})", "mask"))
        return out


def _as_int16(a):
    return a.astype(np.int16)


def _as_uint8(a):
    return a.astype(np.uint8)


def _positive(a):
    return a > 0


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
    cube : kinemap.io.Cube
    mask : SignalMask or boolean array (nchan, ny, nx) or (ny, nx), optional
        Which voxels count as signal (True = use); None uses every finite channel (as
        spectral-cube's moments do).
    noise : kinemap.maps.NoiseMap, optional
        Per-pixel noise for the error maps and a 'threshold' mask; estimated with
        :func:`kinemap.estimate_noise` defaults when not given (when no noise can be
        measured, the errors are NaN and a ``NoiseWarning`` says why).
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
    mask = as_mask(mask, cube)
    if noise is None:
        # the default noise and the moments in one read of the cube
        noise, maps = noise_and_moments(cube, mask=mask, channel_response=response,
                                        max_memory=max_memory, progress=progress,
                                        client=client, _strict=False)
        return replace(maps, seconds=time.perf_counter() - t0)
    nchan, ny, nx = cube.shape
    v = np.ascontiguousarray(cube.velocity, dtype=np.float64)
    dv = np.ascontiguousarray(cube.channel_width, dtype=np.float64)
    sigma_map = noise.sigma
    mode, threshold = _mask_mode(mask)

    def block_args(ys):
        return {"sigma": sigma_map[ys],
                "footprint": None if cube.footprint is None else cube.footprint[ys],
                "mask": mask.voxels()[:, ys, :] if mode in _READS_MASK else None}

    out = map_blocks(cube, _moments_block, outputs={k: ((), np.float64, np.nan) for k in _KEYS},
                     max_memory=max_memory, factor=2.5, block_args=block_args,
                     progress=progress and "moments", client=client, velocity=v, dv=dv,
                     mode=mode, threshold=threshold, rho=np.ascontiguousarray(rho, np.float64))
    return _moment_maps(out, noise, mask, cube, response, t0)


_READS_MASK = (USE_MASK, USE_MASK_THRESHOLD)


def _mask_mode(mask):
    """(kernel mode, S/N threshold) for a SignalMask or None."""
    if mask is not None and mask.method == "threshold":
        if mask.keep is not None:  # inside the user's mask
            return USE_MASK_THRESHOLD, float(mask.threshold)
        return USE_THRESHOLD, float(mask.threshold)
    if mask is not None and mask.mask is not None:
        return USE_MASK, 0.0
    return USE_FINITE, 0.0


def _why_empty(out, mask) -> str | None:
    """Why no pixel has a finite moment 0 (one line naming the cause and the fix), or
    None when some pixel has one: maps without a single value are refused, not written."""
    if any_finite(out["moment0"]):
        return None
    if not any_true(out["nchan"], _positive):
        if mask is None or mask.method in ("none", "given"):
            return ("the cube has no finite value to make moment maps of (every spectrum is "
                    "blank or the mask given selects nothing)")
        what = {"smooth": "smooth-and-mask", "threshold": "threshold"}.get(mask.method, mask.method)
        other = "--mask threshold or --mask none" if mask.method == "smooth" else "--mask none"
        return (f"the {what} signal mask found no emission (no voxel above S/N "
                f"{mask.threshold:g}), so every moment map would be blank; lower --threshold, "
                f"or use {other}")
    return ("the moment maps have no finite value although the mask selects voxels: the "
            "velocity axis or the channel widths are not finite; check CRVAL/CDELT/CRPIX of "
            "the spectral axis")


def _moment_maps(out, noise, mask, cube, response, t0) -> MomentMaps:
    why = _why_empty(out, mask)
    if why is not None:
        raise KinemapError(why)
    out["noise"] = noise.sigma if noise is not None else None
    out["mask"] = derive(out["nchan"], _positive, np.bool_)
    return MomentMaps(arrays=out, meta=cube.meta, channel_response=response,
                      settings={"mask": mask.describe() if mask is not None else "none",
                                "channel_response": response},
                      seconds=time.perf_counter() - t0)


def _fused_block(block, *, footprint, mask, second_differences, keep, factor_2nd, clip,
                 correction, velocity, dv, mode, threshold, rho):
    """Noise and moments of one block (nchan, rows, nx): one read, one kernel call."""
    nchan, rows, nx = block.shape
    npix = rows * nx
    fp = (np.ones(npix, dtype=np.bool_) if footprint is None
          else np.ascontiguousarray(footprint.reshape(-1)))
    m = (np.zeros((1, 1), dtype=np.bool_) if mask is None
         else np.ascontiguousarray(mask.reshape(nchan, -1)))
    sigma = np.empty(npix)
    nused = np.empty(npix, dtype=np.int64)
    nfinite = np.empty(npix, dtype=np.int64)
    res = np.empty((len(_KEYS), npix))
    args = (second_differences, keep, factor_2nd, clip, correction, velocity, dv, mode,
            threshold, m, fp, rho, sigma, nused, nfinite, res)
    if block.dtype.kind == "f" and block.dtype.itemsize == 4 and not block.dtype.isnative:
        # float32 as the file stores it: the kernel swaps the bytes as it loads them
        fused_kernel_swapped(block.reshape(nchan, -1).view(np.uint32), *args)
    else:
        fused_kernel(np.asarray(block, dtype=block.dtype.newbyteorder("=")).reshape(nchan, -1),
                     *args)
    out = {k: res[i].reshape(rows, nx) for i, k in enumerate(_KEYS)}
    out.update(sigma=sigma.reshape(rows, nx), nused=nused.reshape(rows, nx),
               finite=(nfinite > 0).reshape(rows, nx))
    return out


def noise_and_moments(cube, *, mask=None, line_free="auto", channel_response: str = "tophat",
                      max_memory: int = DEFAULT_MAX_MEMORY, progress: bool = False,
                      client=None, _strict: bool = True):
    """The noise estimate and the moment maps of ``cube`` from one read of it.

    The same numbers as :func:`kinemap.estimate_noise` followed by :func:`compute_moments`
    with that noise (the kernels share their per-spectrum code), for half the reading.

    Parameters
    ----------
    cube, mask, channel_response, max_memory, progress, client
        As for :func:`compute_moments`; a 'threshold' mask uses the noise of the same
        spectrum, estimated in the same pass.
    line_free : 'auto', None or list of (v1, v2) velocity pairs
        As for :func:`kinemap.estimate_noise`.

    Returns
    -------
    (NoiseMap, MomentMaps)
        The noise is refused as :func:`kinemap.estimate_noise` refuses it (``KinemapError``
        when nothing can be measured).  ``_strict=False`` (what :func:`compute_moments`
        does without a noise map) warns instead, returns None for the noise and NaN errors.
    """
    t0 = time.perf_counter()
    response = check_response(channel_response)
    mask = as_mask(mask, cube)
    auto, fixed, factor = noise_settings(cube, line_free, response)
    mode, threshold = _mask_mode(mask)
    nchan = cube.shape[0]

    def block_args(ys):
        return {"footprint": None if cube.footprint is None else cube.footprint[ys],
                "mask": mask.voxels()[:, ys, :] if mode in _READS_MASK else None}

    outputs = {k: ((), np.float64, np.nan) for k in _KEYS}
    outputs.update(sigma=((), np.float64, np.nan), nused=((), np.int32, 0),
                   finite=((), np.bool_, False))
    # factor 1.5: two float32 blocks (the one in the kernel and the one read ahead) are one
    # float64 block; the outputs are a few numbers per spectrum
    out = map_blocks(cube, _fused_block, outputs=outputs, max_memory=max_memory, factor=1.5,
                     block_args=block_args, progress=progress and "noise+moments",
                     client=client, prefetch=True, swap=False,
                     second_differences=fixed is None,
                     keep=np.ones(nchan, np.bool_) if fixed is None else fixed,
                     factor_2nd=factor if fixed is None else 1.0, clip=CLIP,
                     correction=clip_correction(CLIP),
                     velocity=np.ascontiguousarray(cube.velocity, dtype=np.float64),
                     dv=np.ascontiguousarray(cube.channel_width, dtype=np.float64),
                     mode=mode, threshold=threshold,
                     rho=np.ascontiguousarray(noise_correlation(response), np.float64))
    sigma, nused, finite = out.pop("sigma"), out.pop("nused"), out.pop("finite")
    try:
        noise = noise_map(sigma, nused, finite, cube.meta.bunit, auto, stacklevel=3,
                          nchan=nchan)
    except KinemapError as exc:
        if _strict:
            raise
        warnings.warn(f"moment errors are NaN: {exc}", NoiseWarning, stacklevel=3)
        noise = None
    return noise, _moment_maps(out, noise, mask, cube, response, t0)
