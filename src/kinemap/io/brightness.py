"""Brightness units: a cube in K (brightness temperature) or Jy/beam, converted to the other.

The conversion is astropy's ``brightness_temperature`` equivalency (Rayleigh-Jeans), which
needs the beam's solid angle and the frequency of each channel: a frequency axis gives it
directly, a wavelength axis through ``u.spectral()``, a velocity axis through the rest
frequency and the cube's velocity convention.  Each channel gets its own factor (they
differ by the fractional bandwidth squared); the data are scaled as they are read, so the
cube is not copied and every stage after the reader sees the new unit.
"""
from __future__ import annotations

from dataclasses import replace

import astropy.units as u
import numpy as np

from kinemap.errors import KinemapError

__all__ = ["BRIGHTNESS_UNITS", "brightness_factors", "convert_brightness"]

BRIGHTNESS_UNITS = {"K": u.K, "Jy/beam": u.Jy / u.beam}


class ScaledData:
    """``data`` times a factor per channel, computed on slicing (no copy of the cube)."""

    def __init__(self, data, factors):
        self._data = data
        self._factors = np.asarray(factors, dtype=np.float64)
        dt = np.dtype(getattr(data, "dtype", np.float64))
        self.dtype = np.dtype(np.float32) if dt == np.float32 else np.dtype(np.float64)
        self.shape = tuple(int(n) for n in data.shape)
        self.ndim = len(self.shape)

    def __getitem__(self, key):
        values = np.asarray(self._data[key])
        # the factors, indexed exactly as the data (a broadcast view costs no memory)
        f = np.broadcast_to(self._factors[:, None, None], self.shape)[key]
        return (values * f).astype(self.dtype, copy=False)

    def __array__(self, dtype=None, copy=None):
        out = self[:, :, :]
        return out if dtype is None else out.astype(dtype)


def _frequencies(cube) -> u.Quantity:
    """Channel frequencies (Hz) for the equivalency."""
    spectral = cube.spectral
    if spectral.unit.is_equivalent(u.Hz, equivalencies=u.spectral()):
        return spectral.to(u.Hz, equivalencies=u.spectral())
    rest = cube.meta.rest_value
    if rest is None:
        raise KinemapError("--unit needs a rest frequency to turn the velocity axis into "
                           "frequencies; give it with --rest-value (e.g. '110.2013543 GHz')")
    from kinemap.spectral.axes import from_velocity

    rest_hz = rest.to(u.Hz, equivalencies=u.spectral())
    return from_velocity(cube.velocity, convention=cube.meta.convention, rest_value=rest_hz,
                         unit=u.Hz)


def brightness_factors(cube, unit) -> np.ndarray:
    """Per-channel factors that turn ``cube``'s values into ``unit`` ('K' or 'Jy/beam')."""
    if unit not in BRIGHTNESS_UNITS:
        raise KinemapError(f"'unit' must be one of {', '.join(BRIGHTNESS_UNITS)}, got {unit!r}")
    target = BRIGHTNESS_UNITS[unit]
    bunit = cube.meta.bunit
    if not any(bunit.is_equivalent(t) for t in BRIGHTNESS_UNITS.values()):
        raise KinemapError(f"--unit converts between K and Jy/beam, but the cube is in "
                           f"'{bunit}'; fix its unit with --bunit if BUNIT is wrong")
    if bunit.is_equivalent(target):
        return np.full(cube.nchan, (1.0 * bunit).to_value(target))
    beam = cube.meta.beam
    if beam is None:
        raise KinemapError(f"--unit {unit} needs the cube's beam and the header has none; give "
                           "it with --beam (e.g. '46arcsec')")
    eq = u.brightness_temperature(_frequencies(cube), beam_area=beam.sr)
    return np.asarray((1.0 * bunit).to_value(target, equivalencies=eq), dtype=np.float64)


def convert_brightness(cube, unit):
    """``cube`` with its values in ``unit`` ('K' or 'Jy/beam'; None: unchanged).

    Raises KinemapError when the cube is in neither unit, has no beam, or (velocity axis)
    no rest frequency.  The data are scaled lazily (see :class:`ScaledData`).
    """
    if unit is None:
        return cube
    factors = brightness_factors(cube, unit)
    target = BRIGHTNESS_UNITS[unit]
    meta = replace(cube.meta, bunit=target, bunit_missing=False,
                   repairs=tuple(cube.meta.repairs) + (
                       f"values converted from {cube.meta.bunit} to {unit}",))
    if np.all(factors == 1.0):
        return cube.with_changes(meta=meta)
    return cube.with_changes(data=ScaledData(cube.data, factors), meta=meta)
