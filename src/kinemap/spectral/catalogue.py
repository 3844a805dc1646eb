"""Line catalogue: rest values, emitter masses and where each number comes from.

The built-in catalogue is the package data file ``kinemap/data/lines.toml``; users add lines
with a TOML file of the same schema (see that file's header).  Optical lines carry air *and*
vacuum wavelengths because a cube's wavelength axis is one or the other (FITS ``AWAV`` vs
``WAVE``), radio lines carry a rest frequency.
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from importlib import resources
from types import MappingProxyType
from typing import Mapping

import astropy.units as u
import numpy as np
from astropy.constants import c as _C

from kinemap.units import KMS, to_value
from kinemap.errors import KinemapError
from kinemap.spectral import airvac as _airvac
from kinemap.spectral import _catalogue_parse as _parse
from kinemap.spectral.axes import SPECTRAL_CTYPES

__all__ = [
    "Line",
    "MEDIA",
    "load_catalogue",
    "get_line",
    "medium_from_ctype",
    "check_line_in_range",
    "air_to_vacuum",
    "vacuum_to_air",
    "is_line_name",
    "line_rest_value",
    "resolve_rest_value",
]

#: the three ways a rest value can be expressed; see :meth:`Line.rest_value`
MEDIA = ("air", "vacuum", "frequency")

_C_KMS = _C.to_value(KMS)
_C_ANGSTROM_GHZ = _C.to_value(u.AA * u.GHz)  # lambda[A] * nu[GHz] = c


@dataclass(frozen=True)
class Line:
    """One spectral line of the catalogue.

    Attributes
    ----------
    name : str
        Catalogue name (e.g. ``'Halpha'``, ``'13CO_1-0'``).
    mass_amu : float
        Mass of the emitting particle in atomic mass units.
    source : str
        Where the rest values come from (``'... ; from memory'`` when entered from memory).
    air_wavelength_angstrom, vacuum_wavelength_angstrom : float or None
        Rest wavelengths of optical lines in standard air and in vacuum (Angstrom).
    frequency_ghz : float or None
        Rest frequency of radio lines (GHz).
    fine_structure_variance_km2_s2 : float
        Extra Gaussian variance (km^2/s^2) from unresolved fine structure, 0 if none.
    species, mass_source, fine_structure_source : str
        Free-text descriptions and sources.
    """

    name: str
    mass_amu: float
    source: str
    air_wavelength_angstrom: float | None = None
    vacuum_wavelength_angstrom: float | None = None
    frequency_ghz: float | None = None
    fine_structure_variance_km2_s2: float = 0.0
    species: str = ""
    mass_source: str = ""
    fine_structure_source: str = ""

    @property
    def mass(self) -> u.Quantity:
        """Emitter mass as a Quantity in atomic mass units (``u.u``)."""
        return self.mass_amu * u.u

    @property
    def is_radio(self) -> bool:
        """True for lines defined by a rest frequency."""
        return self.frequency_ghz is not None

    @property
    def fine_structure_variance(self) -> u.Quantity:
        """Fine-structure variance as a Quantity in km^2/s^2."""
        return self.fine_structure_variance_km2_s2 * KMS**2

    def rest_value(self, medium: str) -> u.Quantity:
        """Rest value of the line as a Quantity.

        Parameters
        ----------
        medium : {'air', 'vacuum', 'frequency'}
            ``'air'``: wavelength in standard air (Angstrom; optical lines only);
            ``'vacuum'``: vacuum wavelength (Angstrom; for radio lines ``c / nu``);
            ``'frequency'``: frequency (GHz; for optical lines ``c / lambda_vac``).
            Use :func:`medium_from_ctype` to pick it from a cube's CTYPE.
        """
        medium = _check_medium(medium)
        if medium == "air":
            if self.is_radio:
                raise KinemapError(
                    f"line '{self.name}' is a radio line without an air wavelength; "
                    "use medium='frequency' or medium='vacuum'"
                )
            return self.air_wavelength_angstrom * u.AA
        if medium == "vacuum":
            if self.is_radio:
                return (_C_ANGSTROM_GHZ / self.frequency_ghz) * u.AA
            return self.vacuum_wavelength_angstrom * u.AA
        if self.is_radio:
            return self.frequency_ghz * u.GHz
        return (_C_ANGSTROM_GHZ / self.vacuum_wavelength_angstrom) * u.GHz


def _check_medium(medium) -> str:
    if medium not in MEDIA:
        raise KinemapError(f"'medium' must be one of {list(MEDIA)}, got {medium!r}")
    return medium


@functools.lru_cache(maxsize=1)
def _builtin() -> Mapping[str, Line]:
    text = resources.files("kinemap").joinpath("data", "lines.toml").read_text(encoding="utf-8")
    origin = "kinemap/data/lines.toml"
    entries = _parse.read_toml(text, origin)
    return MappingProxyType(
        {name: Line(**_parse.line_fields(name, e, origin)) for name, e in entries.items()}
    )


def load_catalogue(extra_toml_path=None) -> Mapping[str, Line]:
    """Return the line catalogue, optionally extended by a user TOML file.

    Parameters
    ----------
    extra_toml_path : str or path-like, optional
        A TOML file with ``[lines.<NAME>]`` tables in the schema of the built-in
        ``kinemap/data/lines.toml``.  Its lines are added to the built-in ones; a name that
        is already built in is an error (give the user line another name), so a result
        never silently changes meaning.

    Returns
    -------
    Mapping[str, Line]
        Read-only mapping from line name to :class:`Line`, built-in lines first.

    Raises
    ------
    KinemapError
        Missing or unreadable file, invalid TOML, unknown or missing fields, bad values.
    """
    base = _builtin()
    if extra_toml_path is None:
        return base
    entries, origin = _parse.read_file(extra_toml_path)
    merged = dict(base)
    for name, entry in entries.items():
        if name in base:
            raise KinemapError(
                f"line '{name}' in {origin} is already in the built-in catalogue; "
                f"give your line another name (e.g. '{name}_user')"
            )
        merged[name] = Line(**_parse.line_fields(name, entry, origin))
    return MappingProxyType(merged)


def _resolve(line, catalogue: Mapping[str, Line] | None = None) -> Line:
    """A Line from a Line or a catalogue name (KinemapError listing known names)."""
    if isinstance(line, Line):
        return line
    cat = load_catalogue() if catalogue is None else catalogue
    if not isinstance(line, str) or line not in cat:
        raise KinemapError(
            f"unknown line {line!r}; known lines are {', '.join(cat)} "
            "(add others with a catalogue TOML file: --catalogue FILE, or catalogue= in Python)"
        )
    return cat[line]


def get_line(
    name: str,
    *,
    medium: str | None = None,
    catalogue: Mapping[str, Line] | None = None,
) -> Line:
    """Look a line up by name.

    Parameters
    ----------
    name : str
        Catalogue name, e.g. ``'Halpha'`` or ``'13CO_1-0'``.
    medium : {'air', 'vacuum', 'frequency'}, optional
        When given, also check that the line has a rest value in that medium (a radio
        line has no air wavelength), so a mismatch fails here rather than later.
    catalogue : Mapping[str, Line], optional
        Catalogue from :func:`load_catalogue` (default: the built-in one).

    Raises
    ------
    KinemapError
        Unknown name (the message lists the known names) or no rest value in ``medium``.
    """
    line = _resolve(name, catalogue)
    if medium is not None:
        line.rest_value(medium)
    return line


def medium_from_ctype(ctype: str) -> str:
    """Medium of rest values that matches a FITS spectral CTYPE.

    ``'AWAV'`` -> ``'air'``; ``'WAVE'`` (and optical velocity ``'VOPT'``, ``'ZOPT'``,
    ``'FELO'``) -> ``'vacuum'``; frequency-like axes (``'FREQ'``, ``'VRAD'``, ``'VELO'``,
    ``'ENER'``, ``'WAVN'``, ``'BETA'``) -> ``'frequency'``.  Only the first four characters
    count, so ``'AWAV-LOG'`` and ``'VELO-LSR'`` work.
    """
    if not isinstance(ctype, str):
        raise KinemapError(f"'ctype' must be a FITS CTYPE string such as 'AWAV', got {ctype!r}")
    key = ctype.strip().upper()[:4]
    if key not in SPECTRAL_CTYPES:
        raise KinemapError(
            f"'ctype' {ctype!r} is not a spectral axis type; expected one of "
            f"{', '.join(SPECTRAL_CTYPES)} (optionally with an algorithm code like '-F2W')"
        )
    # the table's rest medium: see AxisKind.rest_medium for why VOPT gives 'vacuum'
    return SPECTRAL_CTYPES[key].rest_medium


def air_to_vacuum(wavelength: u.Quantity) -> u.Quantity:
    """Vacuum wavelength for a wavelength in standard air (Edlen 1966 via Morton 2000).

    Wavelengths below 2000 Angstrom are returned unchanged (NIST convention). NaN stays NaN.
    """
    lam = to_value(wavelength, u.AA, name="wavelength", allow_plain=False)
    return _airvac.air_to_vacuum(lam) * u.AA


def vacuum_to_air(wavelength: u.Quantity) -> u.Quantity:
    """Wavelength in standard air for a vacuum wavelength (Edlen 1966 via Morton 2000).

    Wavelengths below 2000 Angstrom are returned unchanged (NIST convention). NaN stays NaN.
    """
    lam = to_value(wavelength, u.AA, name="wavelength", allow_plain=False)
    return _airvac.vacuum_to_air(lam) * u.AA


def _doppler_factor(velocity_kms: float) -> float:
    """Relativistic factor lambda_obs / lambda_rest for a line-of-sight velocity."""
    beta = velocity_kms / _C_KMS
    if not -1.0 < beta < 1.0:
        raise KinemapError(f"'velocity' must be slower than light, got {velocity_kms} km/s")
    return math.sqrt((1.0 + beta) / (1.0 - beta))


_CONVENTIONS = {
    "radio": u.doppler_radio,
    "optical": u.doppler_optical,
    "relativistic": u.doppler_relativistic,
}


def check_line_in_range(
    line: Line | str,
    spectral_values: u.Quantity,
    *,
    medium: str | None = None,
    velocity: u.Quantity = 0.0 * KMS,
    rest_value: u.Quantity | None = None,
    convention: str | None = None,
    catalogue: Mapping[str, Line] | None = None,
) -> u.Quantity:
    """Check that a line falls inside a cube's spectral range; return its position there.

    Parameters
    ----------
    line : Line or str
        The line (or its catalogue name).
    spectral_values : Quantity
        World values of the cube's spectral axis: frequencies, wavelengths or velocities.
        NaNs are ignored.
    medium : {'air', 'vacuum'}, optional
        Required for wavelength axes (from :func:`medium_from_ctype`); ignored otherwise
        except that ``'air'`` is refused for frequency axes.
    velocity : Quantity, optional
        Line-of-sight velocity at which the line is expected (e.g. the systemic velocity),
        applied as a relativistic Doppler shift. Default 0 km/s.
    rest_value : Quantity, optional
        For velocity axes only: the cube's rest frequency or (vacuum) rest wavelength.
        Without it the velocities are taken to be relative to this line itself, so the
        line sits at ``velocity``.
    convention : {'radio', 'optical', 'relativistic'}, optional
        For velocity axes with ``rest_value``: the cube's velocity convention.
    catalogue : Mapping[str, Line], optional
        Catalogue used to resolve a line name.

    Returns
    -------
    Quantity
        The expected position of the line in the units of ``spectral_values``.

    Raises
    ------
    KinemapError
        The line lies outside the range, or the inputs do not fit together.
    """
    ln = _resolve(line, catalogue)
    if not isinstance(spectral_values, u.Quantity):
        raise KinemapError(
            "'spectral_values' must be a Quantity with units (frequency, wavelength or velocity), "
            f"got {type(spectral_values).__name__}"
        )
    unit = spectral_values.unit
    vals = np.asarray(spectral_values.value, dtype=float)
    if not np.any(np.isfinite(vals)):
        raise KinemapError("'spectral_values' has no finite values; pass the spectral axis world values")
    lo, hi = np.nanmin(vals), np.nanmax(vals)
    v = to_value(velocity, KMS, name="velocity", allow_plain=False)
    if np.ndim(v) != 0:
        raise KinemapError(f"'velocity' must be a single value, got shape {np.shape(v)}")
    factor = _doppler_factor(float(v))

    label = ""
    if unit.is_equivalent(u.Hz):
        if medium == "air":
            raise KinemapError("'medium' is 'air' but the spectral axis is a frequency; use medium='frequency'")
        pos = (ln.rest_value("frequency") / factor).to(unit)
    elif unit.is_equivalent(u.m):
        if medium not in ("air", "vacuum"):
            raise KinemapError(
                f"'medium' must be 'air' or 'vacuum' for a wavelength axis, got {medium!r}; "
                "take it from the CTYPE with medium_from_ctype"
            )
        vac0 = ln.rest_value("vacuum").to_value(u.AA)
        if medium == "air":
            # The Doppler shift acts on vacuum wavelengths and n(air) depends on wavelength:
            # lambda_air = lambda_vac f / n(lambda_vac f).  Scaling the catalogue air value
            # by that ratio keeps it exact at zero velocity.
            air0 = ln.rest_value("air").to_value(u.AA)
            n0 = float(_airvac.refractive_index_air(vac0))
            n1 = float(_airvac.refractive_index_air(vac0 * factor))
            pos = (air0 * factor * n0 / n1 * u.AA).to(unit)
        else:
            pos = (vac0 * factor * u.AA).to(unit)
        label = f" ({medium})"
    elif unit.is_equivalent(KMS):
        if rest_value is None:
            pos = (v * KMS).to(unit)
        else:
            if convention not in _CONVENTIONS:
                raise KinemapError(
                    f"'convention' must be one of {list(_CONVENTIONS)} with 'rest_value', got {convention!r}"
                )
            if not isinstance(rest_value, u.Quantity) or not (
                rest_value.unit.is_equivalent(u.Hz) or rest_value.unit.is_equivalent(u.m)
            ):
                raise KinemapError(
                    f"'rest_value' must be a frequency or a wavelength, got {rest_value!r}"
                )
            nu_obs = ln.rest_value("frequency") / factor
            equiv = _CONVENTIONS[convention](rest_value)
            pos = nu_obs.to(unit, equivalencies=equiv)
    else:
        raise KinemapError(
            f"'spectral_values' must be frequencies, wavelengths or velocities, got unit {unit}"
        )

    p = float(pos.value)
    if not lo <= p <= hi:
        raise KinemapError(
            f"line '{ln.name}' at {p:.10g} {unit}{label} lies outside the cube's spectral range "
            f"{lo:.10g} to {hi:.10g} {unit}; pick a line inside the range or check 'velocity' "
            "and the cube's rest value"
        )
    return pos


def is_line_name(value) -> bool:
    """A string that names a catalogue line rather than a quantity ('Halpha', '13CO_1-0')."""
    return isinstance(value, str) and value.strip() in load_catalogue()


def line_rest_value(name: str, ctype: str) -> u.Quantity:
    """The catalogue rest value of line ``name`` in the medium of a spectral axis of type
    ``ctype``: air wavelength for AWAV, vacuum for WAVE and optical velocities, frequency
    otherwise (:func:`medium_from_ctype`)."""
    medium = medium_from_ctype(ctype)
    return get_line(name.strip(), medium=medium).rest_value(medium)


def resolve_rest_value(value, ctype: str) -> u.Quantity:
    """A rest value from a catalogue line name (in the axis' medium) or a quantity
    ('1420.405751768 MHz', a Quantity); text that is neither gets a message naming both."""
    from kinemap.spectral.axes import check_rest_value
    from kinemap.units import parse_quantity

    if is_line_name(value):
        return line_rest_value(value, ctype)
    try:
        return check_rest_value(parse_quantity(value, name="rest_value"))
    except KinemapError:
        text = value.strip() if isinstance(value, str) else ""
        if text and not (text[0].isdigit() or text[0] in ".+-"):  # a word: a line name?
            raise KinemapError(
                f"'rest_value' {value!r} is neither a quantity nor a catalogue line; give a "
                f"value such as '6562.80 Angstrom' or one of {', '.join(load_catalogue())}"
            ) from None
        raise
