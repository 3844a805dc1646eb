"""Automatic first guesses of the disk geometry from a velocity field (and intensity map).

Order of work (each step only when the user did not give that value):

1. Centre: intensity-weighted centroid of the brightest connected region of the
   (lightly smoothed) intensity map, above half its peak; without an intensity map the
   centroid of the valid velocity pixels.  Refined by *point symmetry* of the velocity
   field: every tilted-ring model (rotation, expansion, warps) obeys
   v(c + d) + v(c - d) = 2 v_sys, so the kinematic centre minimises the mean of
   [v(c + d) + v(c - d) - 2 v_sys]^2 (coarse grid, then Nelder-Mead).
2. Systemic velocity: median of (v(c + d) + v(c - d)) / 2 at that centre.
3. Position angle: direction of the velocity "dipole" sum((v - v_sys) * unit offset),
   which points along the receding major axis when the coverage is symmetric; refined by
   minimising the misfit of a quick ring model (v_rot per ring solved linearly).
4. Inclination: from the axis ratio of the intensity map's second moments within the
   10%-of-peak isophote, cos i = b/a (corrected for the beam, and for an intrinsic axis
   ratio q0 with cos^2 i = (q^2 - q0^2) / (1 - q0^2), Hubble 1926, common practice).
   Without an intensity map, a scan of the quick ring-model misfit in inclination.
   The tilted-ring fit's stage 1 then refines all of them kinematically.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Mapping

import astropy.units as u
import numpy as np
from scipy import ndimage
from scipy.optimize import minimize, minimize_scalar

from kinemap.units import KMS
from kinemap.errors import KinemapError
from kinemap.rings import _validate as val
from kinemap.rings._geometry import disk_coords
from kinemap.rings.grid import SkyGrid, as_grid

__all__ = ["FirstGuess", "first_guess"]

# sample size for the guesses: enough to be precise, small enough to be quick
_MAX_SAMPLE = 40000


@dataclass(frozen=True)
class FirstGuess:
    """Starting geometry for a tilted-ring fit.

    Attributes
    ----------
    x_center, y_center : float
        Kinematic centre in 0-based pixel coordinates (x = column, y = row).
    v_sys : Quantity [km/s]
    position_angle : Quantity [deg]
        East of north to the receding half of the major axis, 0-360.
    inclination : Quantity [deg]
        The value the fit starts from (photometric if an intensity map was given).
    inclination_photometric, inclination_kinematic : Quantity [deg]
        The two estimates (NaN when not made).
    position_angle_photometric : Quantity [deg]
        Major-axis direction of the intensity map, 0-180 (NaN without intensity).
    methods : mapping
        How each value was obtained ('given', 'intensity centroid + symmetry', ...).
    """

    x_center: float
    y_center: float
    v_sys: u.Quantity
    position_angle: u.Quantity
    inclination: u.Quantity
    inclination_photometric: u.Quantity
    inclination_kinematic: u.Quantity
    position_angle_photometric: u.Quantity
    methods: Mapping[str, str] = field(default_factory=dict)


def first_guess(
    velocity,
    grid,
    *,
    intensity=None,
    beam_fwhm=None,
    x_center=None,
    y_center=None,
    v_sys=None,
    position_angle=None,
    inclination=None,
    intrinsic_axis_ratio: float = 0.0,
) -> FirstGuess:
    """Estimate centre, systemic velocity, position angle and inclination.

    Parameters
    ----------
    velocity : array_like or Quantity, shape (ny, nx)
        Line-of-sight velocity field (plain numbers are km/s); NaN = no data.
    grid : SkyGrid or Quantity
        Sky geometry of the pixel grid, or the pixel scale (then north up, east left).
    intensity : array_like, optional
        Intensity (moment-0) map of the same shape, any unit; NaN = no data.
    beam_fwhm : Quantity or float, optional
        Beam FWHM (plain numbers are arcsec); used for smoothing scales and to remove the
        beam from the intensity moments.
    x_center, y_center, v_sys, position_angle, inclination : optional
        Known values: kept as given (pixels, km/s, deg).
    intrinsic_axis_ratio : float, optional
        Intrinsic thickness q0 of the disk for the photometric inclination (0 = thin).

    Returns
    -------
    FirstGuess
    """
    vel = val.velocity_map(velocity)
    grid = as_grid(grid)
    inten = val.same_shape(intensity, vel.shape, "intensity")
    val.enough_pixels(vel, None)
    beam = val.positive_scalar(beam_fwhm, u.arcsec, "beam_fwhm")
    given = {
        "x_center": val.geometry_value(x_center, u.pix, "x_center", vel.shape),
        "y_center": val.geometry_value(y_center, u.pix, "y_center", vel.shape),
        "v_sys": val.optional_scalar(v_sys, KMS, "v_sys"),
        "position_angle": val.geometry_value(position_angle, u.deg, "position_angle", vel.shape),
        "inclination": val.geometry_value(inclination, u.deg, "inclination", vel.shape),
    }
    for k, v in given.items():
        if v is not None and np.ndim(v) != 0:
            raise KinemapError(f"'{k}' must be a single value for the first guess, got {np.size(v)} values")
    q0 = float(intrinsic_axis_ratio)
    if not 0 <= q0 < 1:
        raise KinemapError(f"'intrinsic_axis_ratio' must be in [0, 1), got {intrinsic_axis_ratio!r}")
    return as_first_guess(guess_geometry(vel, grid, inten, beam, given, q0))


def as_first_guess(res) -> FirstGuess:
    """Wrap the plain-float dictionary of :func:`guess_geometry` with units."""
    return FirstGuess(
        x_center=res["x_center"],
        y_center=res["y_center"],
        v_sys=res["v_sys"] * KMS,
        position_angle=res["position_angle"] * u.deg,
        inclination=res["inclination"] * u.deg,
        inclination_photometric=res["inclination_photometric"] * u.deg,
        inclination_kinematic=res["inclination_kinematic"] * u.deg,
        position_angle_photometric=res["position_angle_photometric"] * u.deg,
        methods=MappingProxyType(dict(res["methods"])),
    )


# ---------------------------------------------------------------------------- internals
def guess_geometry(vel, grid: SkyGrid, inten, beam_arcsec, given, q0=0.0):
    """Plain-float version of :func:`first_guess` (values in pix, km/s, deg)."""
    jac = grid.jacobian
    pix = grid.pixel_scale.to_value(u.arcsec)
    beam_pix = beam_arcsec / pix if beam_arcsec else 0.0
    valid = np.isfinite(vel)
    methods = {}
    out = {}

    # -- 1. centre
    cx, cy, methods["center"] = _guess_centre(vel, valid, inten, beam_pix, given)
    out["x_center"], out["y_center"] = cx, cy

    # -- 2. systemic velocity
    if given["v_sys"] is not None:
        vsys = given["v_sys"]
        methods["v_sys"] = "given"
    else:
        vsys = _symmetric_vsys(vel, cx, cy)
        methods["v_sys"] = "median of point-symmetric pairs"
        if not np.isfinite(vsys):
            vsys = _central_median(vel, cx, cy, max(2 * beam_pix, 3.0))
            methods["v_sys"] = "median near the centre"
    out["v_sys"] = float(vsys)

    # a sample of valid pixels for the kinematic refinements
    yy, xx = np.nonzero(valid)
    stride = max(1, int(np.ceil(yy.size / _MAX_SAMPLE)))
    xs, ys, vs = xx[::stride].astype(float), yy[::stride].astype(float), vel[yy[::stride], xx[::stride]]
    east, north = grid.sky_offsets(xs - cx, ys - cy)
    rho = np.hypot(east, north)
    rho_lim = np.percentile(rho, 90) if rho.size else 0.0
    inner = rho <= rho_lim
    xs, ys, vs = xs[inner], ys[inner], vs[inner]
    width = max(rho_lim / 12.0, 2 * pix, beam_arcsec or 0.0)

    def misfit(pa, incl):
        return _quick_misfit(jac, xs, ys, vs, cx, cy, vsys, pa, incl, width)

    # -- 4a. photometric inclination (also a photometric PA, 0-180)
    incl_phot, pa_phot = np.nan, np.nan
    if inten is not None and np.isfinite(inten).any():
        incl_phot, pa_phot = _photometric_shape(inten, grid, beam_arcsec, q0, max(beam_pix / 2.3548, 1.0))

    # -- 3. position angle
    if given["position_angle"] is not None:
        pa = given["position_angle"]
        methods["position_angle"] = "given"
    else:
        e_all, n_all = grid.sky_offsets(xx - cx, yy - cy)
        r_all = np.hypot(e_all, n_all)
        s = r_all > 0.5 * pix
        dv = vel[yy, xx][s] - vsys
        pa = float(np.rad2deg(np.arctan2(np.sum(dv * e_all[s] / r_all[s]), np.sum(dv * n_all[s] / r_all[s]))) % 360)
        incl_start = given["inclination"] or (incl_phot if np.isfinite(incl_phot) else 50.0)
        pa = _refine_pa(misfit, pa, incl_start)
        methods["position_angle"] = "velocity dipole + ring-model misfit"

    # -- 4b. inclination
    incl_kin = np.nan
    if given["inclination"] is not None:
        incl = given["inclination"]
        methods["inclination"] = "given"
    elif np.isfinite(incl_phot):
        incl = incl_phot
        methods["inclination"] = "intensity axis ratio"
    else:
        incl_kin = _scan_inclination(misfit, pa)
        incl = incl_kin
        methods["inclination"] = "ring-model misfit scan"
        if given["position_angle"] is None:
            pa = _refine_pa(misfit, pa, incl)
    out["position_angle"] = float(pa % 360.0)
    out["inclination"] = float(np.clip(incl, 5.0, 85.0))
    out["inclination_photometric"] = float(incl_phot)
    out["inclination_kinematic"] = float(incl_kin)
    out["position_angle_photometric"] = float(pa_phot)
    out["methods"] = methods
    return out


def _guess_centre(vel, valid, inten, beam_pix, given):
    """Centre (pix, inside the map) and how it was found: given, else the intensity (or
    valid-pixel) centroid refined by the point symmetry of the velocity field."""
    ny, nx = vel.shape
    if given["x_center"] is not None and given["y_center"] is not None:
        cx, cy = given["x_center"], given["y_center"]
        how = "given"
    else:
        if inten is not None and np.isfinite(inten).any():
            cx, cy = _intensity_centre(inten, max(beam_pix / 2.3548, 1.0))
            how = "intensity centroid"
        else:
            yy, xx = np.nonzero(valid)
            cx, cy = float(xx.mean()), float(yy.mean())
            how = "centroid of valid pixels"
        span = max(3 * beam_pix, 0.05 * min(nx, ny), 3.0)
        sym = _symmetry_centre(vel, cx, cy, span, given["v_sys"])
        if sym is not None:
            cx, cy = sym
            how += " + velocity symmetry"
        if given["x_center"] is not None:
            cx = given["x_center"]
        if given["y_center"] is not None:
            cy = given["y_center"]
    cx = float(np.clip(cx, 0, nx - 1))
    cy = float(np.clip(cy, 0, ny - 1))
    return cx, cy, how


def _nan_smooth(img, sigma):
    finite = np.isfinite(img)
    num = ndimage.gaussian_filter(np.where(finite, img, 0.0), sigma)
    den = ndimage.gaussian_filter(finite.astype(float), sigma)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(den > 0.2, num / den, np.nan)


def _brightest_region(sm, frac):
    peak_idx = np.nanargmax(sm)
    peak = sm.flat[peak_idx]
    lab, _ = ndimage.label(np.nan_to_num(sm, nan=-np.inf) >= frac * peak)
    return lab == lab.flat[peak_idx]


def _intensity_centre(inten, sigma_pix):
    sm = _nan_smooth(inten, sigma_pix)
    region = _brightest_region(sm, 0.5)
    w = np.clip(sm[region], 0, None)
    yy, xx = np.nonzero(region)
    if w.sum() <= 0:
        return float(xx.mean()), float(yy.mean())
    return float(np.sum(w * xx) / w.sum()), float(np.sum(w * yy) / w.sum())


def _photometric_shape(inten, grid: SkyGrid, beam_arcsec, q0, sigma_pix):
    """Inclination and major-axis PA (0-180) from intensity second moments."""
    sm = _nan_smooth(inten, sigma_pix)
    region = _brightest_region(sm, 0.1) & np.isfinite(inten)
    yy, xx = np.nonzero(region)
    w = np.clip(inten[region], 0, None)
    if w.sum() <= 0 or yy.size < 10:
        return np.nan, np.nan
    east, north = grid.sky_offsets(xx.astype(float), yy.astype(float))
    me, mn = np.sum(w * east) / w.sum(), np.sum(w * north) / w.sum()
    de, dn = east - me, north - mn
    cov = np.array([[np.sum(w * de * de), np.sum(w * de * dn)], [np.sum(w * de * dn), np.sum(w * dn * dn)]]) / w.sum()
    if beam_arcsec:
        # a Gaussian beam adds its variance to both axes of a (untruncated) distribution
        cov -= np.eye(2) * (beam_arcsec / 2.354820045) ** 2
    evals, evecs = np.linalg.eigh(cov)
    if evals[1] <= 0 or evals[0] <= 0:
        return np.nan, np.nan
    q = np.sqrt(evals[0] / evals[1])
    cos2 = (q * q - q0 * q0) / (1 - q0 * q0)
    incl = float(np.rad2deg(np.arccos(np.sqrt(np.clip(cos2, 0.0, 1.0)))))
    major = evecs[:, 1]
    pa = float(np.rad2deg(np.arctan2(major[0], major[1])) % 180.0)
    return incl, pa


def _symmetry_cost_factory(vel, cx0, cy0):
    valid = np.isfinite(vel)
    yy, xx = np.nonzero(valid)
    stride = max(1, int(np.ceil(yy.size / _MAX_SAMPLE)))
    ys, xs = yy[::stride].astype(float), xx[::stride].astype(float)
    vs = vel[yy[::stride], xx[::stride]]
    min_overlap = max(20, int(0.1 * ys.size))

    def pairs(cx, cy):
        vr = ndimage.map_coordinates(vel, [2 * cy - ys, 2 * cx - xs], order=1, cval=np.nan, prefilter=False)
        ok = np.isfinite(vr)
        return vs[ok] + vr[ok]

    return pairs, min_overlap


def _symmetry_centre(vel, cx0, cy0, span, vsys_given):
    pairs, min_overlap = _symmetry_cost_factory(vel, cx0, cy0)

    def cost(p):
        ssum = pairs(p[0], p[1])
        if ssum.size < min_overlap:
            return 1e30
        vsys = vsys_given if vsys_given is not None else np.median(ssum) / 2
        dev = ssum - 2 * vsys
        # trim the worst 2% so a few bad pixels do not steer the centre
        dev2 = np.sort(dev * dev)[: max(1, int(0.98 * dev.size))]
        return float(dev2.mean())

    offsets = np.linspace(-span, span, 9)
    best = (np.inf, cx0, cy0)
    for dy in offsets:
        for dx in offsets:
            c = cost((cx0 + dx, cy0 + dy))
            if c < best[0]:
                best = (c, cx0 + dx, cy0 + dy)
    if not np.isfinite(best[0]) or best[0] >= 1e30:
        return None
    step = span / 4
    simplex = np.array([[best[1], best[2]], [best[1] + step, best[2]], [best[1], best[2] + step]])
    res = minimize(cost, simplex[0], method="Nelder-Mead",
                   options={"initial_simplex": simplex, "xatol": 0.01, "fatol": 1e-10, "maxiter": 400})
    return float(res.x[0]), float(res.x[1])


def _symmetric_vsys(vel, cx, cy):
    pairs, min_overlap = _symmetry_cost_factory(vel, cx, cy)
    ssum = pairs(cx, cy)
    if ssum.size < min(min_overlap, 20):
        return np.nan
    return float(np.median(ssum) / 2)


def _central_median(vel, cx, cy, radius):
    yy, xx = np.indices(vel.shape)
    near = (np.hypot(xx - cx, yy - cy) <= radius) & np.isfinite(vel)
    if near.sum() >= 10:
        return float(np.median(vel[near]))
    return float(np.nanmedian(vel))


def _quick_misfit(jac, xs, ys, vs, cx, cy, vsys, pa, incl, width):
    """Mean squared residual of a v_rot-per-ring model (uniform weights, no expansion)."""
    r, c, _ = disk_coords(jac, xs, ys, cx, cy, pa, incl)
    k = (r / width).astype(int)
    n = int(k.max()) + 1 if k.size else 1
    c = c * np.sin(np.deg2rad(incl))
    d = vs - vsys
    scc = np.bincount(k, c * c, n)
    bc = np.bincount(k, c * d, n)
    with np.errstate(invalid="ignore", divide="ignore"):
        vrot = np.where(scc > 0, bc / scc, 0.0)
    res = d - vrot[k] * c
    return float(np.mean(res * res))


def _refine_pa(misfit, pa0, incl):
    res = minimize_scalar(lambda p: misfit(p, incl), bounds=(pa0 - 40.0, pa0 + 40.0), method="bounded",
                          options={"xatol": 0.01})
    return float(res.x % 360.0)


def _scan_inclination(misfit, pa):
    grid = np.arange(10.0, 85.0, 5.0)
    costs = np.array([misfit(pa, i) for i in grid])
    i0 = grid[int(np.argmin(costs))]
    res = minimize_scalar(lambda i: misfit(pa, i), bounds=(max(i0 - 5.0, 3.0), min(i0 + 5.0, 87.0)),
                          method="bounded", options={"xatol": 0.01})
    return float(res.x)
