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
from kinemap.rings._core import Points, Settings
from kinemap.rings._geometry import GEOM_NAMES
from kinemap.rings._stages import (
    RingProblem, default_radii, error_scale, global_summary, stage_final, stage_global, stage_rings
)
from kinemap.rings.grid import SkyGrid, as_grid
from kinemap.rings.guess import FirstGuess, as_first_guess, guess_geometry
from kinemap.rings.harmonics import harmonics_table
from kinemap.rings.model import model_field

__all__ = ["RingFitResult", "fit_rings", "RING_COLUMNS"]

# the public ring-table columns, in order (distance-dependent ones only with a distance)
RING_COLUMNS = (
    "radius", "v_rot", "v_rot_err", "v_exp", "v_exp_err", "position_angle", "inclination", "v_sys",
    "x_center", "y_center", "npoints", "v_rot_approaching", "v_rot_receding", "beam_smeared",
    "radius_kpc", "mass_enclosed", "status", "position_angle_err", "inclination_err", "v_sys_err",
    "x_center_err", "y_center_err",
)


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
    opts = _checked_options(
        velocity, grid, intensity=intensity, velocity_error=velocity_error, beam_fwhm=beam_fwhm,
        distance=distance, stages=stages, fix=fix, ring_free=ring_free, final_geometry=final_geometry,
        weighting=weighting, exclude_minor_axis=exclude_minor_axis, polynomial_degree=polynomial_degree,
        min_points=min_points, n_bootstrap=n_bootstrap, radii=radii, ring_width=ring_width,
        given={"x_center": x_center, "y_center": y_center, "position_angle": position_angle,
               "inclination": inclination, "v_sys": v_sys, "v_exp": v_exp})
    if opts.n_zero_err:
        # a zero error would give a pixel infinite weight and pin the whole fit to it
        warnings.warn(
            f"{opts.n_zero_err} pixels with a velocity have 'velocity_error' 0 (or below "
            f"{val.ROUNDOFF_ERROR_FRACTION:g} of the median error) and were skipped; such errors usually "
            "come from a moment-1 map whose mask keeps one channel", FitWarning, stacklevel=2)
    vel, grid = opts.vel, opts.grid

    timings = {}
    clock = time.perf_counter()
    scalar_given = {k: (float(np.median(v)) if np.ndim(v) == 1 else v) for k, v in opts.given.items()
                    if k != "v_exp"}
    guess = guess_geometry(vel, grid, opts.inten, opts.beam, scalar_given, float(intrinsic_axis_ratio))
    first = as_first_guess(guess)
    timings["first_guess"], clock = time.perf_counter() - clock, time.perf_counter()

    prob, geom0 = _problem(opts, guess, weighting=weighting, min_points=min_points,
                           expansion_in_geometry=expansion_in_geometry,
                           scale_errors_by_beam=scale_errors_by_beam, progress=progress, n_bootstrap=n_bootstrap)
    free1 = tuple(name for name in GEOM_NAMES if name not in opts.fixed)
    glob = stage_global(prob, geom0, free1)
    timings["stage1"], clock = time.perf_counter() - clock, time.perf_counter()

    ran_rings = 2 in opts.stages
    rings = stage_rings(prob, glob, opts.free_ring, ran_rings)
    timings["stage2"], clock = time.perf_counter() - clock, time.perf_counter()

    final = stage_final(prob, glob, rings, stages_t=opts.stages, free_ring=opts.free_ring,
                        final_geometry=final_geometry, polynomial_degree=int(polynomial_degree),
                        n_bootstrap=n_bootstrap, seed=seed, beam=opts.beam, distance=opts.dist,
                        error_map=opts.err is not None)
    stage_tables = {"global": glob.table}
    if rings.table is not None:
        stage_tables["rings"] = rings.table
    stage_tables["final"] = table = final.table
    n = prob.n
    nfail = int(np.sum(final.status != Status.OK))
    if nfail and nfail >= max(1, n // 4):
        warnings.warn(f"{nfail} of {n} rings were not fitted cleanly (see the 'status' column)", FitWarning,
                      stacklevel=2)
    timings["stage3"], clock = time.perf_counter() - clock, time.perf_counter()

    harm = harmonics_table(prob.pts, prob.jac, prob.radii, prob.edges, final.geom, prob.cfg.min_points)
    for name in harm.colnames:
        if name.endswith("_err"):
            harm[name] *= prob.err_scale
    timings["harmonics"], clock = time.perf_counter() - clock, time.perf_counter()
    model = model_field({"radius": prob.radii, "v_rot": final.fit.v_rot, "v_exp": final.fit.v_exp, **final.geom},
                        prob.width, opts.shape, prob.jac)
    settings = {
        "stages": opts.stages, "fix": opts.fixed, "ring_free": opts.free_ring, "final_geometry": final_geometry,
        "polynomial_degree": int(polynomial_degree), "weighting": weighting, "exclude_minor_axis_deg": opts.wedge,
        "min_points": int(min_points), "expansion_in_geometry": bool(expansion_in_geometry),
        "n_bootstrap": int(n_bootstrap), "seed": seed, "scale_errors_by_beam": bool(scale_errors_by_beam),
        "error_scale": prob.err_scale, "ring_width_arcsec": prob.width, "beam_fwhm_arcsec": opts.beam,
        "distance_mpc": opts.dist, "intrinsic_axis_ratio": float(intrinsic_axis_ratio),
        "error_map": opts.err is not None, "north_angle_deg": float(grid.north_angle.value),
        "east_left": grid.east_left, "pixel_scale_arcsec": opts.pix,
    }
    timings["model"] = time.perf_counter() - clock
    # plain lists, so the table's YAML header stays readable by any YAML parser
    table.meta["settings"] = {k: list(v) if isinstance(v, tuple) else v for k, v in settings.items()}
    gg = global_summary(glob, rings, prob.err_scale, opts.free_ring, ran_rings)
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


# ---------------------------------------------------------------------------- options
@dataclass(frozen=True, eq=False)
class _Options:
    """The checked inputs of :func:`fit_rings` as plain floats and arrays."""

    vel: np.ndarray
    shape: tuple
    grid: SkyGrid
    inten: np.ndarray | None
    err: np.ndarray | None
    n_zero_err: int
    beam: float | None
    dist: float | None
    stages: tuple
    fixed: tuple
    free_ring: tuple
    wedge: float
    radii: np.ndarray | None
    width: float | None
    pix: float
    given: dict


def _checked_options(velocity, grid, *, intensity, velocity_error, beam_fwhm, distance, stages, fix, ring_free,
                     final_geometry, weighting, exclude_minor_axis, polynomial_degree, min_points, n_bootstrap,
                     radii, ring_width, given) -> _Options:
    """Every input of :func:`fit_rings` checked, in the order the user meets the errors."""
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

    units = {"x_center": u.pix, "y_center": u.pix, "position_angle": u.deg, "inclination": u.deg,
             "v_sys": KMS, "v_exp": KMS}
    given = {name: val.geometry_value(given[name], unit, name, shape) for name, unit in units.items()}
    for name, value in given.items():
        if np.ndim(value) == 1:
            if name not in fixed:
                raise KinemapError(f"per-ring values of '{name}' are only allowed when it is fixed; add '{name}' to 'fix'")
            if radii_v is None or len(value) != radii_v.size:
                raise KinemapError(f"per-ring '{name}' needs 'radii' with the same number of rings ({len(value)})")
    pix = grid.pixel_scale.to_value(u.arcsec)
    return _Options(vel, shape, grid, inten, err, n_zero_err, beam, dist, stages_t, fixed, free_ring, wedge,
                    radii_v, width, pix, given)


def _problem(opts: _Options, guess, *, weighting, min_points, expansion_in_geometry, scale_errors_by_beam,
             progress, n_bootstrap):
    """The points, rings (default radii from the first guess) and options every stage shares,
    and the start geometry (given values, else first guesses) as per-ring arrays."""
    cfg = Settings(weighting=weighting, wedge=opts.wedge, min_points=int(min_points),
                   min_side=max(3, int(min_points) // 4))
    jac = opts.grid.jacobian
    pts = Points.from_maps(opts.vel, opts.err)
    width = opts.width
    if width is None:
        width = max(opts.beam, 2 * opts.pix) if opts.beam else 4 * opts.pix
    radii_v = opts.radii
    if radii_v is None:
        radii_v = default_radii(pts, jac, guess, width, opts.pix)
    n = radii_v.size
    edges = np.column_stack([radii_v - width / 2, radii_v + width / 2])
    show = progress if progress is not None else (n >= 20 or n_bootstrap > 0)

    def bar(iterable, desc):
        return tqdm(iterable, desc=desc, disable=None if show else True, leave=False)

    given = opts.given
    geom0 = {}
    for name in GEOM_NAMES:
        value = given[name] if given[name] is not None else guess[name]
        geom0[name] = np.broadcast_to(np.asarray(value, float), (n,)).copy()
    vexp0 = np.broadcast_to(np.asarray(given["v_exp"] if given["v_exp"] is not None else 0.0, float), (n,)).copy()
    vexp_final_free = "v_exp" not in opts.fixed
    err_scale = error_scale(opts.beam, scale_errors_by_beam, opts.grid.pixel_area.to_value(u.arcsec**2))
    prob = RingProblem(pts=pts, jac=jac, radii=radii_v, edges=edges, width=width, cfg=cfg, vexp0=vexp0,
                       vexp_geom_free=vexp_final_free and bool(expansion_in_geometry),
                       vexp_final_free=vexp_final_free, err_scale=err_scale, bar=bar)
    return prob, geom0
