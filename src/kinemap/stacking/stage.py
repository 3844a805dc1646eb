"""The stacking stage: shift every spectrum by its velocity, average per bin, fit.

``stack_spectra(cube, velocity_map, bins)`` shifts each spectrum of a bin so that its
velocity (from a velocity map: moment 1, Gaussian fits or a model field) lands on offset
0 (:mod:`.shift`, flux-conserving Fourier shift), averages the shifted spectra of the bin
channel by channel and fits the average with one or two Gaussians
(:func:`kinemap.linefit.fit.fit_spectra`; with ``components='auto'`` the lower BIC wins).
A faint line that no single spectrum shows comes out of the average of many.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import ClassVar

import astropy.units as u
import numpy as np
from astropy.table import Table

from kinemap.errors import KinemapError
from kinemap.io.products import Product
from kinemap.io.results import StageResult
from kinemap.parallel.blocks import block_rows
from kinemap.stacking.bins import Bins
from kinemap.stacking.shift import stack_axis, shift_to_rest

__all__ = ["stack_spectra", "StackedSpectra", "COVERAGE"]

KMS = u.km / u.s
# channels of a stack that fewer than this fraction of its spectra reach are not fitted
COVERAGE = 0.9
# a fitted stack whose integrated intensity is below this many errors is rejected: across
# the ~100 channels of a stack a 3-sigma noise peak is likely (about 1 - Phi(3)^100 = 13
# per cent) and its fit passes the fitter's peak test; a 5-sigma line is not noise
SNR_THRESHOLD = 5.0


@dataclass(frozen=True)
class StackedSpectra(StageResult):
    """Stacked spectra per bin and their Gaussian fits.

    ``stacked_spectra`` (a table: bin, velocity offset, mean flux, its error, number of
    spectra per channel, fitted model) and ``stack_fits`` (one row per bin: the bin's
    range, spectra stacked, components, dispersion, velocity offset, amplitude,
    integrated intensity with errors, and a second component's where one was chosen).
    """

    name: ClassVar[str] = "stack"

    spectra: Table
    fits: Table
    meta: object
    settings: dict = field(default_factory=dict)
    seconds: float = 0.0

    def products(self) -> list[Product]:
        return [Product("stacked_spectra", self.spectra, u.one,
                        "spectra shifted by their velocity and averaged per bin", "table"),
                Product("stack_fits", self.fits, u.one,
                        "Gaussian fits of the stacked spectra, one row per bin", "table")]

    def summary(self) -> dict:
        f = self.fits
        ok = np.isfinite(np.asarray(f["dispersion"], dtype=float))
        return {"bins": int(len(f)), "bins_fitted": int(ok.sum()),
                "spectra_stacked": int(np.sum(f["n_spectra"])),
                "binned_by": self.settings.get("binned_by", "")}


def _beam_pixels(meta) -> float:
    """Beam area in pixels (1 without a beam): the noise is taken to be correlated over
    one beam, as in a synthesis image (common practice)."""
    beam = getattr(meta, "beam", None)
    if beam is None:
        return 1.0
    pix = meta.pixel_scale_arcsec
    return max(1.0, float(beam.sr.to_value(u.arcsec ** 2)) / pix ** 2)


def _accumulate(cube, velocity, labels, sigma, nbin, axis, max_memory, progress):
    """Sums over the spectra of each bin: flux, noise variance and spectra per channel."""
    flux = np.zeros((nbin, axis.m))
    var = np.zeros((nbin, axis.m))
    count = np.zeros((nbin, axis.m), dtype=np.int64)
    nchan, ny, nx = cube.shape
    # per spectrum: the block row (float64), the padded and shifted rows, their transform
    # (complex, half length) and the coverage mask: about 3 padded lengths of float64
    rows = block_rows(cube.shape, max_memory=max_memory, factor=3.0 * axis.m / nchan + 2.0)
    bar = None
    if progress:
        from tqdm.auto import tqdm

        bar = tqdm(total=ny, unit="row", desc="stack", leave=False, disable=None)
    for y0 in range(0, ny, rows):
        y1 = min(ny, y0 + rows)
        lab = labels[y0:y1].ravel()
        take = np.flatnonzero(lab >= 0)
        if take.size:
            block = np.asarray(cube.data[:, y0:y1, :], dtype=np.float64).reshape(nchan, -1)
            shifted, covered = shift_to_rest(block[:, take].T, velocity[y0:y1].ravel()[take],
                                             axis)
            s2 = (sigma[y0:y1].ravel()[take] ** 2)[:, None]
            for b in np.unique(lab[take]):
                sel = lab[take] == b
                flux[b] += np.where(covered[sel], shifted[sel], 0.0).sum(axis=0)
                var[b] += np.where(covered[sel], s2[sel], 0.0).sum(axis=0)
                count[b] += covered[sel].sum(axis=0)
        if bar is not None:
            bar.update(y1 - y0)
    if bar is not None:
        bar.close()
    return flux, var, count


def _usable(cube, velocity, bins, noise, mask):
    """Labels of pixels that join a stack: in a bin, a finite velocity inside the band, a
    finite noise, inside the footprint and (with a mask) with signal."""
    v = np.asarray(velocity, dtype=np.float64)
    if v.shape != cube.shape[1:]:
        raise KinemapError(f"the velocity map has shape {v.shape}, the cube's sky grid "
                           f"{cube.shape[1:]}; give a map on the cube's pixel grid")
    if bins.labels.shape != cube.shape[1:]:
        raise KinemapError(f"the bin map has shape {bins.labels.shape}, the cube's sky grid "
                           f"{cube.shape[1:]}; give a map on the cube's pixel grid")
    lo, hi = float(np.min(cube.velocity)), float(np.max(cube.velocity))
    with np.errstate(invalid="ignore"):
        ok = (bins.labels >= 0) & np.isfinite(v) & (v >= lo) & (v <= hi)
        ok &= np.isfinite(noise) & (noise > 0)
    if cube.footprint is not None:
        ok &= cube.footprint
    if mask is not None:
        ok &= mask
    return np.where(ok, bins.labels, -1), v


def _fit(mean, err, count, axis, components, channel_response):
    """Fit each stacked spectrum on its well-covered channels; returns (result, model)."""
    from kinemap.linefit.fit import fit_spectra, model_spectra

    nbin = mean.shape[0]
    full = count >= COVERAGE * np.maximum(count.max(axis=1, keepdims=True), 1)
    data = np.where(full & (count > 0), mean, np.nan)
    with np.errstate(invalid="ignore"):
        noise = np.array([np.nanmedian(np.where(full[b], err[b], np.nan))
                          if full[b].any() and count[b].max() > 0 else np.nan
                          for b in range(nbin)])
    # the noise correlation between neighbouring spectra, shifted by different amounts, is
    # only roughly known: the errors follow the stack's own scatter about the fit
    res = fit_spectra(data, np.nan_to_num(noise, nan=-1.0), axis.offsets, ncomp=components,
                      max_components=2, response=channel_response, order="flux",
                      scale_errors=True)
    res = _reject_faint(res)
    model = model_spectra(res.params, axis.offsets, model=res.model, response=channel_response)
    return res, model


def _reject_faint(res):
    """Fits whose total integrated intensity is under SNR_THRESHOLD errors: TOO_FAINT,
    values NaN (as the fitter leaves spectra it does not fit)."""
    from dataclasses import fields, replace

    from kinemap.status import Status

    with np.errstate(invalid="ignore", divide="ignore"):
        total = np.nansum(res.integrated, axis=1)
        err = np.sqrt(np.nansum(res.integrated_err ** 2, axis=1))
        faint = ~(total / err >= SNR_THRESHOLD) & np.isin(res.status, (Status.OK, Status.AT_BOUND))
    if not faint.any():
        return res
    changes = {}
    for f in fields(res):
        val = getattr(res, f.name)
        if isinstance(val, np.ndarray) and val.dtype.kind == "f" and f.name not in ("peak_snr",):
            val = val.copy()
            val[faint] = np.nan
            changes[f.name] = val
    status = res.status.copy()
    status[faint] = Status.TOO_FAINT
    ncomp = res.ncomp.copy()
    ncomp[faint] = 0
    return replace(res, status=status, ncomp=ncomp, **changes)


def _noise_scale(mean, err, model, count):
    """Per bin, the robust scatter (1.4826 MAD) of the stack about its fit in units of the
    estimated error, on the channels the fit used; 1 where there is no fit.  The estimate
    counts every pair of spectra within a beam as fully correlated, which shifting by
    different velocities undoes in part: the scatter says by how much."""
    full = count >= COVERAGE * np.maximum(count.max(axis=1, keepdims=True), 1)
    out = np.ones(mean.shape[0])
    for b in range(mean.shape[0]):
        with np.errstate(invalid="ignore", divide="ignore"):
            z = ((mean[b] - model[b]) / err[b])[full[b] & (count[b] > 0)]
        z = z[np.isfinite(z)]
        if z.size >= 10:
            out[b] = 1.4826 * float(np.median(np.abs(z - np.median(z))))
    return np.where(np.isfinite(out) & (out > 0), out, 1.0)


def _spectra_table(mean, err, count, model, axis, unit):
    b, j = np.nonzero(count > 0)
    t = Table()
    t["bin"] = b.astype(np.int32)
    t["velocity"] = axis.offsets[j] * KMS
    t["flux"] = mean[b, j] * unit
    t["flux_err"] = err[b, j] * unit
    t["n_spectra"] = count[b, j].astype(np.int32)
    t["model"] = model[b, j] * unit
    t["velocity"].description = "offset from each spectrum's own velocity"
    t["flux"].description = "mean of the shifted spectra"
    t["model"].description = "fitted Gaussians (NaN where the fit failed)"
    return t


def _fits_table(bins, res, count, radius_mean, unit):
    t = Table()
    t["bin"] = np.arange(bins.nbin, dtype=np.int32)
    q = bins.quantity
    t[f"{q}_lo"] = bins.edges[:-1] * bins.unit
    t[f"{q}_hi"] = bins.edges[1:] * bins.unit
    t[q] = radius_mean * bins.unit
    t[q].description = f"mean {q} of the stacked pixels"
    t["n_spectra"] = count.max(axis=1).astype(np.int32)
    t["n_components"] = res.ncomp.astype(np.int32)
    units = {"dispersion": KMS, "velocity": KMS, "amplitude": unit, "integrated": unit * KMS}
    for c, suffix in ((0, ""), (1, "_2")):
        for name, un in units.items():
            if getattr(res, name).shape[1] <= c:
                continue
            t[name + suffix] = getattr(res, name)[:, c] * un
            t[name + suffix + "_err"] = getattr(res, name + "_err")[:, c] * un
    t["chi2_reduced"] = res.chi2_reduced
    t["bic"] = res.bic
    t["peak_snr"] = res.peak_snr
    t["status"] = res.status.astype(np.int32)
    return t


def stack_spectra(cube, velocity_map, bins: Bins, *, noise=None, mask=None,
                  components="auto", channel_response: str = "tophat",
                  max_memory: int = 2 * 10 ** 9, progress: bool = False) -> StackedSpectra:
    """Shift the spectra of ``cube`` by ``velocity_map``, average them per bin and fit.

    Parameters
    ----------
    cube : kinemap.io.cube.Cube
        Continuum-subtracted cube with a uniform velocity axis.  NaN channels count as
        missing (the mean of a channel uses the spectra that reach it).
    velocity_map : array (ny, nx) or Quantity
        Velocity of each spectrum (km/s, the cube's convention and frame); NaN pixels and
        velocities outside the band are left out.
    bins : Bins
        From :func:`kinemap.stacking.bins.radial_bins` or :func:`~kinemap.stacking.bins.map_bins`.
    noise : NoiseMap or array (ny, nx), optional
        1-sigma noise per channel; default: estimated from the cube.
    mask : bool array (ny, nx), optional
        Only pixels where True are stacked.
    components : 1, 2 or 'auto'
        Gaussians fitted to each stacked spectrum; a fit whose integrated intensity is
        under ``SNR_THRESHOLD`` (5) errors is rejected (status TOO_FAINT, values NaN); 'auto' fits 1 and 2 and keeps the lower
        BIC (Schwarz 1978) among the acceptable fits (see ``fit_spectra``).
    channel_response : {'tophat', 'hanning', 'none'}
        Channel response of the fitted model.

    Returns
    -------
    StackedSpectra

    Notes
    -----
    Each spectrum contributes only on the channels its data reach after the shift: the
    shift's ripple from the noise at the band's ends, which spreads beyond them, is left
    out (flux is conserved exactly for lines that end inside the band).
    ``flux`` is the mean of the shifted spectra (the cube's unit); ``flux_err`` is
    sqrt(sum sigma_i^2 * min(n, A)) / n with A the beam area in pixels (noise correlated
    over one beam; 1 without a beam), times the bin's ``noise_scale`` (the robust scatter
    of the stack about its fit in those units).  The fits' errors are scaled by
    sqrt(chi2_reduced), so
    they follow the stack's scatter about the fit (shifting neighbouring spectra by different
    amounts decorrelates part of their noise, so the formula above is only an upper bound
    when A > 1).  The dispersion is the intrinsic Gaussian sigma of the
    stacked line: it includes any scatter of the velocity map about the true velocities
    (added in quadrature) and beam smearing within the pixels.
    """
    t0 = time.perf_counter()
    if components not in (1, 2, "auto"):
        raise KinemapError(f"'components' must be 1, 2 or 'auto', got {components!r}")
    if cube.nchan < 4:
        raise KinemapError(f"stacking needs at least 4 channels, the cube has {cube.nchan}")
    dv = np.diff(cube.velocity)
    if not np.allclose(dv, dv[0], rtol=1e-4, atol=0):
        raise KinemapError("stacking needs channels of equal velocity width; this cube's "
                           "widths vary by more than 1e-4 (a frequency axis has equal widths "
                           "in --convention radio, a wavelength axis in optical)")
    if noise is None:
        from kinemap.maps.noise import estimate_noise

        noise = estimate_noise(cube, channel_response=channel_response)
    sigma = np.asarray(getattr(noise, "sigma", noise), dtype=np.float64)
    if isinstance(velocity_map, u.Quantity):
        velocity_map = velocity_map.to_value(KMS)
    labels, v = _usable(cube, velocity_map, bins, sigma, mask)
    if not np.any(labels >= 0):
        raise KinemapError("no pixel joins a stack: every pixel is outside the bins, has no "
                           "velocity inside the band or no noise; check the velocity map, "
                           "the bins (--edges, --center) and the mask")
    axis = stack_axis(cube.velocity)
    flux, var, count = _accumulate(cube, v, labels, sigma, bins.nbin, axis, max_memory,
                                   progress)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = flux / count
        corr = np.minimum(count, _beam_pixels(cube.meta))
        err = np.sqrt(var * corr) / count
        value_mean = np.array([np.nanmean(bins.values[labels == b]) if np.any(labels == b)
                               else math.nan for b in range(bins.nbin)])
    res, model = _fit(mean, err, count, axis, components, channel_response)
    scale = _noise_scale(mean, err, model, count)
    err = err * scale[:, None]
    unit = cube.meta.bunit
    spectra = _spectra_table(mean, err, count, model, axis, unit)
    fits = _fits_table(bins, res, count, value_mean, unit)
    fits["noise_scale"] = scale
    fits["noise_scale"].description = ("flux_err over the beam-correlation estimate: the "
                                       "stack's robust scatter about its fit")
    for t in (spectra, fits):
        t.meta.update(binned_by=bins.description, quantity=bins.quantity,
                      channel_width_kms=abs(axis.dv),
                      conventions="dispersion = Gaussian sigma; velocity = offset from each "
                                  "spectrum's own velocity",
                      status_codes="kinemap.status.Status: 0 OK, 1 NOT_CONVERGED, 2 AT_BOUND, "
                                   "3 TOO_FAINT, 5 NO_DATA, 7 FAILED")
    settings = {"binned_by": bins.description, "components": components,
                "channel_response": channel_response}
    return StackedSpectra(spectra=spectra, fits=fits, meta=cube.meta, settings=settings,
                          seconds=time.perf_counter() - t0)
