"""Line-width budget: split observed line widths into instrument, channel, thermal and
non-thermal parts, per pixel.

    sigma_obs^2 = sigma_instr^2 + sigma_chan^2 + k T / m + sigma_nt^2 (+ fine structure)

With one line (or lines of one mass) the temperature must be assumed; with lines of two or
more masses the temperature and sigma_nt are fitted per pixel by weighted least squares.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Mapping

import astropy.units as u
import numpy as np

from kinemap.units import KMS, to_value
from kinemap.errors import KinemapError
from kinemap.status import Status
from kinemap.widths import _solve
from kinemap.spectral.catalogue import Line, _resolve, load_catalogue
from kinemap.widths.thermal import HYDROGEN_MASS_AMU, MU_MOLECULAR, mu_value, temperature_kelvin

__all__ = ["BudgetArrays", "width_budget"]

# Input status codes that make a pixel unusable; they are carried into width_status.
_CARRIED = (Status.NOT_CONVERGED, Status.TOO_FAINT, Status.MASKED, Status.NO_DATA, Status.FAILED,
            Status.UNPHYSICAL)


def _frozen(a):
    if a is None:
        return None
    a = np.asarray(a)
    a.flags.writeable = False
    return a


@dataclass(frozen=True)
class BudgetArrays:
    """Per-pixel line-width budget. Maps are numpy arrays with the pixel shape of the input.

    Units: dispersions and sound speed in km/s, temperature in K, Mach number
    dimensionless.  Pixels whose ``width_status`` is neither ``Status.OK`` nor
    ``Status.AT_BOUND`` hold NaN in every value map.  Errors are 1 sigma, linearised.

    Attributes
    ----------
    nonthermal_dispersion, nonthermal_dispersion_err : ndarray
        sigma_nt and its error (km/s).
    thermal_dispersion : ndarray
        sqrt(kT/m) of ``reference_line``'s emitter (km/s).
    temperature : ndarray
        Kinetic temperature (K): fitted when ``temperature_solved``, else the assumed one.
    temperature_err : ndarray or None
        Its error (K): fitted, or the assumed error if one was given, else None.
    temperature_nonthermal_cov : ndarray or None
        Covariance of temperature and sigma_nt (K km/s); None when T has no error.
    chi_square : ndarray or None
        Weighted residual sum of squares of the temperature fit (n_lines - 2 degrees of
        freedom); None when the temperature was assumed.
    sound_speed, sound_speed_err : ndarray
        Isothermal sound speed sqrt(kT/(mu m_H)) and its error (km/s).
    mach_number, mach_number_err : ndarray
        sqrt(3) sigma_nt / c_s (isotropic turbulence) and its error, including the
        covariance of T and sigma_nt.
    width_status : ndarray of int16
        :class:`kinemap.status.Status` codes.
    dispersions : Mapping[str, ndarray]
        Per line: dispersion with instrument and channel response removed (km/s); the
        fine-structure part, if any, is still in it.
    summary : Mapping[str, int]
        Pixel counts: ``pixels``, one per status name in lower case, and the reasons for
        UNPHYSICAL: ``unphysical_below_instrument`` (a line narrower than instrument +
        channel), ``unphysical_negative_temperature`` (fit), ``unphysical_below_thermal``
        (sigma_nt^2 < 0).
    lines : tuple of str
        Lines used, in input order.
    reference_line : str
        Line whose emitter mass defines ``thermal_dispersion`` (the first one).
    temperature_solved : bool
        True if T was fitted from lines of different mass.
    intrinsic : bool
        True if the inputs already had the instrument and channel response removed.
    mu : float
        Mean particle mass (units of m_H) used for the sound speed.
    """

    nonthermal_dispersion: np.ndarray
    nonthermal_dispersion_err: np.ndarray
    thermal_dispersion: np.ndarray
    temperature: np.ndarray
    temperature_err: np.ndarray | None
    temperature_nonthermal_cov: np.ndarray | None
    chi_square: np.ndarray | None
    sound_speed: np.ndarray
    sound_speed_err: np.ndarray
    mach_number: np.ndarray
    mach_number_err: np.ndarray
    width_status: np.ndarray
    dispersions: Mapping[str, np.ndarray]
    summary: Mapping[str, int]
    lines: tuple
    reference_line: str
    temperature_solved: bool
    intrinsic: bool
    mu: float = MU_MOLECULAR
    _masses: Mapping[str, float] = field(default_factory=dict, repr=False)

    def products(self) -> list[tuple[str, np.ndarray, str, str]]:
        """Maps for the exporter as ``(key, array, unit, description)``.

        Keys: nonthermal_dispersion, nonthermal_dispersion_err, thermal_dispersion,
        temperature, temperature_err (only if not None), sound_speed, mach_number,
        width_status, dispersion_<NAME> per line.  Units are FITS unit strings ('' for
        dimensionless).
        """
        ref_mass = self._masses.get(self.reference_line, float("nan"))
        how = "fitted from lines of different mass" if self.temperature_solved else "assumed"
        out = [
            ("nonthermal_dispersion", self.nonthermal_dispersion, "km/s",
             "non-thermal velocity dispersion (Gaussian sigma)"),
            ("nonthermal_dispersion_err", self.nonthermal_dispersion_err, "km/s",
             "1-sigma error of the non-thermal dispersion"),
            ("thermal_dispersion", self.thermal_dispersion, "km/s",
             f"thermal dispersion sqrt(kT/m) of {self.reference_line} (m = {ref_mass} amu)"),
            ("temperature", self.temperature, "K", f"kinetic temperature ({how})"),
        ]
        if self.temperature_err is not None:
            out.append(("temperature_err", self.temperature_err, "K",
                        f"1-sigma error of the kinetic temperature ({how})"))
        out += [
            ("sound_speed", self.sound_speed, "km/s",
             f"isothermal sound speed sqrt(kT/(mu m_H)), mu = {self.mu}"),
            ("mach_number", self.mach_number, "",
             "Mach number sqrt(3) sigma_nt / c_s (isotropic turbulence)"),
            ("width_status", self.width_status, "",
             "width-budget status code (kinemap.status.Status)"),
        ]
        removed = "as given (instrument and channel already removed)" if self.intrinsic else \
            "with instrument and channel response removed"
        for name, arr in self.dispersions.items():
            out.append((f"dispersion_{name}", arr, "km/s", f"dispersion of {name}, {removed}"))
        return out


def _per_line(value, names, *, what):
    """A per-line mapping or one value for all lines -> list of float arrays (km/s)."""
    if value is None:
        return [0.0] * len(names)
    if isinstance(value, Mapping):
        got = {}
        for k, v in value.items():
            got[_key_name(k)] = v
        missing = [n for n in names if n not in got]
        extra = [n for n in got if n not in names]
        if missing or extra:
            raise KinemapError(
                f"'{what}' must have one entry per line {names}; missing {missing}, extra {extra}"
            )
        vals = [to_value(got[n], KMS, name=f"{what}['{n}']") for n in names]
    else:
        vals = [to_value(value, KMS, name=what)] * len(names)
    for n, v in zip(names, vals):
        arr = np.asarray(v, dtype=float)
        if np.any(arr[np.isfinite(arr)] < 0):
            raise KinemapError(f"'{what}' for {n} must be >= 0 km/s (a Gaussian sigma), got negative values")
    return vals


def _key_name(k) -> str:
    return k.name if isinstance(k, Line) else k


def width_budget(
    dispersions: Mapping,
    dispersion_errors: Mapping,
    *,
    intrinsic: bool,
    instrumental=None,
    channel=None,
    temperature=None,
    temperature_err=None,
    mu: float = MU_MOLECULAR,
    input_status: Mapping | None = None,
    catalogue: Mapping[str, Line] | None = None,
) -> BudgetArrays:
    """Thermal / non-thermal decomposition of line widths, per pixel.

    Parameters
    ----------
    dispersions : Mapping[str or Line, Quantity]
        Per line (catalogue name or :class:`Line`): the Gaussian sigma in velocity units
        (plain numbers are km/s), scalar or any array shape (usually (y, x)); shapes must
        broadcast together.  NaN marks pixels without a measurement.
    dispersion_errors : Mapping[str or Line, Quantity]
        1-sigma errors of ``dispersions``, same keys.
    intrinsic : bool
        Required, no default. ``False``: ``dispersions`` are observed widths, and
        ``instrumental`` and ``channel`` (both required; give 0 km/s to neglect one) are
        subtracted in quadrature.  ``True``: the widths come from a fit that already
        removed the instrument and channel response; ``instrumental``/``channel`` must
        then not be given.
    instrumental, channel : Quantity or Mapping[str, Quantity], optional
        Dispersion (Gaussian sigma, velocity units) of the instrumental line-spread function
        and of the channel response (:func:`channel_dispersion` for top-hat channels), one
        value/map for all lines or a mapping per line. Taken as exact.
    temperature : Quantity, optional
        Assumed kinetic temperature (scalar or map broadcastable to the pixel shape; K, or
        Celsius via astropy's temperature equivalency). If omitted, the temperature is
        fitted, which needs lines of at least two different emitter masses.
    temperature_err : Quantity, optional
        1-sigma error of the assumed temperature, propagated into every product.
    mu : float, optional
        Mean particle mass in units of m_H for the sound speed: 2.33 (molecular, default),
        0.6 (ionized).
    input_status : Mapping[str, array of int], optional
        Per-line status maps from the line fitter. Pixels with a code other than ``OK`` /
        ``AT_BOUND`` keep that code (first line in input order wins); ``AT_BOUND`` is
        carried when the budget itself succeeds.
    catalogue : Mapping[str, Line], optional
        Catalogue from :func:`load_catalogue` to resolve names (default: built-in).

    Returns
    -------
    BudgetArrays

    Notes
    -----
    Per line i, ``z_i = sigma_i^2 - sigma_instr^2 - sigma_chan^2 - fs_i`` (fs_i = the
    line's fine-structure variance from the catalogue: 10.233 km^2/s^2 for H-alpha,
    Garcia-Diaz et al. 2008; no other line has one in the built-in catalogue) is modelled
    as ``kT/m_i + sigma_nt^2``, linear in the unknowns ``kT`` and ``sigma_nt^2``.
    Var(sigma_i^2) = 4 sigma_i^2 e_i^2 + 2 e_i^4.

    * Assumed T: sigma_nt^2 is the weighted mean of ``z_i - kT/m_i`` over the lines
      (weights 1/Var(sigma_i^2)).
    * Fitted T: weighted least squares per pixel (no Python loop over pixels); errors and
      covariance from the inverse normal matrix, not rescaled by chi-square. With two
      lines the fit is exact (chi_square = 0).

    Errors on sigma_nt, c_s and Mach number are first-order propagation; the sigma_nt error
    grows without bound as sigma_nt -> 0.  Non-finite inputs give NaN and
    ``Status.NO_DATA``; a zero width error in a multi-line weighted solve gives
    ``Status.FAILED``; widths below instrument + channel, a negative fitted T, or
    sigma_nt^2 < 0 give ``Status.UNPHYSICAL``.  Inputs are not modified.

    Raises
    ------
    KinemapError
        Unknown lines, missing errors, bad units, negative widths or errors, a temperature
        that is not one, lines that cannot determine a temperature, conflicting options.
    """
    cat = load_catalogue() if catalogue is None else catalogue
    lines, names, sig, err = _line_widths(dispersions, dispersion_errors, intrinsic, cat)
    instr, chan = _responses(intrinsic, instrumental, channel, names)
    solve, t_k, t_err = _temperature(temperature, temperature_err, lines, names)
    mu = mu_value(mu)
    status_in = _input_status(input_status, names)
    parts = sig + err + [np.asarray(x, dtype=float) for x in instr + chan] + \
        [np.asarray(t_k), np.asarray(t_err)] + (status_in or [])
    shape = _pixel_shape(parts)

    def flat(x):
        return np.broadcast_to(np.asarray(x, dtype=float), shape).reshape(-1)

    n_pix = int(np.prod(shape, dtype=np.int64))
    s_arr = np.stack([flat(s) for s in sig])
    e_arr = np.stack([flat(e) for e in err])
    inst2 = np.stack([flat(x) ** 2 for x in instr]) + np.stack([flat(x) ** 2 for x in chan])
    fs = np.array([ln.fine_structure_variance_km2_s2 for ln in lines])
    x = 1.0 / np.array([ln.mass_amu for ln in lines])
    t_flat = t_err_flat = None
    if not solve:
        t_flat = flat(t_k)
        t_err_flat = flat(t_err)

    status, at_bound = _carried_status(status_in, shape, n_pix)
    finite = np.all(np.isfinite(s_arr), axis=0) & np.all(np.isfinite(e_arr), axis=0) \
        & np.all(np.isfinite(inst2), axis=0)
    if not solve:
        finite &= np.isfinite(t_flat) & np.isfinite(t_err_flat)
    status[~finite & (status == Status.OK)] = Status.NO_DATA

    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        y = s_arr**2 - inst2                       # width with instrument + channel removed
        z = y - fs[:, None]                        # thermal + non-thermal variance
        var_z = _solve.square_variance(s_arr, e_arr)
        if len(names) > 1:
            zero_err = np.any(var_z == 0, axis=0) & (status == Status.OK)
            status[zero_err] = Status.FAILED
        a, b, var_a, var_b, cov_ab, chi2 = _solve.solve_budget(z, var_z, x, t_flat, t_err_flat)
        flags = _flag_unphysical(status, at_bound, y, a, b, solve)
        maps = _solve.derived_maps(a, b, var_a, var_b, cov_ab, x, y, mu * HYDROGEN_MASS_AMU)

    has_t_err = solve or temperature_err is not None
    return _assemble(maps, chi2, status, flags, shape, names, lines, solve=solve, has_t_err=has_t_err,
                     intrinsic=intrinsic, mu=mu)


# ---------------------------------------------------------------------------- input checks
def _line_widths(dispersions, dispersion_errors, intrinsic, cat):
    """Lines, their names and the widths and width errors as float arrays (km/s)."""
    if not isinstance(dispersions, Mapping) or not dispersions:
        raise KinemapError(
            "'dispersions' must be a non-empty mapping from line name to width, e.g. {'Halpha': sigma_map}"
        )
    if not isinstance(dispersion_errors, Mapping):
        raise KinemapError("'dispersion_errors' must be a mapping from line name to width error")
    if not isinstance(intrinsic, (bool, np.bool_)):
        raise KinemapError(f"'intrinsic' must be True or False, got {intrinsic!r}")

    lines = [_resolve(k, cat) for k in dispersions]
    names = [ln.name for ln in lines]
    if len(set(names)) != len(names):
        raise KinemapError(f"'dispersions' names a line twice: {names}; give each line once")
    errs_by_name = {_key_name(k): v for k, v in dispersion_errors.items()}
    missing = [n for n in names if n not in errs_by_name]
    if missing:
        raise KinemapError(f"'dispersion_errors' lacks {missing}; give an error map for every line")
    extra = [n for n in errs_by_name if n not in names]
    if extra:
        raise KinemapError(f"'dispersion_errors' has {extra}, which are not in 'dispersions'")

    sig = [np.asarray(to_value(v, KMS, name=f"dispersions['{n}']"), dtype=float)
           for n, v in zip(names, dispersions.values())]
    err = [np.asarray(to_value(errs_by_name[n], KMS, name=f"dispersion_errors['{n}']"), dtype=float)
           for n in names]
    for n, s, e in zip(names, sig, err):
        if np.any(s[np.isfinite(s)] < 0):
            raise KinemapError(f"'dispersions['{n}']' has negative values; a dispersion is a Gaussian sigma >= 0")
        if np.any(e[np.isfinite(e)] < 0):
            raise KinemapError(f"'dispersion_errors['{n}']' has negative values; errors must be >= 0")
    return lines, names, sig, err


def _responses(intrinsic, instrumental, channel, names):
    """Per-line instrumental and channel dispersions (km/s); zeros for intrinsic widths."""
    if intrinsic:
        if instrumental is not None or channel is not None:
            raise KinemapError(
                "'instrumental'/'channel' were given with intrinsic=True, which would remove them "
                "twice; drop them or pass intrinsic=False with observed widths"
            )
        instr = chan = [0.0] * len(names)
    else:
        for what, val in (("instrumental", instrumental), ("channel", channel)):
            if val is None:
                raise KinemapError(
                    f"'{what}' is needed when intrinsic=False (observed widths); "
                    "give its dispersion, or 0 km/s to neglect it"
                )
        instr = _per_line(instrumental, names, what="instrumental")
        chan = _per_line(channel, names, what="channel")
    return instr, chan


def _temperature(temperature, temperature_err, lines, names):
    """(solve, T [K], T error [K]): solve is True when T is to be fitted (T, error = 0)."""
    solve = temperature is None
    if solve:
        if temperature_err is not None:
            raise KinemapError("'temperature_err' was given without 'temperature'; give both or neither")
        masses = {ln.mass_amu for ln in lines}
        if len(masses) < 2:
            what = f"line {names[0]} alone" if len(names) == 1 else \
                f"lines {', '.join(names)} all have emitter mass {lines[0].mass_amu} amu and"
            raise KinemapError(
                f"'temperature' is needed: {what} cannot separate thermal from non-thermal "
                "broadening; give an assumed temperature or add a line of a different mass"
            )
        return solve, 0.0, 0.0
    t_k = np.asarray(temperature_kelvin(temperature), dtype=float)
    if temperature_err is None:
        t_err = 0.0
    else:
        t_err = np.asarray(to_value(temperature_err, u.K, name="temperature_err"), dtype=float)
        if np.any(t_err[np.isfinite(t_err)] < 0):
            raise KinemapError("'temperature_err' must be >= 0 K")
    return solve, t_k, t_err


def _input_status(input_status, names):
    """The line fitter's status maps in line order (lines without one are skipped), or None."""
    if input_status is None:
        return None
    if not isinstance(input_status, Mapping):
        raise KinemapError("'input_status' must be a mapping from line name to status map")
    st_by = {_key_name(k): v for k, v in input_status.items()}
    unknown = [n for n in st_by if n not in names]
    if unknown:
        raise KinemapError(f"'input_status' has {unknown}, which are not in 'dispersions'")
    valid = {int(s) for s in Status}
    status_in = []
    for n in names:
        if n in st_by:
            s = np.asarray(st_by[n])
            if not np.issubdtype(s.dtype, np.integer) or not set(np.unique(s).tolist()) <= valid:
                raise KinemapError(
                    f"'input_status['{n}']' must hold kinemap.status.Status codes {sorted(valid)}"
                )
            status_in.append(s)
    return status_in


def _pixel_shape(parts):
    """The common (broadcast) pixel shape of all input maps."""
    try:
        return np.broadcast_shapes(*[p.shape for p in parts])
    except ValueError:
        raise KinemapError(
            "the input maps have shapes that do not fit together: "
            f"{sorted({p.shape for p in parts})}; give maps of one pixel shape (or scalars)"
        ) from None


# ---------------------------------------------------------------------------- status and output
def _carried_status(status_in, shape, n_pix):
    """Start status (OK, or the first line's unusable input code) and the AT_BOUND pixels."""
    status = np.full(n_pix, Status.OK, dtype=np.int16)
    at_bound = np.zeros(n_pix, dtype=bool)
    for s in status_in or []:
        s = np.broadcast_to(s, shape).reshape(-1)
        carry = np.isin(s, [int(c) for c in _CARRIED]) & (status == Status.OK)
        status[carry] = s[carry]
        at_bound |= s == Status.AT_BOUND
    return status, at_bound


@dataclass(frozen=True)
class _Flags:
    """Pixels marked UNPHYSICAL, by reason, and the pixels whose values are kept."""

    below_instr: np.ndarray
    neg_t: np.ndarray
    below_th: np.ndarray
    good: np.ndarray


def _flag_unphysical(status, at_bound, y, a, b, solve) -> _Flags:
    """Mark UNPHYSICAL solutions in ``status`` (in place), then carry AT_BOUND.

    Reasons are exclusive, first one wins: a line narrower than instrument + channel, a
    negative fitted temperature, sigma_nt^2 < 0."""
    n_pix = status.size
    ok = status == Status.OK
    below_instr = ok & np.any(y < 0, axis=0)
    neg_t = ok & ~below_instr & (a < 0) if solve else np.zeros(n_pix, dtype=bool)
    below_th = ok & ~below_instr & ~neg_t & (b < 0)
    status[below_instr | neg_t | below_th] = Status.UNPHYSICAL
    status[(status == Status.OK) & at_bound] = Status.AT_BOUND
    good = (status == Status.OK) | (status == Status.AT_BOUND)
    return _Flags(below_instr, neg_t, below_th, good)


def _assemble(maps, chi2, status, flags: _Flags, shape, names, lines, *, solve, has_t_err, intrinsic,
              mu) -> BudgetArrays:
    """The frozen result: value maps NaN outside the good pixels, status and pixel counts."""
    def out(v):
        v = np.where(flags.good, v, np.nan)
        return _frozen(v.reshape(shape))

    summary = {"pixels": int(status.size)}
    for st in Status:
        summary[st.name.lower()] = int(np.count_nonzero(status == st))
    summary["unphysical_below_instrument"] = int(np.count_nonzero(flags.below_instr))
    summary["unphysical_negative_temperature"] = int(np.count_nonzero(flags.neg_t))
    summary["unphysical_below_thermal"] = int(np.count_nonzero(flags.below_th))

    return BudgetArrays(
        nonthermal_dispersion=out(maps["snt"]),
        nonthermal_dispersion_err=out(maps["snt_err"]),
        thermal_dispersion=out(maps["th"]),
        temperature=out(maps["temp"]),
        temperature_err=out(maps["temp_err"]) if has_t_err else None,
        temperature_nonthermal_cov=out(maps["cov_t_snt"]) if has_t_err else None,
        chi_square=out(chi2) if solve else None,
        sound_speed=out(maps["cs"]),
        sound_speed_err=out(maps["cs_err"]),
        mach_number=out(maps["mach"]),
        mach_number_err=out(maps["mach_err"]),
        width_status=_frozen(status.reshape(shape)),
        dispersions=MappingProxyType({n: out(maps["per_line"][i]) for i, n in enumerate(names)}),
        summary=MappingProxyType(summary),
        lines=tuple(names),
        reference_line=names[0],
        temperature_solved=solve,
        intrinsic=bool(intrinsic),
        mu=mu,
        _masses=MappingProxyType({ln.name: ln.mass_amu for ln in lines}),
    )
