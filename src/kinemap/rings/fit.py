"""The tilted-ring fit of a velocity field, in three visible stages.

Model (Begeman 1989, A&A 223, 47): each ring of radius R has centre (x0, y0), position
angle PA (east of north to the receding half of the major axis), inclination i (0 =
face-on), systemic velocity v_sys, rotation v_rot and expansion v_exp, and

    v_los = v_sys + sin(i) [v_rot cos(theta) + v_exp sin(theta)],

with theta the azimuth in the disk plane from the receding major axis, increasing towards
the half of the minor axis at PA + 90 deg.  So v_exp > 0 means that half is redshifted:
radial outflow if it is the far side, inflow if it is the near side (the velocity field
alone cannot say which side is near).

Stages
------
1. Global geometry: one centre, PA, inclination and v_sys for all rings, v_rot (and
   v_exp if ``expansion_in_geometry``) per ring.
2. Ring by ring: the parameters in ``ring_free`` (default PA and inclination) and v_rot
   are fitted per ring, the others held at their stage-1 values.  Reveals warps.
3. The stage-2 geometry is smoothed in radius ('polynomial', 'median'), kept ('rings')
   or replaced by the stage-1 values ('global'), and v_rot, v_exp are refitted with it.
   Without stage 3 the refit uses the stage-2 (or stage-1) geometry unsmoothed.

Every fit is linear in v_rot and v_exp, which are solved exactly for trial geometry
(variable projection, Golub & Pereyra 1973; from memory); the geometry goes to
scipy.optimize.least_squares ('trf', bounds on inclination and centre).  Points are
assigned to rings with the current geometry and the assignment is refreshed between
least-squares calls until it settles.  Maps with more than 50000 valid pixels are fitted
first on a regular subsample of ~25000 and then polished on all pixels.
"""
from __future__ import annotations

import time
import warnings
from dataclasses import dataclass
from types import MappingProxyType
from typing import Collection, Literal, Mapping

import astropy.units as u
import numpy as np
from astropy.table import Table
from tqdm.auto import tqdm

from kinemap.units import KMS, to_value
from kinemap.errors import FitWarning, KinemapError
from kinemap.status import Status
from kinemap.rings import _validate as val
from kinemap.rings._core import INCL_BOUNDS, Points, Settings, fit_geometry, solve_linear
from kinemap.rings._geometry import GEOM_NAMES, angular_weight, disk_coords, unwrap_deg
from kinemap.rings._smooth import polynomial, running_median
from kinemap.rings.grid import SkyGrid, as_grid
from kinemap.rings.guess import FirstGuess, as_first_guess, guess_geometry
from kinemap.rings.harmonics import harmonics_table
from kinemap.rings.mass import dynamical_mass, physical_radius
from kinemap.rings.model import model_field

__all__ = ["RingFitResult", "fit_rings", "RING_COLUMNS"]

# the public ring-table columns, in order (distance-dependent ones only with a distance)
RING_COLUMNS = (
    "radius", "v_rot", "v_rot_err", "v_exp", "v_exp_err", "position_angle", "inclination", "v_sys",
    "x_center", "y_center", "npoints", "v_rot_approaching", "v_rot_receding", "beam_smeared",
    "radius_kpc", "mass_enclosed", "status", "position_angle_err", "inclination_err", "v_sys_err",
    "x_center_err", "y_center_err",
)

_UNITS = {
    "x_center": u.pix, "y_center": u.pix, "position_angle": u.deg, "inclination": u.deg, "v_sys": KMS,
}
# Gaussian beam solid angle = pi / (4 ln 2) FWHM^2 (common practice)
_BEAM_AREA_FACTOR = np.pi / (4 * np.log(2))


@dataclass(frozen=True, eq=False)
class RingFitResult:
    """Outcome of :func:`fit_rings`.

    Attributes
    ----------
    table : Table
        Final ring solution, one row per ring (failed rings kept, NaN, with a status code
        from :mod:`kinemap.status`).  Columns (units attached): radius [arcsec], v_rot,
        v_rot_err, v_exp, v_exp_err [km/s], position_angle, inclination [deg], v_sys
        [km/s], x_center, y_center [pix, 0-based], npoints, v_rot_approaching,
        v_rot_receding [km/s], beam_smeared, then with a distance radius_kpc [kpc] and
        mass_enclosed [solMass], then status and the geometry errors position_angle_err,
        inclination_err, v_sys_err, x_center_err, y_center_err.  ``meta`` holds
        ring_width [arcsec], the error recipes ('v_rot_err', 'geometry_err'), the reduced
        chi^2 of the final refit ('chi2_reduced'; None if undefined; without an error map
        the weights are 1, so it is the residual variance in (km/s)^2) and the settings.
        The stage tables' ``meta`` hold their own 'chi2_reduced'.
    harmonics : Table
        Third-order harmonic expansion per ring with the final geometry.
    stages : mapping of str to Table
        'global' (stage 1), 'rings' (stage 2, when run) and 'final' (same as ``table``).
    global_geometry : mapping of str to Quantity
        Stage-1 shared geometry and its 1-sigma errors ('<name>' and '<name>_err');
        for a parameter fixed to per-ring values, their median.  When stage 2 ran, also
        '<name>_ring_scatter' for each parameter in ``ring_free``: the standard deviation
        of the cleanly fitted stage-2 ring values over sqrt(number of such rings), NaN for
        fewer than 3.  It is a sanity check of '<name>_err' that does not depend on the
        error map; much larger values mean a warp or systematics the formal error misses.
        Stage 2 holds the other geometry (by default the centre and v_sys) at its stage-1
        values, so for a flat disk it is typically about half of '<name>_err'.
    first_guess : FirstGuess
        Where the fit started.
    model, residual : Quantity [km/s], shape (ny, nx)
        Model velocity field of the final solution (interpolated between rings, NaN
        outside them) and velocity - model.
    velocity : Quantity [km/s]
        The velocity field that was fitted (a copy).
    grid : SkyGrid
        Pixel-grid geometry used.
    settings : mapping
        Every option as used (for provenance records).
    timings : mapping of str to float
        Wall time in seconds of each step: 'first_guess', 'stage1', 'stage2', 'stage3'
        (geometry smoothing, refit, halves, bootstrap), 'harmonics', 'model'.
    """

    table: Table
    harmonics: Table
    stages: Mapping[str, Table]
    global_geometry: Mapping[str, u.Quantity]
    first_guess: FirstGuess
    model: u.Quantity
    residual: u.Quantity
    velocity: u.Quantity
    grid: SkyGrid
    settings: Mapping[str, object]
    timings: Mapping[str, float]

    @property
    def ring_width(self) -> u.Quantity:
        return self.table.meta["ring_width"] * u.arcsec


def fit_rings(
    velocity,
    grid,
    *,
    intensity=None,
    velocity_error=None,
    x_center=None,
    y_center=None,
    position_angle=None,
    inclination=None,
    v_sys=None,
    v_exp=None,
    fix: Collection[str] = (),
    radii=None,
    ring_width=None,
    beam_fwhm=None,
    distance=None,
    stages: Collection[int] = (1, 2, 3),
    ring_free: Collection[str] = ("position_angle", "inclination"),
    final_geometry: Literal["polynomial", "median", "rings", "global"] = "median",
    polynomial_degree: int = 2,
    weighting: Literal["uniform", "cos", "cos2"] = "cos",
    exclude_minor_axis=20 * u.deg,
    min_points: int = 20,
    expansion_in_geometry: bool = False,
    n_bootstrap: int = 0,
    seed: int | None = None,
    scale_errors_by_beam: bool = True,
    intrinsic_axis_ratio: float = 0.0,
    progress: bool | None = None,
) -> RingFitResult:
    """Fit a tilted-ring model to a velocity field.

    Parameters
    ----------
    velocity : array_like or Quantity, shape (ny, nx)
        Line-of-sight velocity field (plain numbers are km/s, positive receding); NaN =
        no data.  Not modified.
    grid : SkyGrid or Quantity
        Sky geometry of the pixel grid (see :class:`SkyGrid`, :meth:`SkyGrid.from_wcs`),
        or just the pixel scale (plain numbers arcsec), meaning north up and east left.
    intensity : array_like, optional
        Intensity map (any unit) for the first guesses of centre and inclination.
    velocity_error : array_like or Quantity, optional
        1-sigma velocity errors (km/s): points are weighted by 1/error^2 and the formal
        errors are absolute (inflated by sqrt(reduced chi^2) when that exceeds 1, see
        Notes).  Pixels with a NaN error are skipped; so are pixels with error 0 or below
        1e-6 of the median error (round-off zeros, e.g. of a moment-1 map whose mask keeps
        a single channel), with a FitWarning, because they would get near-infinite weight
        and pin the fit.  Without a map, points are weighted equally and errors are scaled
        by the scatter about the fit.
    x_center, y_center : float or array, optional
        Centre in 0-based pixel coordinates (x = column, y = row; FITS CRPIX - 1).
    position_angle, inclination : Quantity or float or array, optional
        Degrees; PA east of north to the receding half of the major axis, inclination
        strictly between 0 and 90.
    v_sys, v_exp : Quantity or float or array, optional
        km/s.  v_exp defaults to 0.
        Given values start the fit (or stay, when named in ``fix``); missing ones come
        from :func:`first_guess`.  A per-ring array (one value per entry of ``radii``) is
        allowed for fixed parameters only.
    fix : collection of str, optional
        Parameters held fixed in all stages: any of 'x_center', 'y_center', 'center',
        'position_angle', 'inclination', 'v_sys', 'v_exp'.  A fixed parameter without a
        given value is fixed at its first guess.
    radii : Quantity or array, optional
        Ring centres (arcsec).  Default: rings one ``ring_width`` wide starting at the
        centre, out to the last ring whose annulus (under the first-guess geometry) is at
        least 25% covered by valid pixels.
    ring_width : Quantity or float, optional
        Ring width (arcsec).  Default: the beam FWHM (at least 2 pixels), else 4 pixels.
    beam_fwhm : Quantity or float, optional
        Beam FWHM (arcsec).  Rings whose radius is below 2 beam FWHM are flagged
        ``beam_smeared`` (none without a beam); with ``scale_errors_by_beam`` errors are multiplied by
        sqrt(pixels per beam) because neighbouring pixels are not independent.
    distance : Quantity or float, optional
        Distance (plain numbers Mpc); adds radius_kpc and mass_enclosed = v_rot^2 R / G.
    stages : collection of int, optional
        Stages to run; must include 1.  See the module docstring.
    ring_free : collection of str, optional
        Geometry parameters fitted per ring in stage 2 (fixed ones are dropped): any of
        'x_center', 'y_center', 'position_angle', 'inclination', 'v_sys'.
    final_geometry : {'polynomial', 'median', 'rings', 'global'}, optional
        Stage-3 treatment of the stage-2 geometry: weighted polynomial in radius of degree
        ``polynomial_degree`` (one 4-sigma clipping pass), running median over 3 rings
        (default; follows warps; a ring with 3x the error of its neighbours is left out),
        unsmoothed, or the stage-1 values.
    weighting : {'uniform', 'cos', 'cos2'}, optional
        Angular weight of each point: 1, |cos theta| or cos^2 theta.
    exclude_minor_axis : Quantity or float, optional
        Half-width (deg) of the wedge around the minor axis whose points are not used.
    min_points : int, optional
        A ring needs this many points (after the wedge) and at least
        max(3, min_points // 4) on each side of the minor axis; otherwise its row holds
        NaNs and status NO_DATA.
    expansion_in_geometry : bool, optional
        Fit v_exp per ring also in stages 1-2.  Default False: v_exp is held at its start
        value (0 unless given) while the geometry is found, because a position-angle
        offset of a ring mimics an expansion term (a warp would be absorbed as spurious
        expansion); v_exp is always fitted in the final refit unless fixed.  Set it when
        the disk is known to expand or contract: with v_exp held at 0 an expansion of
        v_exp ~ 0.1 v_rot tilts the fitted PA by ~6 deg.
    n_bootstrap : int, optional
        If > 0, the random errors of every ring come from this many bootstrap resamplings
        of the ring's points, each refitted with the stage-2 freedom (geometry in
        ``ring_free``, v_rot, and v_exp unless fixed), instead of the formal errors.
    seed : int, optional
        Seed of the bootstrap's ``numpy.random.default_rng``.
    scale_errors_by_beam : bool, optional
        See ``beam_fwhm``.
    intrinsic_axis_ratio : float, optional
        Intrinsic thickness q0 for the photometric inclination guess.
    progress : bool, optional
        Show tqdm progress bars; default: when there are >= 20 rings or a bootstrap.

    Returns
    -------
    RingFitResult

    Notes
    -----
    Error budget of v_rot (common practice, e.g. de Blok et al. 2008, AJ 136, 2648; from
    memory): the random error (formal, or bootstrap) is combined in quadrature with half
    the difference between separate fits of the approaching (cos theta < 0) and
    receding (cos theta > 0) halves, made with the final geometry:
    v_rot_err = sqrt(random^2 + ((v_rot_receding - v_rot_approaching) / 2)^2).
    Formal errors assume independent pixels (then scaled, see ``beam_fwhm``) and, for
    v_rot and v_exp, are conditional on the ring's geometry; the bootstrap refits the
    ring's geometry too.  With angular weights that are not inverse variances the
    formal covariance is the sandwich form A^-1 B A^-1.

    Geometry errors: the covariance of the geometry comes from the Jacobian of the
    residuals with v_rot, v_exp re-solved for each trial geometry, which for variable
    projection is the geometry block of the full covariance (Golub & Pereyra 1973; from
    memory).  With an error map it is absolute, (J^T W J)^-1; when the reduced chi^2 of
    the fit exceeds 1 -- residuals larger than the errors, from moment-1 biases, beam
    smearing, non-circular motions or underestimated errors -- every error of that fit
    (geometry, and per ring v_rot, v_exp with that ring's chi^2) is multiplied by
    sqrt(chi^2_red) (common practice); it is never scaled down.  Then the beam factor
    sqrt(pixels per beam) applies: it is exact for the mean of noise whose spatial
    correlation is the beam (interferometer maps; common practice) and somewhat
    conservative for the position angle and inclination.  Errors describe the noise and
    the misfit, not biases shared by every pixel (e.g. beam smearing lowering the
    inclination): compare with ``global_geometry['<name>_ring_scatter']``.

    Raises
    ------
    KinemapError
        Bad input (shapes, inclination outside (0, 90), centre outside the map, too few
        valid pixels, unknown option) or no ring could be fitted at all.
    """
    # ---------------------------------------------------------------- validation
    vel = val.velocity_map(velocity)
    shape = vel.shape
    grid = as_grid(grid)
    inten = val.same_shape(intensity, shape, "intensity")
    err = val.error_map(velocity_error, shape)
    err, n_zero_err = val.drop_roundoff_errors(err, vel)
    val.enough_pixels(vel, err)
    beam = val.positive_scalar(beam_fwhm, u.arcsec, "beam_fwhm")
    dist = None
    if distance is not None:
        dist = val.positive_scalar(distance, u.Mpc, "distance")
    stages_t = val.stages(stages)
    fixed = val.fix_names(fix)
    free_ring = val.ring_free_names(ring_free, fixed)
    val.choice(final_geometry, val.FINAL_GEOMETRY, "final_geometry")
    val.choice(weighting, val.WEIGHTINGS, "weighting")
    wedge = float(to_value(exclude_minor_axis, u.deg, name="exclude_minor_axis"))
    if not 0 <= wedge < 90:
        raise KinemapError(f"'exclude_minor_axis' must be a half-width between 0 and 90 deg, got {wedge:g} deg")
    if int(polynomial_degree) != polynomial_degree or polynomial_degree < 0:
        raise KinemapError(f"'polynomial_degree' must be a whole number >= 0, got {polynomial_degree!r}")
    if int(min_points) != min_points or min_points < 5:
        raise KinemapError(f"'min_points' must be a whole number >= 5, got {min_points!r}")
    if int(n_bootstrap) != n_bootstrap or n_bootstrap < 0:
        raise KinemapError(f"'n_bootstrap' must be a whole number >= 0, got {n_bootstrap!r}")
    if n_bootstrap == 1:
        raise KinemapError("'n_bootstrap' must be 0 (no bootstrap) or at least 2 resamplings")
    radii_v, width = val.radii_and_width(radii, ring_width)

    given = {
        "x_center": val.geometry_value(x_center, u.pix, "x_center", shape),
        "y_center": val.geometry_value(y_center, u.pix, "y_center", shape),
        "position_angle": val.geometry_value(position_angle, u.deg, "position_angle", shape),
        "inclination": val.geometry_value(inclination, u.deg, "inclination", shape),
        "v_sys": val.geometry_value(v_sys, KMS, "v_sys", shape),
        "v_exp": val.geometry_value(v_exp, KMS, "v_exp", shape),
    }
    for name, value in given.items():
        if np.ndim(value) == 1:
            if name not in fixed:
                raise KinemapError(f"per-ring values of '{name}' are only allowed when it is fixed; add '{name}' to 'fix'")
            if radii_v is None or len(value) != radii_v.size:
                raise KinemapError(f"per-ring '{name}' needs 'radii' with the same number of rings ({len(value)})")

    cfg = Settings(weighting=weighting, wedge=wedge, min_points=int(min_points),
                   min_side=max(3, int(min_points) // 4))
    jac = grid.jacobian
    pix = grid.pixel_scale.to_value(u.arcsec)

    if n_zero_err:
        # a zero error would give a pixel infinite weight and pin the whole fit to it
        warnings.warn(
            f"{n_zero_err} pixels with a velocity have 'velocity_error' 0 (or below "
            f"{val.ROUNDOFF_ERROR_FRACTION:g} of the median error) and were skipped; such errors usually "
            "come from a moment-1 map whose mask keeps one channel", FitWarning, stacklevel=2)

    # ---------------------------------------------------------------- first guesses
    timings = {}
    clock = time.perf_counter()
    scalar_given = {k: (float(np.median(v)) if np.ndim(v) == 1 else v) for k, v in given.items() if k != "v_exp"}
    guess = guess_geometry(vel, grid, inten, beam, scalar_given, float(intrinsic_axis_ratio))
    first = as_first_guess(guess)

    timings["first_guess"], clock = time.perf_counter() - clock, time.perf_counter()

    # ---------------------------------------------------------------- rings
    pts = Points.from_maps(vel, err)
    if width is None:
        width = max(beam, 2 * pix) if beam else 4 * pix
    if radii_v is None:
        radii_v = _default_radii(pts, jac, guess, width, pix)
    n = radii_v.size
    edges = np.column_stack([radii_v - width / 2, radii_v + width / 2])
    show = progress if progress is not None else (n >= 20 or n_bootstrap > 0)

    def bar(iterable, desc):
        return tqdm(iterable, desc=desc, disable=None if show else True, leave=False)

    geom0 = {}
    for name in GEOM_NAMES:
        value = given[name] if given[name] is not None else guess[name]
        geom0[name] = np.broadcast_to(np.asarray(value, float), (n,)).copy()
    vexp0 = np.broadcast_to(np.asarray(given["v_exp"] if given["v_exp"] is not None else 0.0, float), (n,)).copy()
    vexp_final_free = "v_exp" not in fixed
    vexp_geom_free = vexp_final_free and bool(expansion_in_geometry)

    # ---------------------------------------------------------------- stage 1
    free1 = tuple(name for name in GEOM_NAMES if name not in fixed)
    s1 = fit_geometry(pts, jac, edges, geom0, free1, vexp_geom_free, None if vexp_geom_free else vexp0, cfg)
    if not np.any(np.isfinite(s1.v_rot)):
        raise KinemapError(
            "no ring could be fitted: every ring has too few points on one side of the minor axis; "
            "check the centre and ring radii, or lower 'min_points' / 'exclude_minor_axis'"
        )
    glob = {name: s1.geom[name].copy() for name in GEOM_NAMES}
    glob_err = {name: s1.geom_err[name].copy() for name in GEOM_NAMES}
    glob["position_angle"] = glob["position_angle"] % 360.0
    stage_tables = {}
    err_scale = 1.0
    if beam and scale_errors_by_beam:
        err_scale = max(1.0, float(np.sqrt(_BEAM_AREA_FACTOR * beam**2 / grid.pixel_area.to_value(u.arcsec**2))))
    stage_tables["global"] = _stage_table(radii_v, s1.v_rot, s1.v_rot_err * err_scale, s1.v_exp,
                                          s1.v_exp_err * err_scale, glob, _scaled(glob_err, err_scale),
                                          s1.npoints, s1.status, width, "global")
    stage_tables["global"].meta["chi2_reduced"] = _plain(s1.chi2_red)

    timings["stage1"], clock = time.perf_counter() - clock, time.perf_counter()

    # ---------------------------------------------------------------- stage 2
    ring_geom = {name: glob[name].copy() for name in GEOM_NAMES}
    ring_err = {name: glob_err[name].copy() for name in GEOM_NAMES}
    ring_status = s1.status.copy()
    if 2 in stages_t:
        vr2 = np.full(n, np.nan)
        vr2e = np.full(n, np.nan)
        ve2 = np.full(n, np.nan)
        ve2e = np.full(n, np.nan)
        np2 = np.zeros(n, int)
        for k in bar(range(n), "rings: stage 2"):
            gk = {name: ring_geom[name][k:k + 1].copy() for name in GEOM_NAMES}
            fit = fit_geometry(pts, jac, edges[k:k + 1], gk, free_ring, vexp_geom_free,
                               None if vexp_geom_free else vexp0[k:k + 1], cfg)
            ring_status[k] = fit.status[0]
            np2[k] = fit.npoints[0]
            if np.isfinite(fit.v_rot[0]):
                vr2[k], vr2e[k], ve2[k], ve2e[k] = fit.v_rot[0], fit.v_rot_err[0], fit.v_exp[0], fit.v_exp_err[0]
                for name in free_ring:
                    ring_geom[name][k] = fit.geom[name][0]
                    ring_err[name][k] = fit.geom_err[name][0]
            else:
                for name in free_ring:
                    ring_geom[name][k] = np.nan
                    ring_err[name][k] = np.nan
        ring_geom["position_angle"] = unwrap_deg(ring_geom["position_angle"], glob["position_angle"][0])
        shown = dict(ring_geom)
        shown["position_angle"] = ring_geom["position_angle"] % 360.0
        stage_tables["rings"] = _stage_table(radii_v, vr2, vr2e * err_scale, ve2, ve2e * err_scale, shown,
                                             _scaled(ring_err, err_scale), np2, ring_status, width, "rings")

    timings["stage2"], clock = time.perf_counter() - clock, time.perf_counter()

    # ---------------------------------------------------------------- final geometry
    final_g, final_e, how = _final_geometry(stages_t, final_geometry, int(polynomial_degree), radii_v,
                                            glob, glob_err, ring_geom, ring_err, free_ring)
    final_g["inclination"] = np.clip(final_g["inclination"], *INCL_BOUNDS)

    # ---------------------------------------------------------------- final refit (stage 3)
    s3 = fit_geometry(pts, jac, edges, final_g, (), vexp_final_free, None if vexp_final_free else vexp0, cfg)
    halves = _halves(pts, jac, s3, final_g, n, cfg, vexp_final_free, None if vexp_final_free else vexp0)
    v_app, v_rec = halves
    random_r = s3.v_rot_err.copy()
    random_e = s3.v_exp_err.copy()
    geom_random = {name: final_e[name].copy() for name in GEOM_NAMES}
    if n_bootstrap:
        rng = np.random.default_rng(seed)
        bs = _bootstrap(pts, jac, edges, final_g, s3, free_ring, vexp_final_free,
                        None if vexp_final_free else vexp0, cfg, int(n_bootstrap), rng, bar)
        random_r, random_e = bs["v_rot"], bs["v_exp"]
        for name in free_ring:
            geom_random[name] = bs[name]
    sys_half = np.abs(v_rec - v_app) / 2
    v_rot_err = np.sqrt((random_r * err_scale) ** 2 + np.nan_to_num(sys_half) ** 2)
    v_exp_err = random_e * err_scale
    status = s3.status.copy()
    if 2 in stages_t and how == "rings":
        # the ring's own stage-2 verdict (e.g. inclination at a bound) carries over
        carry = (status == Status.OK) & np.isin(ring_status, (Status.NOT_CONVERGED, Status.AT_BOUND))
        status[carry] = ring_status[carry]
    failed = ~np.isfinite(s3.v_rot)
    final_shown = {name: np.where(failed, np.nan, final_g[name]) for name in GEOM_NAMES}
    final_shown["position_angle"] = final_shown["position_angle"] % 360.0
    final_err = {name: np.where(failed, np.nan, geom_random[name] * err_scale) for name in GEOM_NAMES}

    table = _stage_table(radii_v, s3.v_rot, v_rot_err, s3.v_exp, v_exp_err, final_shown, final_err,
                         s3.npoints, status, width, "final", v_app=v_app, v_rec=v_rec,
                         beam=beam, distance=dist)
    table.meta["v_rot_err"] = (
        "sqrt(random^2 + ((v_rot_receding - v_rot_approaching)/2)^2); random = "
        + ("bootstrap" if n_bootstrap else "formal" + (" (x sqrt(chi2_reduced of the ring) when that exceeds 1)"
                                                      if err is not None else ""))
        + (f" x {err_scale:.3g} (pixels per beam)" if err_scale > 1 else "")
    )
    table.meta["geometry"] = how
    table.meta["chi2_reduced"] = _plain(s3.chi2_red)
    table.meta["geometry_err"] = (
        _GEOMETRY_ERR_RECIPE + (f"; x {err_scale:.3g} (pixels per beam)" if err_scale > 1 else "")
        + ("; bootstrap for " + ", ".join(free_ring) if n_bootstrap and free_ring else "")
        + f"; values and errors from {how!r} geometry")
    stage_tables["final"] = table

    nfail = int(np.sum(status != Status.OK))
    if nfail and nfail >= max(1, n // 4):
        warnings.warn(f"{nfail} of {n} rings were not fitted cleanly (see the 'status' column)", FitWarning,
                      stacklevel=2)

    timings["stage3"], clock = time.perf_counter() - clock, time.perf_counter()
    harm = harmonics_table(pts, jac, radii_v, edges, final_shown, cfg.min_points)
    for name in harm.colnames:
        if name.endswith("_err"):
            harm[name] *= err_scale
    timings["harmonics"], clock = time.perf_counter() - clock, time.perf_counter()
    model = model_field({"radius": radii_v, "v_rot": s3.v_rot, "v_exp": s3.v_exp, **final_shown}, width, shape, jac)
    settings = {
        "stages": stages_t, "fix": fixed, "ring_free": free_ring, "final_geometry": final_geometry,
        "polynomial_degree": int(polynomial_degree), "weighting": weighting, "exclude_minor_axis_deg": wedge,
        "min_points": int(min_points), "expansion_in_geometry": bool(expansion_in_geometry),
        "n_bootstrap": int(n_bootstrap), "seed": seed, "scale_errors_by_beam": bool(scale_errors_by_beam),
        "error_scale": err_scale, "ring_width_arcsec": width, "beam_fwhm_arcsec": beam, "distance_mpc": dist,
        "intrinsic_axis_ratio": float(intrinsic_axis_ratio), "error_map": err is not None,
        "north_angle_deg": float(grid.north_angle.value), "east_left": grid.east_left,
        "pixel_scale_arcsec": pix,
    }
    timings["model"] = time.perf_counter() - clock
    # plain lists, so the table's YAML header stays readable by any YAML parser
    table.meta["settings"] = {k: list(v) if isinstance(v, tuple) else v for k, v in settings.items()}
    gg = {}
    for name in GEOM_NAMES:
        # one shared value; the median when the user fixed per-ring values
        gg[name] = float(np.median(glob[name])) * _UNITS[name]
        gg[name + "_err"] = float(np.median(glob_err[name])) * err_scale * _UNITS[name]
    if 2 in stages_t:
        for name in free_ring:
            gg[name + "_ring_scatter"] = _ring_scatter(ring_geom[name], ring_status) * _UNITS[name]
    return RingFitResult(
        table=table,
        harmonics=harm,
        stages=MappingProxyType(stage_tables),
        global_geometry=MappingProxyType(gg),
        first_guess=first,
        model=model * KMS,
        residual=(vel - model) * KMS,
        velocity=vel * KMS,
        grid=grid,
        settings=MappingProxyType(settings),
        timings=MappingProxyType(timings),
    )


# ---------------------------------------------------------------------------- helpers
_GEOMETRY_ERR_RECIPE = (
    "formal (J^T W J)^-1 in sandwich form for the angular weights; absolute with an error map "
    "(x sqrt(chi2_reduced of the fit) when that exceeds 1), scaled by the scatter about the fit without one"
)


def _plain(x) -> float | None:
    """A float for a table's YAML header (None for NaN)."""
    return float(x) if np.isfinite(x) else None


def _ring_scatter(values, status):
    """Standard deviation of the cleanly fitted stage-2 ring values over sqrt(their number).

    An empirical error of a global value, to set beside the formal one: independent of
    the error map and the noise model, larger when the disk warps.  NaN for < 3 rings.
    """
    v = np.asarray(values, float)[(np.asarray(status) == Status.OK) & np.isfinite(values)]
    if v.size < 3:
        return np.nan
    return float(np.std(v, ddof=1) / np.sqrt(v.size))


def _scaled(errs, factor):
    return {k: v * factor for k, v in errs.items()}


def _default_radii(pts: Points, jac, guess, width, pix, min_coverage=0.25):
    """Rings from the centre out to the last one at least ``min_coverage`` covered."""
    r, _, _ = disk_coords(jac, pts.x, pts.y, guess["x_center"], guess["y_center"], guess["position_angle"],
                          guess["inclination"])
    nmax = int(np.ceil(r.max() / width)) if r.size else 0
    if nmax == 0:
        raise KinemapError("'velocity' has no valid pixels away from the centre; check the map and the centre")
    counts = np.bincount(np.minimum((r / width).astype(int), nmax), minlength=nmax + 1)[:nmax]
    k = np.arange(nmax)
    area = np.pi * ((k + 1) ** 2 - k**2) * width**2 * np.cos(np.deg2rad(guess["inclination"]))
    expected = area / (pix * pix)
    covered = np.nonzero(counts / expected >= min_coverage)[0]
    if covered.size == 0:
        raise KinemapError(
            "no ring is at least 25% covered by valid pixels; give 'radii' and 'ring_width' explicitly"
        )
    nring = int(covered.max()) + 1
    return (np.arange(nring) + 0.5) * width


def _final_geometry(stages_t, mode, degree, radius, glob, glob_err, ring_geom, ring_err, free_ring):
    final = {name: glob[name].copy() for name in GEOM_NAMES}
    errs = {name: glob_err[name].copy() for name in GEOM_NAMES}
    if 2 not in stages_t:
        return final, errs, "global"
    how = "rings" if 3 not in stages_t else mode
    if how == "global":
        return final, errs, how
    for name in free_ring:
        vals, e = ring_geom[name], ring_err[name]
        if how == "polynomial":
            sm, se = polynomial(radius, vals, e, degree)
        elif how == "median":
            sm, se = running_median(vals, e)
        else:
            sm, se = vals.copy(), e.copy()
        # rings without a usable stage-2 value take the nearest ring's value (linear
        # between rings, constant beyond the ends); the global value if no ring has one
        bad = ~np.isfinite(sm)
        if bad.all():
            sm, se = glob[name].copy(), glob_err[name].copy()
        elif bad.any():
            good = ~bad
            sm[bad] = np.interp(radius[bad], radius[good], sm[good])
            se[bad] = np.interp(radius[bad], radius[good], np.nan_to_num(se[good], nan=np.nanmax(se[good]) if np.isfinite(se[good]).any() else 0.0))
        final[name], errs[name] = sm, se
    return final, errs, how


def _halves(pts, jac, fit, geom, n, cfg, vexp_free, vexp_fixed):
    """v_rot of the approaching (cos theta < 0) and receding (cos theta > 0) halves."""
    app = np.full(n, np.nan)
    rec = np.full(n, np.nan)
    if fit.idx.size == 0:
        return app, rec
    sub = pts.take(fit.idx)
    ring = fit.ring
    g = {name: geom[name][ring] for name in GEOM_NAMES}
    _, c, s = disk_coords(jac, sub.x, sub.y, g["x_center"], g["y_center"], g["position_angle"], g["inclination"])
    si = np.sin(np.deg2rad(g["inclination"]))
    wa = angular_weight(c, cfg.weighting, cfg.wedge)
    w = wa * sub.inv_var
    ok_rings = np.isfinite(fit.v_rot)
    for sign, out in ((-1, app), (1, rec)):
        side = (np.sign(c) == sign) & (wa > 0)
        sol = solve_linear(ring[side], n, sub.v[side] - g["v_sys"][side], (c * si)[side], (s * si)[side], w[side],
                           vexp_free, vexp_fixed)
        cnt = np.bincount(ring[side], minlength=n)
        good = ok_rings & sol.ok & (cnt >= cfg.min_side)
        out[good] = sol.v_rot[good]
    return app, rec


def _bootstrap(pts, jac, edges, geom, fit, free_ring, vexp_free, vexp_fixed, cfg, nboot, rng, bar):
    """Std of each ring's parameters over ``nboot`` resamplings of its points."""
    n = len(edges)
    out = {name: np.full(n, np.nan) for name in ("v_rot", "v_exp", *GEOM_NAMES)}
    for k in bar(range(n), "rings: bootstrap"):
        if not np.isfinite(fit.v_rot[k]):
            continue
        members = fit.idx[fit.ring == k]
        gk = {name: geom[name][k:k + 1].copy() for name in GEOM_NAMES}
        vf = None if vexp_fixed is None else vexp_fixed[k:k + 1]
        samples = []
        for _ in range(nboot):
            pick = rng.integers(0, members.size, members.size)
            res = fit_geometry(pts, jac, edges[k:k + 1], gk, free_ring, vexp_free, vf, cfg,
                               members=(members[pick], np.zeros(members.size, int)))
            samples.append([res.v_rot[0], res.v_exp[0]] + [res.geom[name][0] for name in GEOM_NAMES])
        arr = np.array(samples, float)
        arr[:, 2 + GEOM_NAMES.index("position_angle")] = unwrap_deg(
            arr[:, 2 + GEOM_NAMES.index("position_angle")], geom["position_angle"][k])
        good = np.all(np.isfinite(arr[:, :1]), axis=1)
        if good.sum() >= 2:
            std = np.nanstd(arr[good], axis=0, ddof=1)
            for j, name in enumerate(("v_rot", "v_exp", *GEOM_NAMES)):
                out[name][k] = std[j]
    if not vexp_free:
        out["v_exp"][:] = np.nan
    return out


def _stage_table(radius, v_rot, v_rot_err, v_exp, v_exp_err, geom, geom_err, npoints, status, width, stage,
                 *, v_app=None, v_rec=None, beam=None, distance=None):
    t = Table()
    t["radius"] = radius * u.arcsec
    t["v_rot"] = v_rot * KMS
    t["v_rot_err"] = v_rot_err * KMS
    t["v_exp"] = v_exp * KMS
    t["v_exp_err"] = v_exp_err * KMS
    for name in ("position_angle", "inclination", "v_sys", "x_center", "y_center"):
        t[name] = geom[name] * _UNITS[name]
    t["npoints"] = np.asarray(npoints, int)
    if stage == "final":
        t["v_rot_approaching"] = v_app * KMS
        t["v_rot_receding"] = v_rec * KMS
        smeared = radius < 2 * beam if beam else np.zeros(radius.size, bool)
        t["beam_smeared"] = smeared
        if distance is not None:
            r_kpc = physical_radius(radius, distance)
            t["radius_kpc"] = r_kpc
            t["mass_enclosed"] = dynamical_mass(v_rot, r_kpc).to(u.M_sun)
    t["status"] = np.asarray(status, int)
    for name in ("position_angle", "inclination", "v_sys", "x_center", "y_center"):
        t[name + "_err"] = geom_err[name] * _UNITS[name]
    t.meta["ring_width"] = float(width)
    t.meta["stage"] = stage
    t.meta["status_codes"] = "kinemap.status.Status: 0 OK, 1 NOT_CONVERGED, 2 AT_BOUND, 5 NO_DATA, 7 FAILED"
    t.meta["conventions"] = (
        "PA east of north to the receding half of the major axis; inclination 0 = face-on; "
        "x_center, y_center 0-based pixels; v_exp > 0: minor-axis half at PA+90 deg redshifted"
    )
    return t
