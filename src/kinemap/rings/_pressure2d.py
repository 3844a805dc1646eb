"""Pressure-support columns of a 2D ring fit from ring averages of maps (private).

The 3D fit measures each ring's intrinsic dispersion and face-on surface brightness; a
2D fit only has the dispersion map (Gaussian fit or moment 2) and the intensity map.
Their averages over each ring (pixels within half a ring width of the ring's radius, in
that ring's own geometry) give the same columns, and :func:`kinemap.rings.pressure.
asymmetric_drift` turns them into V_A and V_c.  The beam mixes velocities of neighbouring
radii into every line of sight, so these dispersions are upper limits where the rotation
curve is steep (which inflates V_A): the caller warns.
"""
from __future__ import annotations

import astropy.units as u
import numpy as np

from kinemap.rings._geometry import disk_coords
from kinemap.rings.pressure import asymmetric_drift
from kinemap.units import KMS

PRESSURE_COLUMNS = ("dispersion", "dispersion_err", "surface_brightness", "asymmetric_drift",
                    "v_circ", "v_circ_err")


def _vals(col, unit=None):
    q = u.Quantity(col)
    return np.asarray(q.to_value(unit) if unit is not None else q.value, float)


def ring_averages(table, jac, dispersion, intensity, *, beam_area_pix=1.0):
    """(dispersion, dispersion_err, face-on surface brightness) per ring.

    ``dispersion`` (km/s) and ``intensity`` (any unit) are maps on the fitted grid; the
    error of a ring's mean is its pixels' scatter over sqrt(independent pixels), the
    pixels per beam (``beam_area_pix``) counting as one.  Face-on: mean intensity x cos i
    (a thin disk; common practice)."""
    ny, nx = dispersion.shape
    y, x = np.mgrid[0:ny, 0:nx]
    good = np.isfinite(dispersion) & np.isfinite(intensity) & (intensity > 0)
    rad = _vals(table["radius"], u.arcsec)
    width = float(table.meta.get("ring_width", np.median(np.diff(rad)) if rad.size > 1 else 1.0))
    n = rad.size
    disp, disp_err, sb = (np.full(n, np.nan) for _ in range(3))
    for k in range(n):
        inc = _vals(table["inclination"], u.deg)[k]
        r, _, _ = disk_coords(jac, x, y, _vals(table["x_center"])[k], _vals(table["y_center"])[k],
                              _vals(table["position_angle"], u.deg)[k], inc)
        sel = good & (np.abs(r - rad[k]) < width / 2)
        npix = int(sel.sum())
        if npix < 3:
            continue
        d = dispersion[sel]
        disp[k] = float(np.mean(d))
        n_ind = max(npix / max(beam_area_pix, 1.0), 1.0)
        disp_err[k] = float(np.std(d, ddof=1) / np.sqrt(n_ind))
        sb[k] = float(np.mean(intensity[sel]) * np.cos(np.deg2rad(inc)))
    return disp, disp_err, sb


def add_pressure_columns(table, jac, dispersion, intensity, *, beam_area_pix=1.0):
    """Add :data:`PRESSURE_COLUMNS` to a 2D ring ``table`` in place."""
    disp, disp_err, sb = ring_averages(table, jac, dispersion, intensity,
                                       beam_area_pix=beam_area_pix)
    ad = asymmetric_drift(_vals(table["radius"], u.arcsec), _vals(table["v_rot"], KMS),
                          _vals(table["v_rot_err"], KMS), disp, disp_err, sb)
    table["dispersion"] = disp * KMS
    table["dispersion_err"] = disp_err * KMS
    table["surface_brightness"] = sb
    table["asymmetric_drift"] = ad["asymmetric_drift"] * KMS
    table["v_circ"] = ad["v_circ"] * KMS
    table["v_circ_err"] = ad["v_circ_err"] * KMS
    table.meta["asymmetric_drift"] = (
        "ring averages of the dispersion and intensity maps (beam-smeared: dispersions are "
        "upper limits); V_A^2 = -R sigma^2 dln(Sigma sigma^2)/dR, ln(Sigma sigma^2) fitted "
        "with a straight line in R; V_c^2 = v_rot^2 + V_A^2")
