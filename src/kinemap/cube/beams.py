"""Beams: one beam, a beam per channel, or none (optical cubes)."""
from __future__ import annotations

import warnings

from ..errors import BeamWarning, KinemapError

__all__ = ["read_beam", "BEAM_POLICIES"]

BEAM_POLICIES = ("common", "refuse")


def read_beam(hdul, header, *, radio_like: bool):
    """Return ``(beam, beams)`` from a FITS file.

    ``beam`` is a :class:`radio_beam.Beam` (or None), ``beams`` a
    :class:`radio_beam.Beams` when the file carries a beam per channel (a ``BEAMS``
    table), else None.  A radio-like cube (frequency or velocity axis) without a beam gets
    a :class:`BeamWarning`; optical cubes are expected to have none and stay quiet.
    """
    from radio_beam import Beam, Beams

    for hdu in hdul[1:]:
        if hdu.name.upper() == "BEAMS":
            try:
                beams = Beams.from_fits_bintable(hdu)
            except Exception as exc:  # malformed table: say what, not where
                raise KinemapError(f"could not read the BEAMS table: {exc}") from None
            return None, beams
    if "BMAJ" in header and "BMIN" in header:
        try:
            return Beam.from_fits_header(header), None
        except Exception as exc:
            raise KinemapError(f"could not read BMAJ/BMIN/BPA from the header: {exc}") from None
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
