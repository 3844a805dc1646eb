"""Dynamical mass enclosed by a circular orbit."""
from __future__ import annotations

import astropy.constants as const
import astropy.units as u
import numpy as np

from kinemap.units import KMS, to_value
from kinemap.errors import KinemapError

__all__ = ["dynamical_mass", "physical_radius"]


def dynamical_mass(v_rot, radius) -> u.Quantity:
    """M(<R) = v^2 R / G for a spherical mass distribution, in solar masses.

    Parameters
    ----------
    v_rot : Quantity or float
        Circular velocity (plain numbers km/s).  NaN propagates.
    radius : Quantity or float
        Radius (plain numbers kpc).

    Notes
    -----
    The spherical approximation; a thin exponential disk needs up to ~30% less mass for
    the same rotation speed (common practice).  G from astropy.constants.
    """
    v = np.asarray(to_value(v_rot, KMS, name="v_rot"), float)
    r = np.asarray(to_value(radius, u.kpc, name="radius"), float)
    if np.any(r[np.isfinite(r)] < 0):
        raise KinemapError("'radius' must be >= 0 for a dynamical mass")
    return (v * KMS) ** 2 * (r * u.kpc) / const.G.to(u.kpc * KMS**2 / u.M_sun)


def physical_radius(radius, distance) -> u.Quantity:
    """Projected angular radius to kpc at ``distance`` (small-angle approximation)."""
    ang = np.asarray(to_value(radius, u.arcsec, name="radius"), float)
    d = to_value(distance, u.Mpc, name="distance")
    if np.ndim(d) != 0 or not np.isfinite(d) or d <= 0:
        raise KinemapError(f"'distance' must be one positive length, e.g. 10 * u.Mpc, got {distance!r}")
    return (np.deg2rad(ang / 3600.0) * float(d) * 1000.0) * u.kpc
