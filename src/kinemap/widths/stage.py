"""The line-width stage of a run: a joint fit of the named lines, then the width budget.

Each line gets its own velocity axis from the cube's spectral axis and the line's rest
value in the cube's medium (air wavelengths for AWAV axes, vacuum for WAVE, frequencies
for frequency axes), in the cube's velocity convention.  The lines share one velocity
(unless ``free_velocity``); each line has its own width, except that lines tied by a
fixed flux ratio (by default [N II] 6583/6548 = 3.0) come from one ion and share it.  The
instrument and the channel response are inside the fitted model, so the fitted widths
are intrinsic and go into :func:`kinemap.widths.width_budget` with ``intrinsic=True``.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import astropy.units as u
import numpy as np

from kinemap.units import KMS
from kinemap.spectral.axes import to_velocity
from kinemap.errors import KinemapError
from kinemap.linefit import LineModel
from kinemap.linefit.stage import fit_cube
from kinemap.io.products import Product
from kinemap.status import Status
from kinemap.widths.budget import width_budget
from kinemap.spectral.catalogue import check_line_in_range, get_line, load_catalogue

__all__ = ["WidthStage", "run_widths", "DEFAULT_RATIOS"]

# fixed flux ratios set by atomic physics (strong, weak): ratio of the strong to the weak
# line; [N II] 6583/6548 = 3.0 (common practice; the transition probabilities give ~2.9-3.05)
DEFAULT_RATIOS = {("NII_6583", "NII_6548"): 3.0}

_KINDS = {"nonthermal_dispersion": "dispersion", "nonthermal_dispersion_err": "error",
          "thermal_dispersion": "dispersion", "temperature": "temperature",
          "temperature_err": "error", "sound_speed": "other", "mach_number": "other",
          "width_status": "status"}


def _medium(cube) -> str:
    if cube.meta.medium in ("air", "vacuum"):
        return cube.meta.medium
    return "frequency"


def line_axes(cube, lines) -> np.ndarray:
    """Velocity axis (km/s) of every line on the cube's channels, shape (nlines, nchan)."""
    medium = _medium(cube)
    spectral_is_velocity = cube.spectral.unit.is_equivalent(u.m / u.s)
    if spectral_is_velocity:
        if len(lines) > 1:
            raise KinemapError(
                "the cube's spectral axis is a velocity axis, so only one line can be placed "
                "on it; give one line or a cube with a frequency or wavelength axis")
        return np.atleast_2d(cube.velocity)
    axes = []
    for line in lines:
        rest = line.rest_value(medium)
        check_line_in_range(line, cube.spectral, medium=medium if medium != "frequency" else None)
        axes.append(to_velocity(cube.spectral, convention=cube.meta.convention, rest_value=rest))
    return np.ascontiguousarray(np.vstack(axes), dtype=np.float64)


def parse_ratios(ratios) -> dict:
    """{'NII_6583/NII_6548': 3.0} (config) or [('NII_6583/NII_6548=3')] (CLI) -> {(s, w): r}."""
    if ratios is None:
        return dict(DEFAULT_RATIOS)
    items = ratios.items() if isinstance(ratios, dict) else (str(r).split("=", 1) for r in ratios)
    out = dict(DEFAULT_RATIOS)
    for key, value in items:
        try:
            strong, weak = (p.strip() for p in str(key).split("/"))
            out[(strong, weak)] = float(value)
        except ValueError:
            raise KinemapError(f"a flux ratio must look like 'NII_6583/NII_6548=3.0', got "
                               f"{key!r}={value!r}") from None
    return out


def build_model(names, *, ratios=None, free_velocity=False) -> tuple[LineModel, list]:
    """A tied LineModel for ``names`` and, per component, the index of its line.

    Lines fixed to another by a flux ratio follow it; otherwise the given order is kept,
    and the first line is the fit's starting reference, so list the brightest first.
    """
    ratios = dict(DEFAULT_RATIOS if ratios is None else ratios)
    params: list[str] = []

    def new(name):
        params.append(name)
        return len(params) - 1

    amp_of, sig_of, scale_of = {}, {}, {}
    for (strong, weak), r in ratios.items():
        if strong in names and weak in names:
            if not (np.isfinite(r) and r > 0):
                raise KinemapError(f"flux ratio {strong}/{weak} must be positive, got {r!r}")
            scale_of[weak] = (strong, 1.0 / float(r))
    shared_v = None if free_velocity else new("velocity")
    comps, index = [], []
    order = sorted(range(len(names)), key=lambda i: names[i] in scale_of)  # strong lines first
    for i in order:
        n = names[i]
        if n in scale_of:
            strong, scale = scale_of[n]
            a, s = amp_of[strong], sig_of[strong]
        else:
            a, s, scale = new(f"amplitude_{n}"), new(f"dispersion_{n}"), 1.0
        amp_of[n], sig_of[n] = a, s
        v = shared_v if shared_v is not None else new(f"velocity_{n}")
        comps.append((i, a, scale, v, s))
        index.append(i)
    return LineModel(tuple(comps), baseline="none", param_names=tuple(params)), index


@dataclass(frozen=True)
class WidthStage:
    """Per-line fits and the width budget."""

    budget: object
    fit: object
    names: tuple
    component_of: dict
    intensity: np.ndarray | None = None
    settings: dict = field(default_factory=dict)

    def products(self) -> list[Product]:
        out = []
        for key, arr, unit, desc in self.budget.products():
            kind = "dispersion" if key.startswith("dispersion_") else _KINDS.get(key, "other")
            extra = {}
            if key == "width_status":
                extra = {"STATCODE": "; ".join(f"{int(c)} {c.name.lower()}" for c in Status)[:68]}
            out.append(Product(key, np.asarray(arr), u.Unit(unit), desc, kind, extra_header=extra))
        f = self.fit
        k0 = 0
        out += [Product("line_velocity", f.velocity[k0], KMS,
                        f"velocity of the joint fit of {', '.join(self.names)}", "velocity"),
                Product("line_velocity_err", f.velocity_error[k0], KMS,
                        "1-sigma error of the joint-fit velocity", "error", plot=False)]
        for name, k in self.component_of.items():
            out.append(Product(f"dispersion_{name}_err", f.dispersion_error[k], KMS,
                               f"1-sigma error of the intrinsic dispersion of {name}", "error",
                               plot=False))
            out.append(Product(f"integrated_{name}", f.integrated[k], f.bunit * KMS,
                               f"integrated intensity of {name}", "intensity", plot=False))
        return out

    def summary(self) -> dict:
        b = self.budget
        s = dict(b.summary)
        ok = np.asarray(b.width_status) == Status.OK
        def med(a):
            a = np.asarray(a)
            return float(np.nanmedian(a[ok])) if ok.any() and np.isfinite(a[ok]).any() else None
        s.update({"median_nonthermal_dispersion_kms": med(b.nonthermal_dispersion),
                  "median_mach_number": med(b.mach_number),
                  "median_temperature_k": med(b.temperature),
                  "lines": list(self.names)})
        return {k: (v if isinstance(v, (int, float, str, list, type(None))) else str(v))
                for k, v in s.items()}

    def figures(self, state) -> dict:
        from kinemap.plotting.widths import (
            plot_dispersion_vs_intensity, plot_width_histograms, plot_width_maps
        )

        figs = {"width_maps": (plot_width_maps(self.budget, wcs=state.meta.wcs),
                               "non-thermal dispersion, temperature and Mach number maps"),
                "width_histograms": (plot_width_histograms(self.budget),
                                     "distributions of the non-thermal dispersion and Mach number")}
        if self.intensity is not None:
            figs["width_vs_intensity"] = (plot_dispersion_vs_intensity(self.budget, self.intensity),
                                          "non-thermal dispersion against integrated intensity")
        return figs


def _temperature(value, name):
    if value is None:
        return None
    if isinstance(value, np.ndarray):
        return u.Quantity(value, u.K)
    q = value if isinstance(value, u.Quantity) else u.Quantity(str(value))
    if q.unit == u.one:
        q = q.value * u.K
    try:
        return q.to(u.K, equivalencies=u.temperature())
    except u.UnitConversionError:
        raise KinemapError(f"'{name}' must be a temperature like '1e4 K', got {value!r}") from None


def run_widths(cube, noise, mask, opts: dict, *, temperature_map=None, instrument_sigma=0.0,
               channel_response="tophat", max_memory=None, progress=False, client=None) -> WidthStage:
    """Fit the lines of ``opts['lines']`` jointly and split their widths (see module docstring)."""
    names = opts.get("lines")
    if isinstance(names, str):
        names = [n.strip() for n in names.split(",") if n.strip()]
    if not names:
        raise KinemapError("'lines' needs at least one line name, e.g. --lines Halpha,NII_6583")
    catalogue = load_catalogue(opts.get("catalogue"))
    lines = [get_line(n, catalogue=catalogue) for n in names]
    if len(set(names)) != len(names):
        raise KinemapError(f"'lines' lists a line twice: {', '.join(names)}")
    temperature = _temperature(opts.get("temperature"), "temperature")
    if temperature_map is not None:
        if temperature is not None:
            raise KinemapError("give either --temperature or --temperature-map, not both")
        temperature = _temperature(temperature_map, "temperature map")
    if temperature is None and len({round(line.mass_amu, 3) for line in lines}) < 2:
        raise KinemapError(
            "a temperature can only be solved from lines of different emitter mass "
            f"({', '.join(names)} share one); give --temperature or add a line of another mass")
    axes = line_axes(cube, lines)
    ratios = parse_ratios(opts.get("ratios"))
    model, _ = build_model(names, ratios=ratios, free_velocity=bool(opts.get("free_velocity")))
    kw = {} if max_memory is None else {"max_memory": max_memory}
    fit = fit_cube(cube, noise, mask=mask, model=model, velocity_axes=axes,
                   channel_response=channel_response, instrument_sigma=instrument_sigma,
                   snr_threshold=float(opts.get("snr_threshold", 3.0)), progress=progress,
                   client=client, **kw)
    component_of = {names[c[0]]: k for k, c in enumerate(model.components)}
    disp = {n: fit.dispersion[k] * KMS for n, k in component_of.items()}
    err = {n: fit.dispersion_error[k] * KMS for n, k in component_of.items()}
    status = {n: fit.status for n in component_of}
    budget = width_budget(disp, err, intrinsic=True, temperature=temperature,
                          temperature_err=_temperature(opts.get("temperature_err"), "temperature_err"),
                          mu=float(opts.get("mu", 2.33)), input_status=status, catalogue=catalogue)
    return WidthStage(budget=budget, fit=fit, names=tuple(names), component_of=component_of,
                      intensity=fit.integrated_total()[0], settings=dict(opts))
