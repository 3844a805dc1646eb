"""Signal masks: which voxels hold emission.

Two methods:

* ``threshold``: a voxel is signal when its value exceeds ``threshold`` times the noise of
  its spectrum.
* ``smooth``: smooth-and-mask (common practice for radio cubes): smooth the cube spatially
  with a Gaussian (``smooth_beams`` beams FWHM, or ``smooth_pixels`` pixels when the cube
  has no beam) and spectrally with a boxcar of ``smooth_channels`` channels; scale each
  pixel's noise by the factor smoothing reduces noise by; keep voxels above ``threshold``
  times that noise; grow them into connected voxels above ``grow_threshold``; drop
  islands whose sky footprint is smaller than ``min_pixels`` or whose spectral extent is
  smaller than ``min_channels``.

The smooth method smooths and thresholds block by block and keeps a few bytes per voxel
of the whole cube (islands are global: :mod:`kinemap.maps._smooth_mask`); the threshold
method is computed block by block by the stages that use it.
A mask is True where a voxel counts as signal; NaN voxels are never signal.

The user's own mask (``file``: a 2D or 3D FITS image or boolean array, True / non-zero =
keep) is combined with the signal mask (``mode='and'``: a voxel counts when both keep it)
or replaces it (``mode='replace'``).  A 2D mask keeps or drops whole spectra.
"""
from __future__ import annotations

import os
from dataclasses import dataclass, field, replace

import numpy as np

from kinemap.errors import KinemapError
from kinemap.maps._smooth_mask import BYTES_PER_VOXEL, noise_factor, smooth_mask
from kinemap.parallel.blocks import DEFAULT_MAX_MEMORY
from kinemap.spectral.response import noise_correlation

__all__ = ["SignalMask", "make_mask", "as_mask", "MASK_METHODS", "MASK_MODES"]

MASK_METHODS = ("smooth", "threshold", "none")
MASK_MODES = ("and", "replace")
_MAX_KERNEL_MAPS = 10  # the widest smoothing kernel, in map widths


@dataclass(frozen=True)
class SignalMask:
    """A signal mask.

    Attributes
    ----------
    method : str
        'smooth', 'threshold', 'none' or 'given' (a boolean array from the caller).
    mask : ndarray of bool (nchan, ny, nx) or None
        Precomputed mask ('smooth', 'given'); None for 'threshold' (evaluated per block
        from ``threshold`` and the noise map) and 'none'.
    threshold : float
        S/N threshold used by 'threshold' (and the seed threshold of 'smooth').
    settings : dict
        The parameters, for provenance.
    keep : ndarray of bool (nchan, ny, nx) or None
        The user's mask a 'threshold' mask is combined with (the other methods fold it into
        ``mask``); a (ny, nx) mask is broadcast along the channels (a view, no memory).
    """

    method: str
    mask: np.ndarray | None = None
    threshold: float = 3.0
    settings: dict = field(default_factory=dict)
    keep: np.ndarray | None = None

    def describe(self) -> str:
        """The method, and the user's mask file and how it was used (for provenance)."""
        f = self.settings.get("file")
        if not f:
            return self.method
        if self.method == "file":
            return f"{f} (mode {self.settings.get('mode')})"
        return f"{self.method} and {f}"

    def voxels(self) -> np.ndarray | None:
        """The precomputed voxel mask the kernels read (``mask``, else ``keep``), or None."""
        return self.mask if self.mask is not None else self.keep

    def pixels(self) -> np.ndarray | None:
        """(ny, nx) True where a spectrum may hold signal (any kept voxel); None = all."""
        v = self.voxels()
        return None if v is None else v.any(axis=0)

    def channels(self, cs: slice) -> "SignalMask":
        """The mask of the channels ``cs`` (a velocity window of the cube)."""
        return replace(self, mask=None if self.mask is None else self.mask[cs],
                       keep=None if self.keep is None else self.keep[cs])

    def block(self, ys: slice, data: np.ndarray, noise_sigma: np.ndarray,
              footprint: np.ndarray | None = None) -> np.ndarray:
        """The mask for rows ``ys`` of a block ``data`` (nchan, rows, nx)."""
        finite = np.isfinite(data)
        if self.method == "none":
            out = finite
        elif self.mask is None:  # threshold: evaluated on the block
            with np.errstate(invalid="ignore"):
                out = finite & (data > self.threshold * noise_sigma[None])
            if self.keep is not None:
                out = out & self.keep[:, ys, :]
        else:
            out = finite & self.mask[:, ys, :]
        if footprint is not None:
            out = out & footprint[None, ys, :]
        return out


def as_mask(mask, cube) -> SignalMask | None:
    """A :class:`SignalMask` from what a caller passes as ``mask``: None, a SignalMask,
    a boolean array of shape (nchan, ny, nx) (voxels) or (ny, nx) (whole spectra), True
    where the data count as signal, or the path of a FITS mask (non-zero = keep, on the
    cube's grid; see :func:`kinemap.io.maskfile.read_mask`)."""
    if mask is None or isinstance(mask, SignalMask):
        return mask
    if isinstance(mask, (str, os.PathLike)):
        keep = _user_mask(mask, cube)
        return SignalMask(method="file", mask=keep, threshold=float("nan"),
                          settings={"file": os.path.basename(os.fspath(mask)), "mode": "replace"})
    return SignalMask(method="given", mask=_user_mask(mask, cube), threshold=float("nan"))


def _user_mask(mask, cube) -> np.ndarray:
    """The user's mask as bool (nchan, ny, nx) (2D masks broadcast as a view)."""
    shape = tuple(cube.shape)
    if isinstance(mask, (str, os.PathLike)):
        from kinemap.io.maskfile import read_mask

        arr = read_mask(mask, cube)
        if not arr.any():
            raise KinemapError(f"the mask {mask} keeps no pixel of the cube (it is zero "
                               "everywhere here); give a mask that is non-zero where to measure")
    else:
        arr = np.asarray(mask)
        if arr.dtype != bool:
            raise KinemapError(f"'mask' must be a SignalMask, a FITS file or a boolean array, "
                               f"got an array of {arr.dtype}; use mask > 0 to make one")
    if arr.shape == shape[1:]:
        arr = np.broadcast_to(arr[None], shape)
    elif arr.shape != shape:
        raise KinemapError(f"'mask' has shape {arr.shape}; give (nchan, ny, nx) = {shape} or "
                           f"(ny, nx) = {shape[1:]}")
    return arr


def _with_user_mask(signal: SignalMask, keep, name: str, mode: str) -> SignalMask:
    """``signal`` combined with the user's mask ``keep`` ('and') or replaced by it."""
    settings = {**signal.settings, "file": name, "mode": mode}
    if mode == "replace":
        return SignalMask("file", keep, float("nan"), settings)
    if signal.method == "none":
        return SignalMask("file", keep, 0.0, settings)
    if signal.mask is None:  # threshold: evaluated per block, with the user's mask
        return replace(signal, keep=keep, settings=settings)
    return replace(signal, mask=signal.mask & keep, settings=settings)


def make_mask(cube, *, noise=None, method: str = "smooth", threshold: float | None = None,
              grow_threshold: float = 2.0, smooth_beams: float = 1.5,
              smooth_pixels: float = 3.0, smooth_channels: int = 3, min_pixels: int | None = None,
              min_channels: int = 2, channel_response: str = "tophat",
              max_memory: int | None = None, file=None, mode: str = "and",
              progress: bool = False) -> SignalMask:
    """Build a :class:`SignalMask` for ``cube`` with noise map ``noise``.

    Parameters
    ----------
    cube : kinemap.io.Cube
    noise : kinemap.maps.NoiseMap, optional
        Needed by 'smooth' (and by the stages that evaluate a 'threshold' mask); estimated
        with :func:`kinemap.estimate_noise` defaults when not given.
    method : {'smooth', 'threshold', 'none'}
    threshold : float
        S/N of a signal voxel (default 3 for 'threshold', 5 for the seeds of 'smooth', whose
        noise is smoothed too; a 5-sigma seed is false once in ~3.5 million independent
        voxels, Gaussian tail).
    grow_threshold : float
        'smooth': seeds grow into connected voxels whose smoothed S/N exceeds this.
    smooth_beams, smooth_pixels : float
        'smooth': spatial smoothing FWHM in beams (cubes with a beam) or pixels.
    smooth_channels : int
        'smooth': boxcar width in channels (1 = no spectral smoothing).
    min_pixels : int, optional
        'smooth': smallest sky footprint of an island kept (default: the area of one
        resolution element of the smoothed cube, in pixels).
    min_channels : int
        'smooth': smallest spectral extent of an island kept.
    channel_response : str
        Sets the channel noise correlation used for the spectral smoothing factor.
    max_memory : int, optional
        Bytes the run may use; 'smooth' keeps 7 bytes per voxel of the whole cube (flags,
        island labels, the mask) and refuses with a clear message when they do not fit;
        it smooths the cube in blocks of rows in what is left.
    file : str, path-like or boolean array, optional
        The user's mask: a 2D or 3D FITS image (non-zero = keep) on the cube's grid (a
        larger mask on the same pixels is cut to the cube), or a boolean array (nchan, ny,
        nx) or (ny, nx).
    mode : {'and', 'replace'}
        'and': a voxel counts when the signal mask and ``file`` both keep it; 'replace':
        ``file`` alone decides (the signal-mask method is not run).
    progress : bool
        'smooth': a progress bar over the rows.
    """
    md = str(mode).strip().lower()
    if md not in MASK_MODES:
        raise KinemapError(f"'mask mode' must be one of {', '.join(MASK_MODES)}, got {mode!r}")
    if file is None:
        return _signal_mask(cube, noise, method, threshold, grow_threshold, smooth_beams,
                            smooth_pixels, smooth_channels, min_pixels, min_channels,
                            channel_response, max_memory, progress)
    keep = _user_mask(file, cube)  # read (or refused) before the slow smooth mask is made
    name = (os.path.basename(os.fspath(file)) if isinstance(file, (str, os.PathLike))
            else "array")
    if md == "replace":
        return _with_user_mask(SignalMask("none"), keep, name, md)
    signal = _signal_mask(cube, noise, method, threshold, grow_threshold, smooth_beams,
                          smooth_pixels, smooth_channels, min_pixels, min_channels,
                          channel_response, max_memory, progress)
    return _with_user_mask(signal, keep, name, md)


def _signal_mask(cube, noise, method, threshold, grow_threshold, smooth_beams, smooth_pixels,
                 smooth_channels, min_pixels, min_channels, channel_response, max_memory,
                 progress=False):
    """The signal mask of :func:`make_mask` (its parameters)."""
    m = str(method).strip().lower()
    if m not in MASK_METHODS:
        raise KinemapError(f"'mask method' must be one of {', '.join(MASK_METHODS)}, got {method!r}")
    if m == "none":
        return SignalMask("none", None, 0.0, {})
    if m == "threshold":
        t = 3.0 if threshold is None else float(threshold)
        if not t > 0:
            raise KinemapError(f"'threshold' must be positive, got {threshold!r}")
        return SignalMask("threshold", None, t, {"threshold": t})
    t = 5.0 if threshold is None else float(threshold)
    if not (t > 0 and grow_threshold > 0 and smooth_channels >= 1):
        raise KinemapError("'threshold', 'grow_threshold' and 'smooth_channels' must be positive")
    beam = cube.meta.beam
    pix = cube.meta.pixel_scale_arcsec
    if beam is not None:
        beam_fwhm_pix = float(np.sqrt(beam.major.to_value("arcsec") * beam.minor.to_value("arcsec"))) / pix
        fwhm_pix = smooth_beams * beam_fwhm_pix
    else:
        beam_fwhm_pix, fwhm_pix = 0.0, smooth_pixels
    ny, nx = cube.shape[1:]
    if not fwhm_pix <= _MAX_KERNEL_MAPS * max(ny, nx):
        # a kernel many maps wide blurs nothing into signal and can cost any amount of memory
        raise KinemapError(
            f"the smooth mask's kernel would be {fwhm_pix:.3g} pixels wide, more than "
            f"{_MAX_KERNEL_MAPS} times the {nx} x {ny} pixel map: the beam (BMAJ/BMIN, in "
            "degrees) looks wrong; give the beam with --beam, or use --mask threshold")
    if min_pixels is None:
        # one resolution element of the smoothed cube: noise islands are about this big,
        # so a real source must cover more.  1.1331 = pi / (4 ln 2), Gaussian area / FWHM^2.
        # The element is cut to the map: on a map one row (or a few pixels) wide no island
        # can be wider than the map, and an uncut element would drop every island.
        width = float(np.hypot(beam_fwhm_pix, fwhm_pix))
        area = 1.1331 * min(width, ny) * min(width, nx)
        min_pixels = int(max(1, min(round(area), ny * nx)))
    if noise is None:
        from kinemap.maps.noise import estimate_noise

        noise = estimate_noise(cube, channel_response=channel_response)
    need = BYTES_PER_VOXEL * int(np.prod(cube.shape))
    if max_memory is not None and need > max_memory:
        raise KinemapError(
            f"the smooth mask keeps {BYTES_PER_VOXEL} bytes per voxel of the whole cube "
            f"({need / 1e9:.1f} GB) and --max-memory is {max_memory / 1e9:.1f} GB; use "
            "--mask threshold or raise --max-memory")
    sig = fwhm_pix / 2.354820045
    factor = noise_factor(cube, sig, int(smooth_channels), noise_correlation(channel_response))
    # Islands grow through blank spectra where the smoothed emission reaches them (the
    # noise there is the median noise), so blanks scattered over a source do not break it
    # into islands too small to keep; blank voxels are never signal in the end.
    sigma = noise.sigma
    if np.isfinite(sigma).any():
        sigma = np.where(np.isfinite(sigma), sigma, np.nanmedian(sigma))
    grown = smooth_mask(cube, scale=sigma * factor, sig=sig, nbox=int(smooth_channels),
                        seed=t, grow=grow_threshold, min_pixels=int(min_pixels),
                        min_channels=int(min_channels),
                        max_memory=max_memory or DEFAULT_MAX_MEMORY, progress=progress)
    settings = {"threshold": t, "grow_threshold": grow_threshold, "smooth_fwhm_pixels": fwhm_pix,
                "smooth_channels": int(smooth_channels), "min_pixels": int(min_pixels),
                "min_channels": int(min_channels), "smoothed_noise_factor": factor}
    return SignalMask("smooth", grown, t, settings)
