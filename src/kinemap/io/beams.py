"""Beams: one beam, a beam per channel, or none (optical cubes).

A single beam is held in a small :class:`Beam` read straight from BMAJ/BMIN/BPA (radio-beam
costs a third of a second to import, which every run of a single-beam cube would pay);
cubes with a beam per channel go through radio-beam and spectral-cube.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import astropy.units as u

from kinemap.errors import BeamWarning, KinemapError

__all__ = ["Beam", "as_beam", "parse_beam", "read_beam", "BEAM_POLICIES"]


@dataclass(frozen=True)
class Beam:
    """An elliptical Gaussian beam: FWHM major and minor axes and position angle (Quantities)."""

    major: u.Quantity
    minor: u.Quantity
    pa: u.Quantity

    @property
    def sr(self) -> u.Quantity:
        """Solid angle of the Gaussian beam, pi / (4 ln 2) * major * minor."""
        return (math.pi / (4.0 * math.log(2.0)) * self.major * self.minor).to(u.sr)

    @classmethod
    def from_header(cls, header) -> "Beam":
        try:
            major = float(header["BMAJ"]) * u.deg
            minor = float(header["BMIN"]) * u.deg
            pa = float(header.get("BPA", 0.0)) * u.deg
        except (TypeError, ValueError):
            raise KinemapError("BMAJ/BMIN/BPA in the header are not numbers; fix the header") from None
        if not (major.value > 0 and minor.value > 0):
            raise KinemapError(f"the beam in the header is not positive (BMAJ {major}, BMIN {minor})")
        return cls(major, minor, pa)

    @classmethod
    def from_radio_beam(cls, beam) -> "Beam":
        return cls(beam.major.to(u.deg), beam.minor.to(u.deg), beam.pa.to(u.deg))

    def __str__(self) -> str:
        return (f"{self.major.to_value(u.arcsec):.4g} x {self.minor.to_value(u.arcsec):.4g} "
                f"arcsec, PA {self.pa.to_value(u.deg):.1f} deg")


def as_beam(value) -> Beam:
    """A :class:`Beam` from what a caller may hold: a FWHM Quantity (circular beam), a
    string ('46arcsec' or '30arcsec,20arcsec,45deg': major, minor, position angle), a
    :class:`Beam` or a ``radio_beam.Beam``."""
    if isinstance(value, Beam):
        return value
    if all(hasattr(value, a) for a in ("major", "minor", "pa")):  # radio_beam.Beam
        return Beam.from_radio_beam(value)
    if isinstance(value, str):
        return parse_beam(value)
    if isinstance(value, u.Quantity) and value.unit.is_equivalent(u.deg) and value.isscalar:
        if not value.value > 0:
            raise KinemapError(f"'beam' must be positive, got {value}")
        return Beam(value.to(u.deg), value.to(u.deg), 0.0 * u.deg)
    raise KinemapError(f"'beam' must be an angle like '46 arcsec' (FWHM), "
                       f"'30arcsec,20arcsec,45deg' or a beam object, got {value!r}")


_BEAM_FORM = "'46arcsec' (circular) or '30arcsec,20arcsec,45deg' (major, minor, position angle)"


def parse_beam(text) -> Beam:
    """A beam written as text: '46arcsec' (circular, FWHM) or '30arcsec,20arcsec,45deg'
    (FWHM major and minor axes, position angle east of north).  Every value needs an angle
    unit; the axes must be positive and the minor axis no larger than the major."""
    parts = [p.strip() for p in str(text).split(",")]
    bad = KinemapError(f"'beam' must look like {_BEAM_FORM}, got {text!r}")
    if len(parts) not in (1, 3) or not all(parts):
        raise bad
    try:
        values = [u.Quantity(p) for p in parts]
    except (TypeError, ValueError):
        raise bad from None
    if not all(v.unit.physical_type == "angle" and v.isscalar for v in values):
        raise KinemapError(f"'beam' values need angle units (arcsec, deg), got {text!r}; "
                           f"write it like {_BEAM_FORM}")
    major = values[0].to(u.deg)
    minor = values[1].to(u.deg) if len(values) == 3 else major
    pa = values[2].to(u.deg) if len(values) == 3 else 0.0 * u.deg
    if not (math.isfinite(major.value) and math.isfinite(minor.value) and math.isfinite(pa.value)):
        raise bad
    if not (major.value > 0 and minor.value > 0):
        raise KinemapError(f"'beam' axes must be positive, got {text!r}")
    if minor > major:
        raise KinemapError(f"'beam' minor axis {values[1]} is larger than the major axis "
                           f"{values[0]}; give the major axis first")
    return Beam(major, minor, pa)


BEAM_POLICIES = ("common", "refuse")


def read_beam(hdul, header, *, radio_like: bool):
    """Return ``(beam, beams)`` from a FITS file.

    ``beam`` is a :class:`Beam` (or None), ``beams`` a
    :class:`radio_beam.Beams` when the file carries a beam per channel (a ``BEAMS``
    table), else None.  A radio-like cube (frequency or velocity axis) without a beam gets
    a :class:`BeamWarning`; optical cubes are expected to have none and stay quiet.
    """
    for hdu in hdul[1:]:
        if hdu.name.upper() == "BEAMS":
            from radio_beam import Beams

            try:
                beams = Beams.from_fits_bintable(hdu)
            except Exception as exc:  # malformed table: say what, not where
                raise KinemapError(f"could not read the BEAMS table: {exc}") from None
            return None, beams
    if "BMAJ" in header and "BMIN" in header:
        return Beam.from_header(header), None
    if radio_like:
        warnings.warn(
            "no beam in the header (BMAJ/BMIN/BPA); beam ellipses and beam-based defaults "
            "are unavailable", BeamWarning, stacklevel=3)
    return None, None


def check_policy(policy: str) -> str:
    p = str(policy).strip().lower()
    if p not in BEAM_POLICIES:
        raise KinemapError(f"'beams' must be one of {', '.join(BEAM_POLICIES)}, got {policy!r}")
    return p
