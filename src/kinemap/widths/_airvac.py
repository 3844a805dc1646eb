"""Air <-> vacuum wavelength conversion (plain floats in Angstrom).

The refractive index of standard air (15 C, 101325 Pa, dry, 0.03 % CO2) is the dispersion
formula of Edlen (1966, Metrologia 2, 71) in the form quoted by Morton (2000, ApJS 130, 403,
eq. 8; from memory):

    n - 1 = 8.34254e-5 + 2.406147e-2 / (130 - s^2) + 1.5998e-4 / (38.9 - s^2)

with ``s = 1e4 / lambda_vac`` the vacuum wavenumber in inverse micrometres.  NIST tabulates
air wavelengths above 2000 Angstrom with this standard air, so the formula is applied only
there; below 2000 Angstrom air and vacuum wavelengths are the same by convention (common
practice).  The formula is written in terms of the *vacuum* wavenumber, so air -> vacuum is
solved by fixed-point iteration (it converges by a factor ~1e-4 per step).
"""
from __future__ import annotations

import numpy as np

__all__ = ["refractive_index_air", "vacuum_to_air", "air_to_vacuum", "AIR_CUTOFF_ANGSTROM"]

#: below this vacuum wavelength no air conversion is applied (NIST convention; common practice)
AIR_CUTOFF_ANGSTROM = 2000.0


def refractive_index_air(vacuum_angstrom):
    """Refractive index of standard air at vacuum wavelength(s) in Angstrom (Edlen 1966)."""
    lam = np.asarray(vacuum_angstrom, dtype=float)
    s2 = (1.0e4 / lam) ** 2
    n = 1.0 + 8.34254e-5 + 2.406147e-2 / (130.0 - s2) + 1.5998e-4 / (38.9 - s2)
    return np.where(lam >= AIR_CUTOFF_ANGSTROM, n, 1.0)


def vacuum_to_air(vacuum_angstrom):
    """Air wavelength(s) in Angstrom for vacuum wavelength(s) in Angstrom."""
    lam = np.asarray(vacuum_angstrom, dtype=float)
    return lam / refractive_index_air(lam)


def air_to_vacuum(air_angstrom):
    """Vacuum wavelength(s) in Angstrom for air wavelength(s) in Angstrom (iterative inverse)."""
    air = np.asarray(air_angstrom, dtype=float)
    vac = air.copy()
    # Each step shrinks the error by about d(n)/d(ln lambda) ~ 1e-5; six steps reach float64.
    for _ in range(6):
        vac = air * refractive_index_air(vac)
    return vac
