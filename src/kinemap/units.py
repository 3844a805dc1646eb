"""The one helper that strips units at the public boundary and restores them on the way out."""
from __future__ import annotations

import astropy.units as u
import numpy as np

from kinemap.errors import KinemapError

__all__ = ["to_value", "parse_quantity", "KMS"]

KMS = u.km / u.s


def to_value(value, unit, *, name: str, equivalencies=None, allow_plain: bool = True):
    """Return ``value`` as float(s) in ``unit``.

    Plain numbers are taken to be in ``unit`` already when ``allow_plain`` is true.
    Raises :class:`KinemapError` naming ``name`` when the unit does not convert.
    """
    unit = u.Unit(unit)
    if isinstance(value, str):
        value = parse_quantity(value, name=name)
        if value.unit == u.dimensionless_unscaled:  # a bare number written as text
            value = value.value
    if isinstance(value, u.Quantity):
        try:
            out = value.to_value(unit, equivalencies=equivalencies or [])
        except u.UnitConversionError:
            raise KinemapError(
                f"'{name}' must be in units convertible to {unit}, got {value}"
            ) from None
        return out
    if not allow_plain:
        raise KinemapError(f"'{name}' needs a unit (for example '{1.0 * unit}'), got {value!r}")
    return np.asarray(value, dtype=float) if np.ndim(value) else float(value)


def parse_quantity(text, *, name: str) -> u.Quantity:
    """Parse '5 km/s', '1420.405 MHz', '1e4 K' into a Quantity; a clear error otherwise."""
    if isinstance(text, u.Quantity):
        return text
    try:
        q = u.Quantity(str(text).strip().replace("\u2212", "-"))
    except (TypeError, ValueError):
        raise KinemapError(
            f"could not read '{name}' = {text!r} as a number with a unit; write it like '5 km/s'"
        ) from None
    return q
