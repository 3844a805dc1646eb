"""Per-pixel solves of the width budget and the maps derived from them (private; plain
float arrays in km/s, K and amu; the status bookkeeping is in ``budget``).

Model for line i in one pixel:  z_i = a * x_i + b, with
  z_i = sigma_i^2 - instrument^2 - channel^2 - fine_structure_i   [km^2/s^2]
  x_i = 1 / m_i                                                    [1/amu]
  a   = k T / amu                                                  [km^2/s^2]
  b   = sigma_nt^2                                                 [km^2/s^2]
Arrays are (n_lines, n_pixels); everything is vectorised over pixels.
"""
from __future__ import annotations

import numpy as np

from kinemap.widths.thermal import K_OVER_AMU


def square_variance(sigma, sigma_err):
    """Variance of sigma^2 for a Gaussian-distributed estimate sigma +- sigma_err.

    Var(s^2) = 4 s^2 e^2 + 2 e^4 is exact when s ~ N(sigma, e^2) (with s standing in for the
    true sigma); the e^4 term keeps the weight finite for a width fitted as 0.
    """
    return 4.0 * sigma**2 * sigma_err**2 + 2.0 * sigma_err**4


def solve_fixed_temperature(z, var_z, x, a, var_a):
    """sigma_nt^2 (= b) at known a = kT/amu: weighted mean of z_i - a x_i over lines.

    Returns b, var_b, cov_ab (cov_ab and the var_a part of var_b vanish if var_a = 0).
    With one line no weights are needed, so a zero width error is allowed there.
    """
    if z.shape[0] == 1:
        b = z[0] - a * x[0]
        return b, var_z[0] + x[0] ** 2 * var_a, -x[0] * var_a
    w = 1.0 / var_z
    sw = w.sum(axis=0)
    xbar = (w * x[:, None]).sum(axis=0) / sw
    b = (w * z).sum(axis=0) / sw - a * xbar
    return b, 1.0 / sw + xbar**2 * var_a, -xbar * var_a


def solve_temperature(z, var_z, x):
    """Weighted least squares for (a, b) per pixel from lines of different mass.

    Normal equations of  min sum_i w_i (z_i - a x_i - b)^2,  w_i = 1/var(z_i):
        [Sxx Sx] [a]   [Sxz]
        [Sx  S ] [b] = [Sz ]
    Returns a, b, var_a, var_b, cov_ab (the inverse normal matrix: errors assume the
    var(z_i) are right; they are not rescaled by the reduced chi-square) and chi2.
    """
    w = 1.0 / var_z
    xc = x[:, None]
    s = w.sum(axis=0)
    sx = (w * xc).sum(axis=0)
    sxx = (w * xc**2).sum(axis=0)
    sz = (w * z).sum(axis=0)
    sxz = (w * xc * z).sum(axis=0)
    det = s * sxx - sx**2
    a = (s * sxz - sx * sz) / det
    b = (sxx * sz - sx * sxz) / det
    chi2 = (w * (z - a * xc - b) ** 2).sum(axis=0)
    return a, b, s / det, sxx / det, -sx / det, chi2


def solve_budget(z, var_z, x, t_k, t_err):
    """(a, b, var_a, var_b, cov_ab, chi2) per pixel: fitted when ``t_k`` is None (lines of
    different mass), else at the assumed temperature ``t_k`` +- ``t_err`` (K, flat arrays;
    chi2 is then None)."""
    if t_k is None:
        return solve_temperature(z, var_z, x)
    a = K_OVER_AMU * t_k
    var_a = (K_OVER_AMU * t_err) ** 2
    b, var_b, cov_ab = solve_fixed_temperature(z, var_z, x, a, var_a)
    return a, b, var_a, var_b, cov_ab, None


def derived_maps(a, b, var_a, var_b, cov_ab, x, y, particle_mass_amu):
    """Physical maps from the solution, errors by first-order propagation (km/s, K).

    Keys: snt, snt_err (sigma_nt = sqrt(b)), temp, temp_err, cov_t_snt, th (thermal
    dispersion of the first line, mass 1 / x[0]), cs, cs_err (sound speed for a mean
    particle mass ``particle_mass_amu``), mach, mach_err (sqrt(3) sigma_nt / c_s) and
    per_line (sqrt(y), each line's width with instrument and channel removed).
    """
    snt = np.sqrt(b)
    snt_err = np.sqrt(var_b) / (2.0 * snt)
    temp = a / K_OVER_AMU
    temp_err = np.sqrt(var_a) / K_OVER_AMU
    cov_t_snt = cov_ab / K_OVER_AMU / (2.0 * snt)
    th = np.sqrt(a * x[0])
    cs = np.sqrt(a / particle_mass_amu)
    cs_err = cs * 0.5 * np.sqrt(var_a) / a
    mach = np.sqrt(3.0) * snt / cs
    # relative variance of M = sqrt(3 b) / sqrt(a / (mu m_H)); the a-terms vanish when
    # T is exact (var_a = cov_ab = 0)
    rel = var_b / (4 * b**2) + var_a / (4 * a**2) - cov_ab / (2 * a * b)
    mach_err = mach * np.sqrt(np.maximum(rel, 0.0))
    return {"snt": snt, "snt_err": snt_err, "temp": temp, "temp_err": temp_err, "cov_t_snt": cov_t_snt,
            "th": th, "cs": cs, "cs_err": cs_err, "mach": mach, "mach_err": mach_err, "per_line": np.sqrt(y)}
