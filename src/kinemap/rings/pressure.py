"""Pressure support: the asymmetric-drift correction of a gas rotation curve.

Gas with a velocity dispersion sigma is partly held up by its own pressure, so it
rotates slower than the circular speed that traces the mass.  For an isotropic
dispersion in a thin disk (the usual HI form; e.g. DESIGN.md, from memory)::

    V_c^2 = v_rot^2 + V_A^2,      V_A^2 = -R sigma^2 d ln(Sigma sigma^2) / dR

with Sigma the face-on surface density (any constant factor, such as a mass-to-light
ratio or 1 / cos i, drops out of the logarithmic derivative).  Differencing noisy rings
would amplify their noise, so ln(Sigma sigma^2) is fitted with a straight line in R by
default (exact for an exponential disk of constant dispersion, which gives
V_A^2 = sigma^2 R / R_d) or a quadratic (``degree=2``), weighted by the rings' errors.
"""
from __future__ import annotations

import numpy as np

__all__ = ["asymmetric_drift"]


def asymmetric_drift(radius, v_rot, v_rot_err, dispersion, dispersion_err, surface, *,
                     surface_err=None, degree: int = 1):
    """V_A and V_c per ring.

    Parameters
    ----------
    radius : array (arcsec or kpc: any length unit, the result does not depend on it)
    v_rot, v_rot_err, dispersion, dispersion_err : array, km/s
    surface : array
        Face-on surface brightness or density (any unit); rings with Sigma <= 0 or NaN
        are left out of the smooth fit.
    surface_err : array, optional
        1-sigma errors of ``surface``; default 10% (only relative weights matter).
    degree : {1, 2}
        Polynomial degree of ln(Sigma sigma^2) in R.

    Returns
    -------
    dict of arrays: 'asymmetric_drift' (signed: sign(V_A^2) sqrt|V_A^2|, km/s),
    'v_circ', 'v_circ_err' (km/s; NaN where v_rot^2 + V_A^2 < 0 or inputs are NaN) and
    'dlnp_dr' (the fitted d ln(Sigma sigma^2) / dR, per unit of ``radius``).
    """
    r = np.asarray(radius, float)
    vr, vre = np.asarray(v_rot, float), np.asarray(v_rot_err, float)
    s, se = np.asarray(dispersion, float), np.asarray(dispersion_err, float)
    sig = np.asarray(surface, float)
    sig_e = 0.1 * np.abs(sig) if surface_err is None else np.asarray(surface_err, float)
    ok = np.isfinite(r) & np.isfinite(s) & (s > 0) & np.isfinite(sig) & (sig > 0)
    n = r.size
    out = {k: np.full(n, np.nan) for k in ("asymmetric_drift", "v_circ", "v_circ_err", "dlnp_dr")}
    deg = int(min(degree, ok.sum() - 1))
    if deg < 1:
        return out
    y = np.log(sig[ok] * s[ok] ** 2)
    # error of ln(Sigma sigma^2): relative Sigma error and twice the relative sigma error
    ye = np.hypot(sig_e[ok] / sig[ok], 2 * np.nan_to_num(se[ok], nan=0.0) / s[ok])
    ye = np.where(np.isfinite(ye) & (ye > 0), ye, np.nanmedian(ye[ye > 0]) if np.any(ye > 0) else 1.0)
    vander = np.vander(r[ok], deg + 1)
    wv = vander / ye[:, None]
    coef, *_ = np.linalg.lstsq(wv, y / ye, rcond=None)
    cov = np.linalg.pinv(wv.T @ wv)
    dof = max(ok.sum() - deg - 1, 1)
    chi2 = float(np.sum(((vander @ coef - y) / ye) ** 2)) / dof
    cov *= max(1.0, chi2)
    # derivative of the polynomial and its variance at every ring
    powers = np.arange(deg, -1, -1)
    dvec = np.array([p * r ** (p - 1) if p > 0 else np.zeros_like(r) for p in powers]).T
    deriv = dvec @ coef
    deriv_var = np.einsum("ij,jk,ik->i", dvec, cov, dvec)
    va2 = -r * s**2 * deriv
    va2_err = np.sqrt((r * s**2) ** 2 * deriv_var + (2 * r * s * deriv * se) ** 2)
    vc2 = vr**2 + va2
    with np.errstate(invalid="ignore"):
        vc = np.where(vc2 >= 0, np.sqrt(vc2), np.nan)
        vc_err = np.sqrt((2 * vr * vre) ** 2 + va2_err**2) / (2 * vc)
    out.update(asymmetric_drift=np.sign(va2) * np.sqrt(np.abs(va2)), v_circ=vc,
               v_circ_err=vc_err, dlnp_dr=deriv)
    return out
