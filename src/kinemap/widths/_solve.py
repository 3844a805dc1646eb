"""Per-pixel linear solves of the width budget (private; plain float arrays, no units).

Model for line i in one pixel:  z_i = a * x_i + b, with
  z_i = sigma_i^2 - instrument^2 - channel^2 - fine_structure_i   [km^2/s^2]
  x_i = 1 / m_i                                                    [1/amu]
  a   = k T / amu                                                  [km^2/s^2]
  b   = sigma_nt^2                                                 [km^2/s^2]
Arrays are (n_lines, n_pixels); everything is vectorised over pixels.
"""
from __future__ import annotations


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
