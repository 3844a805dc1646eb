"""Projection between the pixel grid, the sky and the plane of a tilted ring (private).

Conventions (written once, used everywhere in the subpackage):

* Sky offsets (E, N) in arcsec come from pixel offsets through the grid Jacobian.
* Position angle PA (deg) is east of north to the RECEDING half of the major axis.
* X = E sin PA + N cos PA is the coordinate along the major axis, positive towards PA
  (the receding side).  Y = E cos PA - N sin PA is along the minor axis, positive towards
  PA + 90 deg.
* In the disk plane x_d = X, y_d = Y / cos(i); R = hypot(x_d, y_d) and the azimuth
  theta = atan2(y_d, x_d) is measured from the receding major axis, increasing towards
  the half of the minor axis at PA + 90 deg (the same sense as PA on the sky).
* v_los = v_sys + sin(i) [v_rot cos(theta) + v_exp sin(theta)]  (Begeman 1989).  So
  v_exp > 0 means the minor-axis half at PA + 90 deg is redshifted.
"""
from __future__ import annotations

import numpy as np

# Geometry parameter names, in the order used for per-ring arrays.
GEOM_NAMES = ("x_center", "y_center", "position_angle", "inclination", "v_sys")


def disk_coords(jac, x, y, x0, y0, pa_deg, incl_deg):
    """Return (R [arcsec], cos theta, sin theta) for pixels (x, y); all arrays broadcast.

    A point exactly at the centre gets cos = sin = 0 (no azimuth; zero angular weight).
    """
    dx = x - x0
    dy = y - y0
    pa = np.deg2rad(pa_deg)
    sp, cp = np.sin(pa), np.cos(pa)
    inv_cos_i = 1.0 / np.cos(np.deg2rad(incl_deg))
    # (E, N) = J (dx, dy); x_d = E sin PA + N cos PA; y_d = (E cos PA - N sin PA) / cos i
    a = jac[0][0] * sp + jac[1][0] * cp
    b = jac[0][1] * sp + jac[1][1] * cp
    c = (jac[0][0] * cp - jac[1][0] * sp) * inv_cos_i
    d = (jac[0][1] * cp - jac[1][1] * sp) * inv_cos_i
    xd = a * dx + b * dy
    yd = c * dx + d * dy
    r = np.hypot(xd, yd)
    inv = 1.0 / np.maximum(r, 1e-300)
    return r, xd * inv, yd * inv


def ring_ellipse(jac_inv, x0, y0, pa_deg, incl_deg, radius, n: int = 181):
    """Pixel coordinates (x, y) of a circle of ``radius`` arcsec in the disk plane."""
    psi = np.linspace(0.0, 2 * np.pi, n)
    xd = radius * np.cos(psi)
    big_y = radius * np.sin(psi) * np.cos(np.deg2rad(incl_deg))
    pa = np.deg2rad(pa_deg)
    east = xd * np.sin(pa) + big_y * np.cos(pa)
    north = xd * np.cos(pa) - big_y * np.sin(pa)
    dx = jac_inv[0][0] * east + jac_inv[0][1] * north
    dy = jac_inv[1][0] * east + jac_inv[1][1] * north
    return x0 + dx, y0 + dy


def angular_weight(cos_t, weighting: str, wedge_deg: float):
    """Weight of each point for its azimuth; 0 inside the minor-axis exclusion wedge."""
    ac = np.abs(cos_t)
    if weighting == "uniform":
        w = np.ones_like(ac)
    elif weighting == "cos":
        w = ac.copy()
    else:  # "cos2"
        w = ac * ac
    if wedge_deg > 0:
        w[ac < np.sin(np.deg2rad(wedge_deg))] = 0.0
    return w


def unwrap_deg(values, reference: float):
    """Bring angles (deg) within +-180 deg of ``reference``."""
    return reference + (np.asarray(values, dtype=float) - reference + 180.0) % 360.0 - 180.0
