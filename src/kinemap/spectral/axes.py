"""Spectral axes and velocity conventions.

Three conventions relate a spectral coordinate to a line-of-sight velocity (positive when
the source recedes), with rest frequency f0 or rest wavelength l0:

* radio:        v = c (f0 - f) / f0          = c (1 - l0 / l)
* optical:      v = c (f0 - f) / f           = c (l - l0) / l0
* relativistic: v = c (f0^2 - f^2) / (f0^2 + f^2)

The conversions go through astropy's ``doppler_radio``, ``doppler_optical`` and
``doppler_relativistic`` equivalencies.  A convention is never changed by editing CTYPE:
a velocity axis in one convention is converted to frequency (or wavelength) with its own
convention and rest value, then to velocity in the new one.

Air wavelengths (``AWAV``) are handled through ratios l / l0 only, never through a
frequency, so the rest wavelength must be an air wavelength too (the equivalencies use
only the ratio, which is the same in air and vacuum to the accuracy of the dispersion of
air across the band, a few parts in 1e7 for optical lines; this is the approximation made).
"""
from __future__ import annotations

from dataclasses import dataclass
from types import MappingProxyType

import astropy.units as u
import numpy as np

from kinemap.errors import KinemapError

__all__ = [
    "CONVENTIONS",
    "AxisKind",
    "SPECTRAL_CTYPES",
    "axis_kind",
    "to_velocity",
    "from_velocity",
    "check_rest_value",
]

CONVENTIONS = ("radio", "optical", "relativistic")

_EQUIV = {
    "radio": u.doppler_radio,
    "optical": u.doppler_optical,
    "relativistic": u.doppler_relativistic,
}


@dataclass(frozen=True)
class AxisKind:
    """What a spectral CTYPE means.

    Attributes
    ----------
    physical : {'frequency', 'wavelength', 'velocity'}
    convention : str
        The convention this axis implies by default (frequency -> radio,
        wavelength -> optical, a velocity axis keeps its own).
    medium : {'air', 'vacuum', None}
        The medium of the axis values: for wavelength axes only.
    """

    physical: str
    convention: str
    medium: str | None = None

    @property
    def rest_medium(self) -> str:
        """Medium of the rest values that go with this axis: 'air', 'vacuum' or 'frequency'.

        A wavelength axis needs rest wavelengths in its own medium.  A velocity axis has no
        medium of its own (``medium`` is None: its values are velocities, nothing on it is
        converted between air and vacuum), but the FITS standard (Greisen et al. 2006, A&A
        446, 747) defines each velocity through the quantity it is linear in: radio
        velocity through frequency, optical velocity and redshift (VOPT, ZOPT, FELO)
        through the VACUUM wavelength (RESTWAV is a vacuum value there), so the rest value
        of an optical-velocity axis is a vacuum wavelength, and 'vacuum' is the answer for
        looking a line up.  Frequency and vacuum wavelength are equivalent through c, so
        frequency-like and relativistic axes take 'frequency'.
        """
        if self.physical == "wavelength":
            return self.medium
        if self.physical == "velocity" and self.convention == "optical":
            return "vacuum"
        return "frequency"


# The one table of FITS spectral axis types (Greisen et al. 2006, A&A 446, 747, table 1),
# keyed by the first four characters; ``axis_kind`` and ``catalogue.medium_from_ctype``
# both read it.  Listed in the order error messages name them.
SPECTRAL_CTYPES = MappingProxyType({
    "AWAV": AxisKind("wavelength", "optical", "air"),
    "WAVE": AxisKind("wavelength", "optical", "vacuum"),
    "VOPT": AxisKind("velocity", "optical"),
    "ZOPT": AxisKind("velocity", "optical"),
    "FELO": AxisKind("velocity", "optical"),
    "FREQ": AxisKind("frequency", "radio"),
    "ENER": AxisKind("frequency", "radio"),
    "WAVN": AxisKind("frequency", "radio"),
    "VRAD": AxisKind("velocity", "radio"),
    "VELO": AxisKind("velocity", "relativistic"),
    "BETA": AxisKind("velocity", "relativistic"),
})


def axis_kind(ctype: str) -> AxisKind:
    """Classify a spectral CTYPE (after wcslib's repairs) such as 'FREQ', 'AWAV', 'VOPT-F2W'."""
    base = ctype.split("-")[0].strip().upper()
    if base in SPECTRAL_CTYPES:
        return SPECTRAL_CTYPES[base]
    raise KinemapError(
        f"spectral axis type {ctype!r} is not supported; kinemap reads FREQ, WAVE, AWAV, "
        "VRAD, VOPT and VELO axes"
    )


def check_convention(convention: str) -> str:
    conv = str(convention).strip().lower()
    if conv not in CONVENTIONS:
        raise KinemapError(
            f"'convention' must be one of {', '.join(CONVENTIONS)}, got {convention!r}"
        )
    return conv


def check_rest_value(rest_value) -> u.Quantity:
    """Validate a rest value: a frequency or a wavelength Quantity."""
    if not isinstance(rest_value, u.Quantity):
        raise KinemapError(
            f"'rest_value' must be a frequency or a wavelength with a unit, got {rest_value!r}"
        )
    if not (rest_value.unit.is_equivalent(u.Hz) or rest_value.unit.is_equivalent(u.m)):
        raise KinemapError(
            f"'rest_value' must be a frequency or a wavelength, got {rest_value}"
        )
    if not np.isfinite(rest_value.value) or rest_value.value <= 0:
        raise KinemapError(f"'rest_value' must be positive and finite, got {rest_value}")
    return rest_value


def _needs_rest(what: str):
    raise KinemapError(
        f"no rest value: {what}; the header has no RESTFRQ/RESTFREQ/RESTWAV, so give one "
        "with --rest-value (for example '1420.405751768 MHz' or '6562.80 Angstrom')"
    )


def to_velocity(spectral: u.Quantity, *, convention: str, rest_value: u.Quantity | None,
                native_convention: str | None = None,
                native_rest: u.Quantity | None = None) -> np.ndarray:
    """Convert spectral coordinates to velocity in km/s (float64) in ``convention``.

    Parameters
    ----------
    spectral : Quantity
        Frequencies, wavelengths (air or vacuum, same medium as ``rest_value``) or
        velocities.
    convention : {'radio', 'optical', 'relativistic'}
    rest_value : Quantity or None
        Rest frequency or wavelength.  Needed unless ``spectral`` is a velocity already in
        ``convention``.
    native_convention, native_rest : optional
        For velocity input: the convention and rest value the velocities are in.
    """
    convention = check_convention(convention)
    if spectral.unit.is_equivalent(u.m / u.s):
        native = check_convention(native_convention or convention)
        if native == convention:
            return spectral.to_value(u.km / u.s).astype(np.float64)
        rest = native_rest if native_rest is not None else rest_value
        if rest is None:
            _needs_rest(f"converting {native} velocities to the {convention} convention")
        # Through the rest value's own physical type: frequency or wavelength ratio.
        through = spectral.to(rest.unit, equivalencies=_EQUIV[native](rest))
        return through.to_value(u.km / u.s, equivalencies=_EQUIV[convention](rest)).astype(
            np.float64)
    if rest_value is None:
        _needs_rest("a frequency or wavelength axis needs one to give velocities")
    rest_value = check_rest_value(rest_value)
    if spectral.unit.is_equivalent(u.m) and not rest_value.unit.is_equivalent(u.m):
        # A wavelength axis with a rest frequency: fine in vacuum only; the reader refuses
        # this for air wavelengths before we get here.
        rest_value = rest_value.to(u.m, equivalencies=u.spectral())
    if spectral.unit.is_equivalent(u.Hz) and not rest_value.unit.is_equivalent(u.Hz):
        rest_value = rest_value.to(u.Hz, equivalencies=u.spectral())
    return spectral.to_value(u.km / u.s, equivalencies=_EQUIV[convention](rest_value)).astype(
        np.float64)


def from_velocity(velocity_kms, *, convention: str, rest_value: u.Quantity,
                  unit) -> u.Quantity:
    """Inverse of :func:`to_velocity` for frequency/wavelength output in ``unit``."""
    convention = check_convention(convention)
    rest_value = check_rest_value(rest_value)
    v = u.Quantity(velocity_kms, u.km / u.s)
    return v.to(unit, equivalencies=_EQUIV[convention](rest_value))
