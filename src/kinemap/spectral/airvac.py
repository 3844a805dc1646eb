"""Air <-> vacuum wavelength conversion (plain floats in Angstrom).

Two formulas live here, each where its definition belongs:

* :func:`vacuum_to_air` / :func:`air_to_vacuum`: Edlen (1966), the standard air of the NIST
  tables; the line catalogue uses it.
* :func:`fits_vacuum_to_air`: the dispersion of air that wcslib applies to FITS ``AWAV``
  axes, Edlen's (1953, J. Opt. Soc. Am. 43, 339; from memory) formula in terms of the air
  wavenumber sigma = 1 / lambda_air (micrometres^-1)::

      n = 1 + 1e-8 (6432.8 + 2949810 / (146 - sigma^2) + 25540 / (41 - sigma^2))

  FITS WCS Paper III makes ``RESTWAV`` a vacuum wavelength; the reader turns an AWAV
  cube's RESTWAV into the air rest wavelength with this formula so kinemap's velocities
  agree with wcslib's reading of the same header (the tests check it against
  astropy.wcs's 'WAVE-A2W' translation).  Edlen 1953 and 1966 differ by ~0.0001 Angstrom
  at H-alpha.
"""
from __future__ import annotations

import numpy as np

__all__ = ["refractive_index_air", "vacuum_to_air", "air_to_vacuum", "AIR_CUTOFF_ANGSTROM",
           "fits_refractive_index", "fits_vacuum_to_air", "fits_air_to_vacuum"]

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


def fits_refractive_index(air_angstrom):
    """Refractive index of air at air wavelength(s) in Angstrom (Edlen 1953, as in wcslib)."""
    sigma2 = (1.0e4 / np.asarray(air_angstrom, dtype=float)) ** 2
    return 1.0 + 1e-8 * (6432.8 + 2949810.0 / (146.0 - sigma2) + 25540.0 / (41.0 - sigma2))


def fits_vacuum_to_air(vacuum_angstrom):
    """Air wavelength for a vacuum wavelength with :func:`fits_refractive_index` (iterated)."""
    vac = np.asarray(vacuum_angstrom, dtype=float)
    air = vac.copy()
    for _ in range(4):  # n depends on the air wavelength; converges by ~1e-4 per step
        air = vac / fits_refractive_index(air)
    return air


def fits_air_to_vacuum(air_angstrom):
    """Vacuum wavelength for an air wavelength with :func:`fits_refractive_index`: exact in
    the formula's terms (n is a function of the air wavelength), the inverse of
    :func:`fits_vacuum_to_air`; products of AWAV cubes write RESTWAV with it."""
    air = np.asarray(air_angstrom, dtype=float)
    return air * fits_refractive_index(air)
