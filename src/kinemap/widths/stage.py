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
from typing import ClassVar

import astropy.units as u
import numpy as np

from kinemap.units import KMS
from kinemap.spectral.axes import to_velocity
from kinemap.errors import KinemapError
from kinemap.linefit import LineModel
from kinemap.linefit.stage import fit_cube, instrument_sigma_from
from kinemap.io.products import Product
from kinemap.io.results import StageResult
from kinemap.status import STATUS_DESCRIPTIONS, Status
from kinemap.widths.budget import width_budget
from kinemap.spectral.catalogue import check_line_in_range, get_line, load_catalogue

__all__ = ["WidthBudget", "line_widths", "DEFAULT_RATIOS"]

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
        _check_line_near_rest(cube, lines[0])
        return np.atleast_2d(cube.velocity)
    axes = []
    for line in lines:
        rest = line.rest_value(medium)
        check_line_in_range(line, cube.spectral, medium=medium if medium != "frequency" else None)
        axes.append(to_velocity(cube.spectral, convention=cube.meta.convention, rest_value=rest))
    return np.ascontiguousarray(np.vstack(axes), dtype=np.float64)


def _check_line_near_rest(cube, line) -> None:
    """A velocity axis is relative to the cube's rest value: a line whose own rest value
    lies further from it (in the cube's convention) than the band is wide cannot be in the
    band at any source velocity (H-alpha on a CO cube)."""
    rest, conv = cube.meta.rest_value, cube.meta.convention
    doppler = {"radio": u.doppler_radio, "optical": u.doppler_optical,
               "relativistic": u.doppler_relativistic}.get(conv)
    if rest is None or doppler is None or cube.meta.medium == "air":
        return
    offset = line.rest_value("frequency").to_value(u.km / u.s, equivalencies=doppler(rest))
    v = np.asarray(cube.velocity, dtype=float)
    band = float(np.nanmax(v) - np.nanmin(v))
    if not abs(offset) <= band:
        raise KinemapError(
            f"line '{line.name}' cannot be in this cube: its rest value is {offset:.6g} km/s "
            f"from the cube's rest value ({rest:.8g}), more than the band's {band:.4g} km/s; "
            "give a line the cube covers (or the cube's --rest-value)")


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


def build_model(names, *, ratios=None, free_velocity=False,
                baseline: str = "none") -> tuple[LineModel, list]:
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
    return LineModel(tuple(comps), baseline=baseline, param_names=tuple(params)), index


@dataclass(frozen=True)
class WidthBudget(StageResult):
    """The line-width budget of a cube: a joint fit of the named lines, then the split of
    each line's width into instrumental, thermal and non-thermal parts.

    Every product is an attribute, a ``spectral_cube.Projection``:
    ``nonthermal_dispersion``, ``nonthermal_dispersion_err``, ``thermal_dispersion``
    (km/s), ``temperature``, ``temperature_err`` (K), ``sound_speed`` (km/s),
    ``mach_number`` (sqrt(3) sigma_nt / c_s), ``width_status`` (:mod:`kinemap.status`),
    ``line_velocity``, and per line ``dispersion_<LINE>``, ``dispersion_<LINE>_err``,
    ``integrated_<LINE>``.

    Attributes
    ----------
    budget : kinemap.widths.BudgetArrays
        The same maps as plain arrays, and the per-line dispersions.
    fit : kinemap.LineFitMaps
        The joint line fit.
    names : tuple of str
        The lines, in the fit's order.
    """

    name: ClassVar[str] = "widths"

    budget: object
    fit: object
    names: tuple
    component_of: dict
    meta: object = None
    intensity: np.ndarray | None = None
    settings: dict = field(default_factory=dict)

    @property
    def seconds(self) -> float:
        return float(getattr(self.fit, "seconds", 0.0))

    def products(self) -> list[Product]:
        out = []
        for key, arr, unit, desc in self.budget.products():
            kind = "dispersion" if key.startswith("dispersion_") else _KINDS.get(key, "other")
            extra = {}
            if key == "width_status":
                extra = {"STATCODE": "; ".join(f"{int(c)} {c.name.lower()}" for c in Status)[:68]}
            out.append(Product(key, np.asarray(arr), u.Unit(unit), desc, kind, extra_header=extra))
        f = self.fit
        for name, k in self.component_of.items():
            if f"dispersion_{name}" not in {p.key for p in out}:  # tied to a measured line
                out.append(Product(f"dispersion_{name}", f.component("dispersion", k), KMS,
                                   f"dispersion of {name} (shared with the line it is tied "
                                   "to), as given (instrument and channel already removed)",
                                   "dispersion"))
        out += [Product("line_velocity", f.component("velocity"), KMS,
                        f"velocity of the joint fit of {', '.join(self.names)}", "velocity"),
                Product("line_velocity_err", f.component("velocity_err"), KMS,
                        "1-sigma error of the joint-fit velocity", "error", plot=False)]
        for name, k in self.component_of.items():
            out.append(Product(f"dispersion_{name}_err", f.component("dispersion_err", k), KMS,
                               f"1-sigma error of the intrinsic dispersion of {name}", "error",
                               plot=False))
            out.append(Product(f"integrated_{name}", f.component("integrated", k),
                               self.meta.bunit * KMS, f"integrated intensity of {name}",
                               "intensity", plot=False))
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


def _temperature(value, name):
    """A temperature (scalar or map) as a Quantity in K; None stays None."""
    if value is None:
        return None
    if isinstance(value, u.Quantity):
        q = value
    elif isinstance(value, np.ndarray):
        q = u.Quantity(value, u.K)
    else:
        try:
            q = u.Quantity(str(value))
        except (TypeError, ValueError):
            raise KinemapError(f"'{name}' must be a temperature like '1e4 K', got {value!r}") from None
    if q.unit == u.one:
        q = q.value * u.K
    try:
        q = q.to(u.K, equivalencies=u.temperature())
    except u.UnitConversionError:
        raise KinemapError(f"'{name}' must be a temperature like '1e4 K', got {value!r}") from None
    return u.Quantity(np.asarray(q.value, dtype=np.float64), u.K)


def _independent_widths(model, names) -> list[str]:
    """One line per fitted dispersion parameter (the first that uses it).

    Lines tied by a flux ratio share one width parameter (the [N II] pair): that is one
    measurement, and giving it to the budget once per line would count it twice, shrinking
    the temperature and sigma_nt errors (a pull width of 1.26 for H-alpha + [N II]).
    """
    first = {}
    for axis, _amp, _scale, _vel, sig in model.components:
        first.setdefault(sig, names[axis])
    return [n for n in names if n in first.values()]


def _line_names(lines) -> list[str]:
    names = lines
    if isinstance(names, str):
        names = [n.strip() for n in names.split(",") if n.strip()]
    names = list(names or [])
    if not names:
        raise KinemapError("'lines' needs at least one line name, e.g. lines=['Halpha', 'NII_6583']")
    if len(set(names)) != len(names):
        raise KinemapError(f"'lines' lists a line twice: {', '.join(names)}")
    return names


def _refuse_if_no_budget(budget):
    """A budget with no finite non-thermal width anywhere is refused with the commonest
    reason, instead of products that are NaN everywhere."""
    status = np.asarray(budget.width_status)
    if np.isfinite(budget.nonthermal_dispersion).any() or status.size == 0:
        return
    codes, counts = np.unique(status, return_counts=True)
    common = Status(int(codes[np.argmax(counts)]))
    fix = ("check the temperature, the channel width (CDELT of the spectral axis) and "
           "--instrument-sigma" if common == Status.UNPHYSICAL else
           "check the temperature and that the lines lie in the band")
    raise KinemapError(f"no pixel has a line-width budget ({int(counts.max())} of "
                       f"{status.size} pixels: {STATUS_DESCRIPTIONS[common]}); {fix}")


def line_widths(cube, *, lines, temperature=None, temperature_err=None, mu: float = 2.33,
                noise=None, mask=None, instrument_sigma=None, resolving_power=None,
                free_velocity: bool = False, ratios=None, catalogue=None,
                snr_threshold: float = 3.0, channel_response: str = "tophat",
                baseline: str = "none", max_memory=None, progress: bool = False,
                client=None) -> WidthBudget:
    """Fit the named lines jointly and split their widths (see the module docstring).

    Parameters
    ----------
    cube : kinemap.io.Cube
    lines : list of str or str
        Catalogue names, brightest first (``['Halpha', 'NII_6583', 'NII_6548']`` or
        ``'Halpha,NII_6583'``); see :func:`kinemap.widths.load_catalogue`.
    temperature : Quantity, str or array (K), optional
        Assumed temperature: a scalar or a map (ny, nx).  Without one, the temperature is
        solved from lines of different emitter mass.
    temperature_err : Quantity or str (K), optional
        1-sigma error of an assumed temperature.
    mu : float
        Mean particle mass over m_H for the sound speed (2.33 molecular gas, 0.6 ionised).
    noise, mask : optional
        As for :func:`kinemap.fit_cube` (estimated when not given).
    instrument_sigma : Quantity or str (km/s), optional
        Gaussian instrumental sigma; or ``resolving_power`` R (FWHM = c/R).
    free_velocity : bool
        A velocity per line instead of one shared velocity.
    ratios : dict, optional
        Fixed flux ratios ``{'NII_6583/NII_6548': 3.0}`` (the default ratio is always on).
    catalogue : str, optional
        Extra catalogue TOML file.
    baseline : {'none', 'constant', 'linear'}
        A baseline fitted with the lines, over the fitted channels, for continuum left
        under them: 'none' for a continuum-subtracted cube (the default, and what the
        continuum stage gives); 'constant' or 'linear' when a residual continuum remains
        (e.g. the continuum stage was switched off, or the continuum curves under a wide
        band).  A free baseline costs precision: it trades off against the lines' wings.

    Returns
    -------
    WidthBudget
    """
    names = _line_names(lines)
    cat = load_catalogue(catalogue)
    line_list = [get_line(n, catalogue=cat) for n in names]
    temp = _temperature(temperature, "temperature")
    if temp is None and len({round(line.mass_amu, 3) for line in line_list}) < 2:
        raise KinemapError(
            "a temperature can only be solved from lines of different emitter mass "
            f"({', '.join(names)} share one); give a temperature or add a line of another mass")
    if temp is not None and temp.ndim == 2 and temp.shape != cube.shape[1:]:
        raise KinemapError(f"the temperature map has shape {temp.shape}, the cube's maps "
                           f"{cube.shape[1:]}; give a map on the cube's pixel grid")
    axes = line_axes(cube, line_list)
    model, _ = build_model(names, ratios=parse_ratios(ratios), free_velocity=bool(free_velocity),
                           baseline=baseline)
    sigma_instr = instrument_sigma_from(instrument_sigma=instrument_sigma,
                                        resolving_power=resolving_power)
    kw = {} if max_memory is None else {"max_memory": max_memory}
    fit = fit_cube(cube, noise=noise, mask=mask, model=model, velocity_axes=axes,
                   channel_response=channel_response, instrument_sigma=sigma_instr,
                   snr_threshold=float(snr_threshold), progress=progress, client=client, **kw)
    component_of = {names[c[0]]: k for k, c in enumerate(model.components)}
    measured = _independent_widths(model, names)
    disp = {n: fit.component("dispersion", component_of[n]) * KMS for n in measured}
    err = {n: fit.component("dispersion_err", component_of[n]) * KMS for n in measured}
    budget = width_budget(disp, err, intrinsic=True, temperature=temp,
                          temperature_err=_temperature(temperature_err, "temperature_err"),
                          mu=float(mu), input_status={n: fit.status for n in measured},
                          catalogue=cat)
    _refuse_if_no_budget(budget)
    settings = dict(lines=names, temperature=None if temp is None or temp.ndim else str(temp),
                    mu=float(mu), free_velocity=bool(free_velocity), ratios=ratios,
                    baseline=baseline,
                    instrument_sigma_kms=sigma_instr)
    return WidthBudget(budget=budget, fit=fit, names=tuple(names), component_of=component_of,
                       meta=cube.meta, intensity=fit.integrated_total()[0], settings=settings)
