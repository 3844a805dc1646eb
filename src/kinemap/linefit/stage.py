"""The line-fit stage of a run: fit every spectrum of a cube, block by block.

Which pixels are fitted: all pixels inside the user's region, except that a smooth-and-
mask signal mask restricts the fits to pixels with signal (others get status MASKED);
spectra whose peak S/N is below ``snr_threshold`` are not fitted (TOO_FAINT).  Each
spectrum is fitted over all its finite channels.

Products: the first component (in the chosen order: by flux, brightest first, or by
velocity) gives ``velocity``, ``dispersion`` (intrinsic sigma), ``amplitude`` and their
errors; ``integrated`` is the sum over components; with more than one component each
also gets ``velocity_<k>``, ``dispersion_<k>``, ``amplitude_<k>``, ``integrated_<k>``.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field, replace
from typing import ClassVar

import astropy.constants as const
import astropy.units as u
import numpy as np

from kinemap.units import KMS, to_value
from kinemap.parallel.blocks import DEFAULT_MAX_MEMORY, map_blocks
from kinemap.errors import KinemapError
from kinemap.io.products import Product
from kinemap.io.results import StageResult
from kinemap.parallel.blocks import read_rows
from kinemap.status import STATUS_DESCRIPTIONS, Status
from kinemap.linefit._result import COMPONENT_QUANTITIES
from kinemap.linefit.fit import fit_block, model_block, model_spectra

__all__ = ["LineFitMaps", "ModelCubes", "fit_cube", "model_cubes", "instrument_sigma_from"]

FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))
RING_MIN_SNR = 5.0  # integrated S/N a pixel needs to enter a ring fit


def instrument_sigma_from(*, instrument_sigma=None, resolving_power=None) -> float:
    """Instrumental Gaussian sigma in km/s from a sigma or a resolving power R (FWHM = c/R)."""
    if instrument_sigma is not None and resolving_power is not None:
        raise KinemapError("give either --instrument-sigma or --resolving-power, not both")
    if resolving_power is not None:
        r = float(resolving_power)
        if not r > 0:
            raise KinemapError(f"'resolving_power' must be positive, got {resolving_power!r}")
        return const.c.to_value(KMS) / r / FWHM_PER_SIGMA
    if instrument_sigma is not None:
        s = float(to_value(instrument_sigma, KMS, name="instrument_sigma"))
        if not s >= 0:
            raise KinemapError(f"'instrument_sigma' must be >= 0 km/s, got {instrument_sigma!r}")
        return s
    return 0.0


def _fit_block_fn(block, *, noise, pixel_mask, velocity, options, ncomp_max, npar):
    """Fit one block (nchan, rows, nx): runs in this process or on a worker."""
    res = fit_block(block, noise, velocity, mask=pixel_mask, **options)
    m = res.maps()
    out = {k: m[k] for k in ("status", "ncomp", "chi2_reduced", "peak_snr", "params", "errors")}
    for q in COMPONENT_QUANTITIES:
        out[q] = m[q][:ncomp_max]
        out[q + "_err"] = m[q + "_err"][:ncomp_max]
    out["status"] = out["status"].astype(np.int16)
    out["ncomp"] = out["ncomp"].astype(np.int16)
    return out


_PIXEL_KEYS = ("status", "ncomp", "chi2_reduced", "peak_snr")


@dataclass(frozen=True)
class LineFitMaps(StageResult):
    """Gaussian fits of every spectrum of a cube.

    Every product is an attribute, a ``spectral_cube.Projection`` with unit, celestial WCS
    and beam: ``velocity``, ``velocity_err``, ``dispersion`` (intrinsic sigma),
    ``dispersion_err``, ``observed_dispersion``, ``amplitude``, ``amplitude_err``,
    ``integrated``, ``integrated_err``, ``baseline``, ``chi2_reduced``, ``snr``,
    ``fit_status``, ``n_components``, and per component ``velocity_1``, ``dispersion_1``,
    ... when more than one is fitted.  The first component is the brightest (or the
    lowest velocity with ``order='velocity'``).

    Attributes
    ----------
    component_arrays : dict of ndarray (k, ny, nx)
        Per-component values and ``_err`` errors, float64 (km/s or the cube unit).
    pixel_arrays : dict of ndarray (ny, nx)
        ``status`` codes (:mod:`kinemap.status`), ``ncomp``, ``chi2_reduced``, ``peak_snr``.
    params, errors : ndarray (npar, ny, nx)
        Fitted parameters in ``param_names`` order and their 1-sigma errors.
    examples : tuple of dict
        The brightest, median and faintest accepted spectra with their models (for plots).
    """

    name: ClassVar[str] = "fit"

    component_arrays: dict
    pixel_arrays: dict
    params: np.ndarray
    errors: np.ndarray
    param_names: tuple
    meta: object
    settings: dict = field(default_factory=dict)
    model_options: dict = field(default_factory=dict)
    examples: tuple = ()
    seconds: float = 0.0

    @property
    def status(self) -> np.ndarray:
        """Fit status code per pixel (an int array; see :mod:`kinemap.status`)."""
        return self.pixel_arrays["status"]

    @property
    def ncomp_max(self) -> int:
        return int(self.component_arrays["velocity"].shape[0])

    def component(self, quantity: str, k: int = 0) -> np.ndarray:
        """Plain array (ny, nx) of ``quantity`` (e.g. 'velocity', 'dispersion_err') for
        component ``k`` (0-based)."""
        return self.component_arrays[quantity][k]

    def velocity_field(self, *, min_snr: float = RING_MIN_SNR):
        """(velocity, velocity error, intensity) arrays of the first component, for a ring
        fit.

        Pixels whose integrated intensity has S/N below ``min_snr`` are left out (NaN): a
        noise spike fitted at the edge of the emission has a deceptively small velocity
        error and would pull the rings.
        """
        tot, err = self.integrated_total()
        with np.errstate(invalid="ignore", divide="ignore"):
            keep = (self.status == Status.OK) & (tot / err >= min_snr)
        return (np.where(keep, self.component("velocity"), np.nan),
                np.where(keep, self.component("velocity_err"), np.nan), tot)

    def integrated_total(self):
        """Sum of the components' integrated intensities and its error (independent errors)."""
        c, n = self.component_arrays, self.pixel_arrays["ncomp"]
        total = np.where(n > 0, np.nansum(c["integrated"], axis=0), np.nan)
        err = np.where(n > 0, np.sqrt(np.nansum(c["integrated_err"] ** 2, axis=0)), np.nan)
        return total, err

    def products(self) -> list[Product]:
        b = self.meta.bunit
        c, px = self.component_arrays, self.pixel_arrays
        tot, tot_err = self.integrated_total()
        codes = "; ".join(f"{int(code)} {code.name.lower()}" for code in Status)
        out = [
            Product("velocity", c["velocity"][0], KMS, "line-of-sight velocity (Gaussian fit)", "velocity"),
            Product("velocity_err", c["velocity_err"][0], KMS, "1-sigma error of the velocity", "error"),
            Product("dispersion", c["dispersion"][0], KMS,
                    "intrinsic dispersion sigma (instrument and channel response removed)", "dispersion"),
            Product("dispersion_err", c["dispersion_err"][0], KMS, "1-sigma error of the dispersion", "error"),
            Product("observed_dispersion", c["observed_dispersion"][0], KMS,
                    "dispersion with the instrument (before channel averaging)", "dispersion", plot=False),
            Product("amplitude", c["amplitude"][0], b, "peak of the fitted Gaussian", "intensity"),
            Product("amplitude_err", c["amplitude_err"][0], b, "1-sigma error of the amplitude", "error",
                    plot=False),
            Product("integrated", tot, b * KMS, "integrated intensity of the fitted components", "intensity"),
            Product("integrated_err", tot_err, b * KMS, "1-sigma error of the integrated intensity",
                    "error", plot=False),
            Product("chi2_reduced", px["chi2_reduced"], u.one, "reduced chi-square of the fit", "other"),
            Product("snr", px["peak_snr"], u.one, "peak signal-to-noise of the spectrum", "other"),
            Product("fit_status", self.status.astype(np.int16), u.one,
                    "fit status code (kinemap.status)", "status",
                    extra_header={"STATCODE": codes[:68]}),
            Product("n_components", px["ncomp"].astype(np.int16), u.one,
                    "number of Gaussian components", "count"),
            self._baseline_product(),
        ]
        if self.ncomp_max > 1:
            for k in range(self.ncomp_max):
                n = k + 1
                out += [
                    Product(f"velocity_{n}", c["velocity"][k], KMS, f"velocity of component {n}", "velocity"),
                    Product(f"dispersion_{n}", c["dispersion"][k], KMS, f"dispersion of component {n}",
                            "dispersion"),
                    Product(f"amplitude_{n}", c["amplitude"][k], b, f"amplitude of component {n}",
                            "intensity", plot=False),
                    Product(f"integrated_{n}", c["integrated"][k], b * KMS,
                            f"integrated intensity of component {n}", "intensity", plot=False),
                ]
        return out

    def _baseline_product(self) -> Product:
        b = self.meta.bunit
        if "baseline" in self.param_names:
            i = self.param_names.index("baseline")
            return Product("baseline", self.params[i], b, "fitted baseline level (centre channel)",
                           "intensity", plot=False)
        # the key is always there, so scripts need not branch on the option
        fitted = np.isin(self.status, (Status.OK, Status.AT_BOUND))
        return Product("baseline", np.where(fitted, 0.0, np.nan), b,
                       "baseline level: none fitted (zero by assumption)", "intensity", plot=False)

    def summary(self) -> dict:
        counts = {c.name.lower(): int((self.status == c).sum()) for c in Status
                  if (self.status == c).any()}
        ok = self.status == Status.OK
        n = self.pixel_arrays["ncomp"]
        return {"status_counts": counts,
                "median_dispersion_kms": float(np.nanmedian(self.component("dispersion")[ok]))
                if ok.any() else None,
                "components_used": {str(k): int((n == k).sum()) for k in range(0, self.ncomp_max + 1)},
                "seconds": self.seconds}

    def _axes(self, velocity):
        axes = self.settings.get("velocity_axes")
        return velocity if axes is None else axes

    def model_cube(self, cube, *, dtype=np.float32) -> np.ndarray:
        """Model cube (nchan, ny, nx) of the fits (NaN where not fitted)."""
        return model_block(self.params, self._axes(cube.velocity), dtype=dtype,
                           **self.model_options)

    def model_spectrum(self, velocity, y, x) -> np.ndarray:
        return model_spectra(self.params[:, y, x], self._axes(velocity), **self.model_options)


def _noise_and_mask(cube, noise, mask, *, channel_response, max_memory, progress, client):
    """The caller's noise and mask, or estimates with the defaults."""
    from kinemap.maps import as_mask, estimate_noise, make_mask

    if noise is None:
        noise = estimate_noise(cube, channel_response=channel_response, max_memory=max_memory,
                               progress=progress, client=client)
    if mask is None:
        mask = make_mask(cube, noise=noise, channel_response=channel_response,
                         max_memory=max_memory)
    return noise, as_mask(mask, cube)


_NOTHING_FITTED_FIX = {
    Status.TOO_FAINT: "lower --snr-threshold, or check that the line lies in the band",
    Status.MASKED: "use a wider mask (--mask threshold or --mask none) or a larger --region",
    Status.NO_DATA: "check that the cube has data and more channels than the model has "
                    "parameters",
}


def _refuse_if_nothing_fitted(velocity, status, snr_threshold):
    """A fit in which no pixel has a finite velocity is refused with the commonest
    reason, instead of maps that are NaN everywhere."""
    if np.isfinite(velocity).any():
        return
    codes, counts = np.unique(status, return_counts=True)
    common = Status(int(codes[np.argmax(counts)]))
    reason = STATUS_DESCRIPTIONS[common].replace("threshold", f"threshold {snr_threshold:g}")
    fix = _NOTHING_FITTED_FIX.get(common, "check the cube's spectral axis and the fit options")
    raise KinemapError(f"no spectrum could be fitted ({int(counts.max())} of {status.size} "
                       f"pixels: {reason}); {fix}")


def _example_pixels(status, total) -> list[tuple[str, int, int]]:
    """(label, y, x) of the brightest, median and faintest accepted pixel."""
    vals = np.where(status == Status.OK, total, np.nan)
    flat = np.flatnonzero(np.isfinite(vals))
    if flat.size == 0:
        return []
    order = flat[np.argsort(vals.ravel()[flat])]
    picks = [("brightest", order[-1]), ("median", order[order.size // 2]), ("faintest", order[0])]
    nx = status.shape[1]
    return [(label, int(i // nx), int(i % nx)) for label, i in picks]


def _examples(fit: LineFitMaps, cube) -> tuple:
    """Three spectra with their fits, kept on the result so plots need not read the cube."""
    out = []
    for label, y, x in _example_pixels(fit.status, fit.integrated_total()[0]):
        spec = read_rows(cube, slice(y, y + 1), dtype=np.float64)[:, 0, x]
        out.append({"label": label, "y": y, "x": x, "axis": np.asarray(cube.velocity),
                    "data": spec, "model": fit.model_spectrum(cube.velocity, y, x),
                    **{q: float(fit.component(q)[y, x]) for q in
                       ("velocity", "velocity_err", "dispersion", "dispersion_err")}})
    return tuple(out)


def fit_cube(cube, *, noise=None, mask=None, components=1, baseline: str = "none",
             channel_response: str = "tophat", instrument_sigma=None, resolving_power=None,
             order: str = "flux", snr_threshold: float = 3.0, min_separation: float = 1.0,
             min_component_snr: float = 3.0, model=None, velocity_axes=None,
             max_memory: int = DEFAULT_MAX_MEMORY, progress: bool = False,
             client=None) -> LineFitMaps:
    """Gaussian fits of every spectrum of ``cube`` (see the module docstring).

    Parameters
    ----------
    cube : kinemap.io.Cube
    noise : kinemap.maps.NoiseMap, optional
        Per-pixel noise; estimated with :func:`kinemap.estimate_noise` when not given.
    mask : SignalMask or boolean array (nchan, ny, nx) or (ny, nx), optional
        Which spectra to fit (pixels with any signal voxel); default: a smooth-and-mask
        mask made with :func:`kinemap.make_mask`.  ``make_mask(cube, method='none')`` fits
        every spectrum above ``snr_threshold``.
    components : 1, 2, 3 or 'auto'
        'auto' compares 1-3 components by BIC (Schwarz 1978).
    baseline : {'none', 'constant', 'linear'}
    channel_response : {'tophat', 'hanning', 'none'}
    instrument_sigma : Quantity, str or float (km/s), optional
        Gaussian instrumental sigma (none by default); or ``resolving_power`` R, with
        FWHM = c / R.
    order : {'flux', 'velocity'}
        Order of components: brightest first (default) or by increasing velocity.
    model : kinemap.linefit.LineModel, optional
        A tied multi-line model (then ``components`` is ignored and each component is one
        line, in the model's order).
    velocity_axes : ndarray (naxes, nchan), optional
        One velocity axis per line of ``model`` (km/s); default the cube's velocity axis.
    """
    t0 = time.perf_counter()
    noise, mask = _noise_and_mask(cube, noise, mask, channel_response=channel_response,
                                  max_memory=max_memory, progress=progress, client=client)
    comps = components if components == "auto" else int(components)
    if comps not in (1, 2, 3, "auto"):
        raise KinemapError(f"'components' must be 1, 2, 3 or auto, got {components!r}")
    if order not in ("flux", "velocity"):
        raise KinemapError(f"'order' must be 'flux' or 'velocity', got {order!r}")
    ncomp_max = 3 if comps == "auto" else comps
    sigma_instr = instrument_sigma_from(instrument_sigma=instrument_sigma,
                                        resolving_power=resolving_power)
    options = dict(ncomp=comps, baseline=baseline, response=channel_response,
                   instrument_sigma=sigma_instr, order=order,
                   snr_threshold=float(snr_threshold), min_separation=float(min_separation),
                   min_component_snr=float(min_component_snr))
    velocity = np.ascontiguousarray(cube.velocity if velocity_axes is None else velocity_axes,
                                    dtype=np.float64)
    if model is not None:
        options = {k: v for k, v in options.items() if k not in ("ncomp", "baseline", "order")}
        options["model"] = model
        ncomp_max = len(model.components)
    # parameter names of the reported model (probe one tiny fit, cheap)
    probe = fit_block(np.zeros((cube.nchan, 1)), np.ones(1), velocity, **options)
    names = tuple(probe.param_names)
    npar = len(names)
    pixel_mask_full = None
    if mask is not None and mask.voxels() is not None:
        pixel_mask_full = mask.pixels()
    if cube.footprint is not None:
        pixel_mask_full = cube.footprint if pixel_mask_full is None else pixel_mask_full & cube.footprint

    def block_args(ys):
        return {"noise": noise.sigma[ys],
                "pixel_mask": None if pixel_mask_full is None else np.ascontiguousarray(pixel_mask_full[ys])}

    lead = (ncomp_max,)
    outputs = {"status": ((), np.int16, int(Status.NO_DATA)), "ncomp": ((), np.int16, 0),
               "chi2_reduced": ((), np.float64, np.nan), "peak_snr": ((), np.float64, np.nan),
               "params": ((npar,), np.float64, np.nan), "errors": ((npar,), np.float64, np.nan)}
    for q in COMPONENT_QUANTITIES:
        outputs[q] = (lead, np.float64, np.nan)
        outputs[q + "_err"] = (lead, np.float64, np.nan)
    out = map_blocks(cube, _fit_block_fn, outputs=outputs, max_memory=max_memory, factor=4.0,
                     block_args=block_args, progress=progress and "fit", client=client,
                     velocity=velocity, options=options, ncomp_max=ncomp_max, npar=npar)
    model_options = {"model": probe.model, "instrument_sigma": probe.instrument_sigma,
                     "response": probe.response}
    settings_extra = {"velocity_axes": velocity if velocity.ndim == 2 else None}
    settings = {k: v for k, v in options.items() if k != "model"}
    settings.update({k: v for k, v in settings_extra.items() if v is not None})
    settings["descriptions"] = {int(k): v for k, v in STATUS_DESCRIPTIONS.items()}
    _refuse_if_nothing_fitted(out["velocity"], out["status"], snr_threshold)
    comp = {}
    for q in COMPONENT_QUANTITIES:
        comp[q], comp[q + "_err"] = out[q], out[q + "_err"]
    fit = LineFitMaps(component_arrays=comp, pixel_arrays={k: out[k] for k in _PIXEL_KEYS},
                      params=out["params"], errors=out["errors"], param_names=names,
                      meta=cube.meta, settings=settings, model_options=model_options)
    return replace(fit, examples=_examples(fit, cube), seconds=time.perf_counter() - t0)


@dataclass(frozen=True)
class ModelCubes(StageResult):
    """Model and residual cubes of the line fits (held in memory: ``--write-model`` only).

    ``model`` and ``residual`` are arrays (nchan, ny, nx) in the cube's unit, on the
    channels of the fitted cube (``meta.wcs3d``)."""

    name: ClassVar[str] = "model"

    model: np.ndarray
    residual: np.ndarray
    meta: object = None

    def products(self) -> list[Product]:
        wcs = None if self.meta is None else self.meta.wcs3d
        b = self.meta.bunit
        return [Product("model", self.model, b, "model cube of the Gaussian fits", "cube",
                        plot=False, wcs=wcs),
                Product("residual", self.residual, b, "data minus model cube", "cube",
                        plot=False, wcs=wcs)]


def model_cubes(fit: LineFitMaps, cube) -> ModelCubes:
    """The model cube of ``fit`` on ``cube``'s channels and the residual data - model."""
    data = read_rows(cube, slice(0, cube.shape[1]))
    model = fit.model_cube(cube)
    return ModelCubes(model=model, residual=(data - model).astype(np.float32), meta=cube.meta)
