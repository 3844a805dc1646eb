"""Thermal line width, sound speed and channel response: the physics of the width budget.

All functions take Quantities (plain numbers are read in the documented unit) and return
Quantities in km/s.  NaN in -> NaN out.
"""
from __future__ import annotations

import astropy.units as u
import numpy as np
from astropy.constants import k_B

from kinemap.units import KMS, to_value
from kinemap.errors import KinemapError
from kinemap.spectral.catalogue import Line
from kinemap.spectral.response import response_sigma

__all__ = [
    "K_OVER_AMU",
    "HYDROGEN_MASS_AMU",
    "MU_MOLECULAR",
    "MU_IONIZED",
    "thermal_dispersion",
    "sound_speed",
    "channel_dispersion",
]

#: Boltzmann constant over the atomic mass unit in (km/s)^2 per K (astropy.constants):
#: sigma_th^2 = K_OVER_AMU * T / m[amu].
K_OVER_AMU = float((k_B / u.u).to_value(KMS**2 / u.K))

#: Hydrogen atom mass used in the sound speed, amu (standard atomic weight, IUPAC; from memory)
HYDROGEN_MASS_AMU = 1.008

#: mean mass per free particle in units of m_H for molecular gas (H2 + He; common practice,
#: Kauffmann et al. 2008; from memory) and for fully ionized gas (common practice)
MU_MOLECULAR = 2.33
MU_IONIZED = 0.6


def temperature_kelvin(temperature, *, name: str = "temperature"):
    """Temperature(s) as float K; KinemapError for non-temperatures or values <= 0 K."""
    t = to_value(temperature, u.K, name=name, equivalencies=u.temperature())
    t_arr = np.asarray(t, dtype=float)
    if np.any(t_arr[np.isfinite(t_arr)] <= 0):
        raise KinemapError(f"'{name}' must be above 0 K, got a minimum of {np.nanmin(t_arr)} K")
    return t


def mass_amu(mass) -> float:
    """Mass in amu from a Line, a mass Quantity or a plain number (amu)."""
    if isinstance(mass, Line):
        return mass.mass_amu
    m = to_value(mass, u.u, name="mass")
    if np.ndim(m) != 0 or not np.isfinite(m) or m <= 0:
        raise KinemapError(f"'mass' must be a single positive mass such as '1.008 u', got {mass!r}")
    return float(m)


def mu_value(mu) -> float:
    """Validated mean molecular weight (plain positive number)."""
    if isinstance(mu, u.Quantity):
        if mu.unit.physical_type != "dimensionless":
            raise KinemapError(f"'mu' is a mean particle mass in units of m_H (a plain number), got {mu}")
        mu = mu.to_value(u.one)
    try:
        mu = float(mu)
    except (TypeError, ValueError):
        raise KinemapError(f"'mu' must be a positive number such as 2.33, got {mu!r}") from None
    if not np.isfinite(mu) or mu <= 0:
        raise KinemapError(f"'mu' must be a positive number such as 2.33 (molecular) or 0.6 (ionized), got {mu}")
    return mu


def thermal_dispersion(temperature, mass) -> u.Quantity:
    """Thermal (1D, Gaussian sigma) velocity dispersion ``sqrt(k T / m)``.

    Parameters
    ----------
    temperature : Quantity
        Kinetic temperature (K; scalar or array; Celsius converts). Must be > 0 K.
    mass : Line, Quantity or float
        Emitter mass: a :class:`Line`, a mass Quantity, or a number in amu.

    Returns
    -------
    Quantity
        Dispersion in km/s with the shape of ``temperature``.
    """
    t = temperature_kelvin(temperature)
    return np.sqrt(K_OVER_AMU * np.asarray(t, dtype=float) / mass_amu(mass)) * KMS


def sound_speed(temperature, *, mu: float = MU_MOLECULAR) -> u.Quantity:
    """Isothermal sound speed ``c_s = sqrt(k T / (mu m_H))``.

    Parameters
    ----------
    temperature : Quantity
        Kinetic temperature (K), > 0.
    mu : float, optional
        Mean mass per free particle in units of the hydrogen-atom mass: 2.33 for molecular
        gas (default), 0.6 for fully ionized gas.

    Returns
    -------
    Quantity
        Sound speed in km/s.
    """
    t = temperature_kelvin(temperature)
    return np.sqrt(K_OVER_AMU * np.asarray(t, dtype=float) / (mu_value(mu) * HYDROGEN_MASS_AMU)) * KMS


def channel_dispersion(channel_width) -> u.Quantity:
    """Dispersion of a top-hat channel response, ``dv / sqrt(12)`` (exact for a top hat).

    Parameters
    ----------
    channel_width : Quantity
        Channel width in velocity units (km/s if plain); its sign is ignored.

    Notes
    -----
    Spectrometers with channel-to-channel correlation (e.g. Hanning smoothing, about
    2 channels FWHM; common practice) have wider responses: pass the measured response
    dispersion to :func:`~kinemap.widths.width_budget` instead.
    """
    return response_sigma("tophat", to_value(channel_width, KMS, name="channel_width")) * KMS
