"""Pieces both invented demo scenarios share (private): the result type, input checks that
raise one-line KinemapErrors, physical constants and the header helpers.

See :mod:`kinemap.datasets.generate` for the scenarios and their conventions.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import astropy.constants as const
import astropy.units as u
import numpy as np
from astropy.io import fits

from kinemap.units import to_value
from kinemap.errors import KinemapError

# 2 sqrt(2 ln 2): FWHM of a Gaussian in units of its sigma (exact).
FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))

C_KMS = const.c.to_value(u.km / u.s)
KMS = u.km / u.s


@dataclass(frozen=True)
class DemoCube:
    """An invented cube and the truth it was made from.

    Attributes
    ----------
    name : str
        Short identifier, ``'galaxy_hi'`` or ``'nebula_halpha'``.
    hdu : astropy.io.fits.PrimaryHDU
        The cube, float32, axes (spectral, y, x), with a complete celestial + spectral
        WCS header.
    truth : dict
        The known truth: plain floats, strings (conventions), 1D curves and 2D maps
        (numpy float64 arrays of shape (ny, nx), read-only, NaN where undefined).  Every
        numeric key carries its unit in its name.
    """

    name: str
    hdu: fits.PrimaryHDU
    truth: dict[str, Any]


# ----------------------------------------------------------------------------------
# validation helpers (one-line KinemapError naming parameter, problem and fix)
# ----------------------------------------------------------------------------------
def scalar(value, unit, name: str, *, low=None, high=None, low_open=False,
            high_open=False, equivalencies=None) -> float:
    """Strip the unit of a scalar input and check its range; raise KinemapError if bad."""
    try:
        out = to_value(value, unit, name=name, equivalencies=equivalencies)
    except (TypeError, ValueError):
        raise KinemapError(f"'{name}' must be a number (in {unit}), got {value!r}") from None
    if np.ndim(out) != 0:
        raise KinemapError(f"'{name}' must be a single number, got an array of shape "
                           f"{np.shape(out)}")
    out = float(out)
    unit_txt = "" if u.Unit(unit) == u.one else f" {u.Unit(unit).to_string()}"
    if not math.isfinite(out):
        raise KinemapError(f"'{name}' must be finite, got {out}{unit_txt}")
    bad_low = low is not None and (out <= low if low_open else out < low)
    bad_high = high is not None and (out >= high if high_open else out > high)
    if bad_low or bad_high:
        lo = "-inf" if low is None else f"{low:g}"
        hi = "inf" if high is None else f"{high:g}"
        lb = "(" if low_open or low is None else "["
        hb = ")" if high_open or high is None else "]"
        raise KinemapError(f"'{name}' must be in {lb}{lo}, {hi}{hb}{unit_txt}, "
                           f"got {out:g}{unit_txt}")
    return out


def integer(value, name: str, *, low: int, high: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise KinemapError(f"'{name}' must be an integer between {low} and {high}, "
                           f"got {value!r}")
    if not low <= int(value) <= high:
        raise KinemapError(f"'{name}' must be an integer between {low} and {high}, "
                           f"got {value}")
    return int(value)


def spatial_shape(value, name: str) -> tuple[int, int]:
    if not (isinstance(value, (tuple, list)) and len(value) == 2):
        raise KinemapError(f"'{name}' must be a pair (ny, nx) of integers, got {value!r}")
    return (integer(value[0], f"{name}[0] (ny)", low=16, high=1024),
            integer(value[1], f"{name}[1] (nx)", low=16, high=1024))


def pair(value, unit, name: str) -> tuple[float, float]:
    if isinstance(value, u.Quantity) and value.shape == (2,):
        value = (value[0], value[1])
    if not (isinstance(value, (tuple, list)) and len(value) == 2):
        raise KinemapError(f"'{name}' must be a pair of numbers (in {unit}), got {value!r}")
    return (scalar(value[0], unit, f"{name}[0]"), scalar(value[1], unit, f"{name}[1]"))


def seed_value(seed) -> int:
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise KinemapError(f"'seed' must be a non-negative integer, got {seed!r}")
    return int(seed)


def frozen(array) -> np.ndarray:
    """A float64 copy that cannot be written to (truth is immutable)."""
    out = np.array(array, dtype=float)
    out.setflags(write=False)
    return out


def celestial_cards(projection, ra0, dec0, x_ref, y_ref, pix):
    """RA/Dec header cards: north up, east left, pixel (x_ref, y_ref) 0-based at (ra0, dec0)."""
    return [
        ("CTYPE1", f"RA---{projection}", ""), ("CUNIT1", "deg", ""),
        ("CRVAL1", ra0, "[deg]"), ("CRPIX1", float(x_ref + 1), ""),
        ("CDELT1", -pix / 3600.0, "[deg] east is left"),
        ("CTYPE2", f"DEC--{projection}", ""), ("CUNIT2", "deg", ""),
        ("CRVAL2", dec0, "[deg]"), ("CRPIX2", float(y_ref + 1), ""),
        ("CDELT2", pix / 3600.0, "[deg] north is up"),
    ]


def check_reference_position(ra0, dec0):
    """Refuse an (RA, Dec) reference outside [0, 360) x (-90, 90) deg."""
    if not (0 <= ra0 < 360 and -90 < dec0 < 90):
        raise KinemapError(f"'reference_position' must be (RA in [0, 360), Dec in (-90, 90)) "
                           f"deg, got ({ra0:g}, {dec0:g}) deg")


def cube_hdu(data, cards, notes) -> fits.PrimaryHDU:
    """A float32 primary HDU of ``data`` with ``cards`` (key, value, comment), then ``notes``
    (key, text) such as COMMENT and HISTORY lines, in that order."""
    hdu = fits.PrimaryHDU(data.astype(np.float32))
    hdr = hdu.header
    for key, value, comment in cards:
        hdr[key] = (value, comment)
    for key, text in notes:
        hdr[key] = text
    return hdu
