"""Tests of the tilted-ring fitter (kinemap.rings) and its figures.

Velocity fields are built here directly from the Begeman (1989, A&A 223, 47) formula

    v = v_sys + v_rot cos(theta) sin(i) + v_exp sin(theta) sin(i),

with an implementation that shares no code with the package (sky offsets written out
from the definition of position angle, rings found by bisection for warped disks).
Recovery tests use seeded synthetic data with known truth.
"""
import warnings

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table
from astropy.wcs import WCS

from kinemap.errors import FitWarning, KinemapError
from kinemap.rings import (
    HARMONIC_TERMS,
    SkyGrid,
    dynamical_mass,
    first_guess,
    fit_velocity_field,
    harmonic_expansion,
    major_axis_pv,
    model_velocity_field,
    physical_radius,
)
from kinemap.status import Status

REQUIRED_COLUMNS = [
    "radius", "v_rot", "v_rot_err", "v_exp", "v_exp_err", "position_angle", "inclination", "v_sys",
    "x_center", "y_center", "npoints", "v_rot_approaching", "v_rot_receding", "beam_smeared",
]


# ----------------------------------------------------------------------------- helpers
def _const(value):
    return value if callable(value) else (lambda r: np.full_like(r, float(value)))


def begeman_field(shape, *, x0, y0, v_sys, v_rot, pa, incl, v_exp=0.0, pixel=1.0, east_left=True,
                  north_angle=0.0, r_max=None, m2=None):
    """Velocity field (km/s) and disk radius (arcsec) of a tilted-ring disk.

    ``v_rot``, ``pa``, ``incl``, ``v_exp`` are numbers or functions of radius (arcsec).
    Position angle is east of north to the receding major axis; theta counts from the
    receding major axis towards PA + 90 deg.  North is ``north_angle`` deg counter-
    clockwise from +y on the grid; east is 90 deg counter-clockwise from north when
    ``east_left`` (the normal sky view).  ``m2 = (c2, s2)`` adds c2 cos 2theta + s2 sin 2theta.
    """
    v_rot, pa, incl, v_exp = _const(v_rot), _const(pa), _const(incl), _const(v_exp)
    yy, xx = np.indices(shape, dtype=float)
    phi = np.deg2rad(north_angle)
    north = (-np.sin(phi), np.cos(phi))
    east = (-np.cos(phi), -np.sin(phi)) if east_left else (np.cos(phi), np.sin(phi))
    dx, dy = xx - x0, yy - y0
    e_off = pixel * (dx * east[0] + dy * east[1])
    n_off = pixel * (dx * north[0] + dy * north[1])

    def project(radius):
        p, i = np.deg2rad(pa(radius)), np.deg2rad(incl(radius))
        along = e_off * np.sin(p) + n_off * np.cos(p)  # towards PA (receding)
        across = (e_off * np.cos(p) - n_off * np.sin(p)) / np.cos(i)  # towards PA + 90, deprojected
        return np.hypot(along, across), along, across

    lo = np.zeros(shape)
    hi = np.full(shape, 10.0 * max(shape) * pixel)
    for _ in range(60):  # bisection: the ring through each pixel (handles warps)
        mid = 0.5 * (lo + hi)
        outside = project(mid)[0] > mid
        lo, hi = np.where(outside, mid, lo), np.where(outside, hi, mid)
    radius = 0.5 * (lo + hi)
    _, along, across = project(radius)
    theta = np.arctan2(across, along)
    sin_i = np.sin(np.deg2rad(incl(radius)))
    v = v_sys + v_rot(radius) * np.cos(theta) * sin_i + v_exp(radius) * np.sin(theta) * sin_i
    if m2 is not None:
        v = v + m2[0] * np.cos(2 * theta) + m2[1] * np.sin(2 * theta)
    if r_max is not None:
        v[radius > r_max] = np.nan
    return v, radius


def vals(col, unit):
    return u.Quantity(col).to_value(unit)


def rising(r):
    return 180.0 * (1.0 - np.exp(-r / 12.0))


SHAPE = (112, 116)
CX, CY = 57.3, 55.6


@pytest.fixture(scope="module")
def flat_field():
    v, r = begeman_field(SHAPE, x0=CX, y0=CY, v_sys=1000.0, v_rot=200.0, pa=30.0, incl=55.0, r_max=50)
    return v, r


@pytest.fixture(scope="module")
def flat_fit(flat_field):
    v, r = flat_field
    return fit_velocity_field(v, 1.0 * u.arcsec, intensity=np.exp(-r / 15.0), ring_width=4 * u.arcsec,
                     beam_fwhm=2.0 * u.arcsec, distance=10 * u.Mpc)


# ----------------------------------------------------------------------------- conventions
def test_receding_side_for_pa_30(flat_field, flat_fit):
    v, _ = flat_field
    # PA 30 deg east of north: the receding major axis points north-east, i.e. up and to
    # the LEFT on a north-up, east-left map (definition of position angle; common practice)
    d = 20.0
    ne = v[int(round(CY + d * np.cos(np.deg2rad(30)))), int(round(CX - d * np.sin(np.deg2rad(30))))]
    sw = v[int(round(CY - d * np.cos(np.deg2rad(30)))), int(round(CX + d * np.sin(np.deg2rad(30))))]
    assert ne > 1000.0 + 100 and sw < 1000.0 - 100
    assert v[int(round(CY + d)), int(round(CX - 1))] > 1000.0  # north half receding
    assert v[int(round(CY)), int(round(CX - d))] > 1000.0  # east half receding
    # the fit puts PA at 30 (not 210) and the receding half where it is
    assert flat_fit.global_geometry["position_angle"].to_value(u.deg) == pytest.approx(30.0, abs=0.1)
    t = flat_fit.table
    assert np.nanmedian(vals(t["position_angle"], u.deg)) == pytest.approx(30.0, abs=0.1)


def test_receding_side_on_mirrored_grid():
    # east to the right (CDELT1 > 0): for PA 30 the receding side is up and to the RIGHT
    v, _ = begeman_field(SHAPE, x0=CX, y0=CY, v_sys=0.0, v_rot=150.0, pa=30.0, incl=60.0, east_left=False, r_max=50)
    assert v[int(CY + 17), int(CX + 10)] > 100.0
    res = fit_velocity_field(v, SkyGrid.from_scale(1 * u.arcsec, east_left=False), ring_width=5)
    assert res.global_geometry["position_angle"].to_value(u.deg) == pytest.approx(30.0, abs=0.1)


def test_sky_grid_from_wcs_matches_astropy():
    w = WCS(naxis=2)
    w.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    w.wcs.crval = [150.0, 20.0]
    w.wcs.crpix = [50.0, 50.0]
    w.wcs.cdelt = [-2.0 / 3600, 2.0 / 3600]
    g = SkyGrid.from_wcs(w, shape=(100, 100))
    assert g.pixel_scale.to_value(u.arcsec) == pytest.approx(2.0, rel=1e-4)
    assert g.east_left
    assert g.north_angle.to_value(u.deg) == pytest.approx(0.0, abs=0.01)
    # rotated grid: compare with where astropy (reference library) puts a point 20" north
    rot = np.deg2rad(25.0)
    w.wcs.pc = [[np.cos(rot), -np.sin(rot)], [np.sin(rot), np.cos(rot)]]
    g = SkyGrid.from_wcs(w, shape=(100, 100))
    c = w.pixel_to_world(49.5, 49.5)
    north_pt = c.directional_offset_by(0 * u.deg, 20 * u.arcsec)
    east_pt = c.directional_offset_by(90 * u.deg, 20 * u.arcsec)
    for pt, (e, n) in ((north_pt, (0.0, 20.0)), (east_pt, (20.0, 0.0))):
        px, py = w.world_to_pixel(pt)
        dx, dy = g.pixel_offsets(e, n)
        assert dx == pytest.approx(px - 49.5, abs=0.01)
        assert dy == pytest.approx(py - 49.5, abs=0.01)
    # mirrored: CDELT1 > 0 puts east to the right
    w2 = WCS(naxis=2)
    w2.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    w2.wcs.crval = [150.0, 20.0]
    w2.wcs.cdelt = [2.0 / 3600, 2.0 / 3600]
    assert not SkyGrid.from_wcs(w2).east_left


def test_fit_on_rotated_grid_recovers_sky_pa():
    # north 40 deg counter-clockwise from +y; PA must still come out east of north
    v, _ = begeman_field(SHAPE, x0=CX, y0=CY, v_sys=300.0, v_rot=120.0, pa=250.0, incl=50.0, north_angle=40.0,
                         pixel=2.0, r_max=100)
    grid = SkyGrid.from_scale(2 * u.arcsec, north_angle=40 * u.deg)
    res = fit_velocity_field(v, grid, ring_width=8)
    assert res.global_geometry["position_angle"].to_value(u.deg) == pytest.approx(250.0, abs=0.1)
    assert res.global_geometry["inclination"].to_value(u.deg) == pytest.approx(50.0, abs=0.2)


def test_expansion_sign_convention():
    # v_exp > 0: the minor-axis half at PA + 90 deg is redshifted (our documented sign)
    v, _ = begeman_field(SHAPE, x0=CX, y0=CY, v_sys=0.0, v_rot=0.0, pa=0.0, incl=60.0, v_exp=30.0, r_max=50)
    # PA 0 -> PA + 90 = east = -x on a north-up, east-left map
    assert v[int(CY), int(CX - 15)] > 20 and v[int(CY), int(CX + 15)] < -20


# ----------------------------------------------------------------------------- recovery
def test_flat_rotation_curve_recovered(flat_fit):
    t = flat_fit.table
    ok = np.asarray(t["status"]) == Status.OK
    assert ok.sum() >= len(t) - 1
    assert list(t.colnames[: len(REQUIRED_COLUMNS)]) == REQUIRED_COLUMNS
    assert t.colnames[len(REQUIRED_COLUMNS): len(REQUIRED_COLUMNS) + 2] == ["radius_kpc", "mass_enclosed"]
    assert t["v_rot"].unit == u.km / u.s and t["radius"].unit == u.arcsec and t["position_angle"].unit == u.deg
    np.testing.assert_allclose(vals(t["v_rot"], u.km / u.s)[ok], 200.0, atol=0.5)
    np.testing.assert_allclose(vals(t["v_exp"], u.km / u.s)[ok], 0.0, atol=0.5)
    np.testing.assert_allclose(vals(t["inclination"], u.deg)[ok], 55.0, atol=0.3)
    np.testing.assert_allclose(vals(t["v_sys"], u.km / u.s)[ok], 1000.0, atol=0.2)
    np.testing.assert_allclose(vals(t["x_center"], u.pix)[ok], CX, atol=0.1)
    np.testing.assert_allclose(vals(t["y_center"], u.pix)[ok], CY, atol=0.1)
    np.testing.assert_allclose(vals(t["v_rot_approaching"], u.km / u.s)[ok], 200.0, atol=1.0)
    np.testing.assert_allclose(vals(t["v_rot_receding"], u.km / u.s)[ok], 200.0, atol=1.0)
    # beam_smeared: rings within two beams (4") of the centre
    np.testing.assert_array_equal(np.asarray(t["beam_smeared"]), vals(t["radius"], u.arcsec) < 4.0)


def test_rising_rotation_curve_recovered():
    v, _ = begeman_field(SHAPE, x0=CX, y0=CY, v_sys=-50.0, v_rot=rising, pa=145.0, incl=62.0, r_max=52)
    res = fit_velocity_field(v, 1 * u.arcsec, radii=np.arange(2.0, 50.0, 4.0) * u.arcsec, ring_width=4 * u.arcsec)
    t = res.table
    r = vals(t["radius"], u.arcsec)
    outer = r >= 12
    # a ring averages v(R) over its width, so compare away from the steep inner part
    np.testing.assert_allclose(vals(t["v_rot"], u.km / u.s)[outer], rising(r[outer]), rtol=0.01)
    assert res.global_geometry["position_angle"].to_value(u.deg) == pytest.approx(145.0, abs=0.2)
    assert res.global_geometry["inclination"].to_value(u.deg) == pytest.approx(62.0, abs=0.5)


def test_warped_disk_recovered():
    def pa(r):
        return 40.0 + 0.4 * np.clip(r - 20.0, 0, None)

    def incl(r):
        return 60.0 - 0.25 * np.clip(r - 20.0, 0, None)

    v, _ = begeman_field((136, 136), x0=68.2, y0=67.6, v_sys=500.0, v_rot=180.0, pa=pa, incl=incl, r_max=62)
    radii = np.arange(6.0, 60.0, 4.0)
    res = fit_velocity_field(v, 1 * u.arcsec, radii=radii, ring_width=4)
    stage2 = res.stages["rings"]
    ok = np.asarray(stage2["status"]) <= Status.AT_BOUND
    assert ok.sum() >= radii.size - 2
    # ring-by-ring geometry follows the warp (away from the kink at 20")
    away = ok & (np.abs(radii - 20.0) > 4)
    np.testing.assert_allclose(vals(stage2["position_angle"], u.deg)[away], pa(radii[away]), atol=0.3)
    np.testing.assert_allclose(vals(stage2["inclination"], u.deg)[away], incl(radii[away]), atol=0.5)
    final = res.table
    good = (np.asarray(final["status"]) == Status.OK) & (np.abs(radii - 20.0) > 4)
    np.testing.assert_allclose(vals(final["position_angle"], u.deg)[good], pa(radii[good]), atol=0.3)
    np.testing.assert_allclose(vals(final["v_rot"], u.km / u.s)[good], 180.0, atol=0.5)
    # the global stage cannot follow a warp: its single PA lies between the extremes
    g = res.global_geometry["position_angle"].to_value(u.deg)
    assert 40.0 < g < pa(radii[-1])


@pytest.mark.parametrize("mode", ["polynomial", "median", "rings", "global"])
def test_final_geometry_modes(mode):
    def pa(r):
        return 100.0 + 0.004 * r**2  # a smooth warp: 10 deg at 50"

    v, _ = begeman_field(SHAPE, x0=CX, y0=CY, v_sys=0.0, v_rot=170.0, pa=pa, incl=55.0, r_max=54)
    radii = np.arange(6.0, 52.0, 4.0)
    res = fit_velocity_field(v, 1 * u.arcsec, radii=radii, ring_width=4, final_geometry=mode, polynomial_degree=2)
    final = vals(res.table["position_angle"], u.deg)
    stage2 = vals(res.stages["rings"]["position_angle"], u.deg)
    assert res.table.meta["geometry"] == mode
    if mode == "global":
        np.testing.assert_allclose(final, res.global_geometry["position_angle"].to_value(u.deg))
    elif mode == "rings":
        np.testing.assert_allclose(final, stage2)
    else:
        np.testing.assert_allclose(final, pa(radii), atol=0.3)
        np.testing.assert_allclose(vals(res.table["v_rot"], u.km / u.s), 170.0, atol=0.5)


def test_expanding_disk_recovered():
    v, _ = begeman_field(SHAPE, x0=CX, y0=CY, v_sys=200.0, v_rot=150.0, pa=120.0, incl=50.0, v_exp=20.0, r_max=50)
    res = fit_velocity_field(v, 1 * u.arcsec, ring_width=5, expansion_in_geometry=True)
    t = res.table
    ok = np.asarray(t["status"]) == Status.OK
    np.testing.assert_allclose(vals(t["v_exp"], u.km / u.s)[ok], 20.0, atol=0.3)
    np.testing.assert_allclose(vals(t["v_rot"], u.km / u.s)[ok], 150.0, atol=0.3)
    np.testing.assert_allclose(vals(t["position_angle"], u.deg)[ok], 120.0, atol=0.2)
    # c1 = v_rot sin i and s1 = v_exp sin i of the harmonic expansion (Schoenmakers et al. 1997)
    h = res.harmonics
    hok = np.asarray(h["status"]) == Status.OK
    np.testing.assert_allclose(vals(h["s1"], u.km / u.s)[hok], 20.0 * np.sin(np.deg2rad(50.0)), atol=0.3)


@pytest.fixture(scope="module")
def noisy_case():
    rng = np.random.default_rng(20240611)
    v, r = begeman_field((130, 130), x0=64.6, y0=65.3, v_sys=720.0, v_rot=lambda x: 150 * np.tanh(x / 12.0),
                         pa=300.0, incl=65.0, r_max=60)
    v = v + rng.normal(0.0, 5.0, v.shape)
    v[rng.random(v.shape) < 0.2] = np.nan  # scattered holes
    v[40:52, 70:88] = np.nan  # one big hole
    radii = np.arange(4.0, 60.0, 5.0)
    res = fit_velocity_field(v, 1 * u.arcsec, intensity=np.exp(-r / 18.0), radii=radii, ring_width=5)
    return v, res


def test_noise_and_holes_recovered(noisy_case):
    _, res = noisy_case
    t = res.table
    r = vals(t["radius"], u.arcsec)
    ok = (np.asarray(t["status"]) == Status.OK) & (r >= 10)
    assert ok.sum() >= 8
    truth = 150 * np.tanh(r / 12.0)
    pull = (vals(t["v_rot"], u.km / u.s) - truth)[ok] / vals(t["v_rot_err"], u.km / u.s)[ok]
    assert np.all(np.abs(pull) < 4.0)
    assert 0.3 < np.std(pull) < 1.8
    np.testing.assert_allclose(vals(t["position_angle"], u.deg)[ok], 300.0, atol=1.0)
    np.testing.assert_allclose(vals(t["inclination"], u.deg)[ok], 65.0, atol=1.5)
    gg = res.global_geometry
    assert abs(gg["position_angle"].to_value(u.deg) - 300.0) < 4 * gg["position_angle_err"].to_value(u.deg) + 0.05
    assert abs(gg["v_sys"].to_value(u.km / u.s) - 720.0) < 4 * gg["v_sys_err"].to_value(u.km / u.s) + 0.05


def test_input_not_modified(noisy_case):
    v, res = noisy_case
    before = v.copy()
    fit_velocity_field(v, 1 * u.arcsec, ring_width=5, stages=(1,))
    np.testing.assert_array_equal(np.isnan(v), np.isnan(before))
    np.testing.assert_array_equal(v[np.isfinite(v)], before[np.isfinite(before)])
    assert np.isnan(res.velocity.value).sum() == np.isnan(v).sum()


def test_unfittable_rings_kept_with_status():
    v, _ = begeman_field(SHAPE, x0=CX, y0=CY, v_sys=0.0, v_rot=150.0, pa=80.0, incl=60.0, r_max=30)
    # rings beyond the data, and a ring with only its receding half (approaching side cut)
    v2 = v.copy()
    _, r = begeman_field(SHAPE, x0=CX, y0=CY, v_sys=0.0, v_rot=150.0, pa=80.0, incl=60.0)
    v2[(r > 18) & (r < 24) & (v < 0)] = np.nan
    radii = np.array([5.0, 10.0, 15.0, 21.0, 27.0, 40.0, 45.0])
    with pytest.warns(FitWarning, match="not fitted cleanly"):
        res = fit_velocity_field(v2, 1 * u.arcsec, radii=radii, ring_width=5)
    t = res.table
    assert len(t) == radii.size
    st = np.asarray(t["status"])
    assert st[3] == Status.NO_DATA and np.isnan(t["v_rot"][3])  # one-sided ring
    assert np.all(st[5:] == Status.NO_DATA) and np.all(np.isnan(vals(t["v_rot"], u.km / u.s)[5:]))
    assert np.all(st[[0, 1, 2, 4]] == Status.OK)
    np.testing.assert_allclose(vals(t["v_rot"], u.km / u.s)[[1, 2, 4]], 150.0, atol=0.5)


@pytest.mark.parametrize("weighting", ["uniform", "cos", "cos2"])
def test_weighting_options(weighting):
    v, _ = begeman_field(SHAPE, x0=CX, y0=CY, v_sys=10.0, v_rot=100.0, pa=200.0, incl=45.0, r_max=45)
    res = fit_velocity_field(v, 1 * u.arcsec, ring_width=5, weighting=weighting, exclude_minor_axis=10 * u.deg,
                    stages=(1, 3))
    t = res.table
    ok = np.asarray(t["status"]) == Status.OK
    np.testing.assert_allclose(vals(t["v_rot"], u.km / u.s)[ok], 100.0, atol=0.5)
    assert res.settings["weighting"] == weighting


def test_fixed_parameters_stay_fixed():
    v, _ = begeman_field(SHAPE, x0=CX, y0=CY, v_sys=0.0, v_rot=180.0, pa=60.0, incl=60.0, r_max=45)
    # only points within 15 deg of the major axis, where cos(theta) ~ 1 whatever the inclination
    res = fit_velocity_field(v, 1 * u.arcsec, ring_width=5, inclination=50 * u.deg, v_sys=0.0, fix=["inclination", "v_sys"],
                    exclude_minor_axis=75 * u.deg, min_points=8)
    for name in ("global", "rings", "final"):
        t = res.stages[name]
        ok = np.isfinite(t["v_rot"])
        np.testing.assert_allclose(vals(t["inclination"], u.deg)[ok], 50.0)
        np.testing.assert_allclose(vals(t["v_sys"], u.km / u.s)[ok], 0.0)
    # on the major axis v - v_sys = v_rot sin i, so v_rot scales by sin 60 / sin 50 (Begeman formula)
    med = np.nanmedian(vals(res.table["v_rot"], u.km / u.s))
    assert med == pytest.approx(180.0 * np.sin(np.deg2rad(60)) / np.sin(np.deg2rad(50)), rel=0.02)


def test_error_map_and_bootstrap_errors():
    rng = np.random.default_rng(7)
    v, _ = begeman_field((96, 96), x0=47.7, y0=48.2, v_sys=0.0, v_rot=150.0, pa=300.0, incl=65.0, r_max=44)
    v = v + rng.normal(0.0, 5.0, v.shape)
    radii = np.arange(8.0, 44.0, 6.0)
    kw = dict(radii=radii, ring_width=6, stages=(1, 3), progress=False)
    formal = fit_velocity_field(v, 1 * u.arcsec, **kw)
    with_map = fit_velocity_field(v, 1 * u.arcsec, velocity_err=np.full(v.shape, 5.0), **kw)
    boot = fit_velocity_field(v, 1 * u.arcsec, bootstrap=25, seed=3, **kw)
    boot2 = fit_velocity_field(v, 1 * u.arcsec, bootstrap=25, seed=3, **kw)
    e_formal = vals(formal.table["v_rot_err"], u.km / u.s)
    e_map = vals(with_map.table["v_rot_err"], u.km / u.s)
    e_boot = vals(boot.table["v_rot_err"], u.km / u.s)
    assert np.all(np.isfinite(e_formal)) and np.all(e_formal > 0)
    # the map's 5 km/s is the true noise, so absolute and scatter-scaled errors agree
    np.testing.assert_allclose(e_map, e_formal, rtol=0.3)
    np.testing.assert_allclose(e_boot, e_formal, rtol=0.6)
    np.testing.assert_array_equal(e_boot, vals(boot2.table["v_rot_err"], u.km / u.s))  # seeded
    assert np.all(np.isfinite(vals(boot.table["inclination_err"], u.deg)))
    assert "bootstrap" in boot.table.meta["v_rot_err"]


def test_velocity_units_accepted(flat_field):
    v, _ = flat_field
    a = fit_velocity_field(v, 1 * u.arcsec, ring_width=6, stages=(1,))
    b = fit_velocity_field(v * 1000.0 * u.m / u.s, 1 / 3600 * u.deg, ring_width=6 * u.arcsec, stages=(1,))
    np.testing.assert_allclose(vals(a.table["v_rot"], u.km / u.s), vals(b.table["v_rot"], u.km / u.s), rtol=1e-9)


# ----------------------------------------------------------------------------- first guesses
@pytest.mark.parametrize("pa,incl", [(30.0, 55.0), (215.0, 40.0), (100.0, 70.0)])
def test_first_guess_with_exponential_intensity(pa, incl):
    rng = np.random.default_rng(11)
    v, r = begeman_field((120, 120), x0=61.4, y0=58.7, v_sys=1500.0, v_rot=lambda x: 200 * np.tanh(x / 10),
                         pa=pa, incl=incl, r_max=55)
    v = v + rng.normal(0, 3.0, v.shape)
    inten = np.exp(-r / 12.0) + rng.normal(0, 0.002, v.shape)
    g = first_guess(v, 1 * u.arcsec, intensity=inten)
    assert abs((g.position_angle.to_value(u.deg) - pa + 180) % 360 - 180) < 2.0
    assert g.inclination.to_value(u.deg) == pytest.approx(incl, abs=4.0)
    assert g.x_center == pytest.approx(61.4, abs=0.5) and g.y_center == pytest.approx(58.7, abs=0.5)
    assert g.v_sys.to_value(u.km / u.s) == pytest.approx(1500.0, abs=1.0)
    # the full fit with nothing given does better still
    res = fit_velocity_field(v, 1 * u.arcsec, intensity=inten, ring_width=5, stages=(1,))
    assert abs(res.global_geometry["position_angle"].to_value(u.deg) - pa) < 0.5
    assert res.global_geometry["inclination"].to_value(u.deg) == pytest.approx(incl, abs=1.0)


def test_first_guess_without_intensity():
    v, _ = begeman_field((120, 120), x0=60.2, y0=61.1, v_sys=50.0, v_rot=lambda x: 150 * np.tanh(x / 15),
                         pa=75.0, incl=60.0, r_max=55)
    g = first_guess(v, 1 * u.arcsec)
    assert g.methods["inclination"] == "ring-model misfit scan"
    assert np.isnan(g.inclination_photometric.value)
    assert abs(g.position_angle.to_value(u.deg) - 75.0) < 2.0
    assert g.inclination.to_value(u.deg) == pytest.approx(60.0, abs=4.0)


def test_first_guess_keeps_given_values(flat_field):
    v, _ = flat_field
    g = first_guess(v, 1 * u.arcsec, position_angle=33 * u.deg, v_sys=990 * u.km / u.s)
    assert g.position_angle.to_value(u.deg) == 33.0 and g.v_sys.to_value(u.km / u.s) == 990.0
    assert g.methods["position_angle"] == "given"


# ----------------------------------------------------------------------------- harmonics
def _truth_table(radii, width, pa, incl, x0, y0):
    t = Table()
    t["radius"] = radii * u.arcsec
    t["position_angle"] = np.full(radii.size, pa) * u.deg
    t["inclination"] = np.full(radii.size, incl) * u.deg
    t["x_center"] = np.full(radii.size, x0) * u.pix
    t["y_center"] = np.full(radii.size, y0) * u.pix
    t.meta["ring_width"] = width
    return t


def test_harmonics_of_pure_circular_field():
    v, _ = begeman_field(SHAPE, x0=CX, y0=CY, v_sys=400.0, v_rot=160.0, pa=20.0, incl=50.0, r_max=52)
    radii = np.arange(6.0, 50.0, 4.0)
    h = harmonic_expansion(v, _truth_table(radii, 4.0, 20.0, 50.0, CX, CY), 1 * u.arcsec)
    assert list(h.colnames[1:15]) == [n + s for n in HARMONIC_TERMS for s in ("", "_err")]
    ok = np.asarray(h["status"]) == Status.OK
    assert ok.all()
    # pure rotation: c0 = v_sys, c1 = v_rot sin i, all else 0 (Schoenmakers et al. 1997)
    np.testing.assert_allclose(vals(h["c0"], u.km / u.s), 400.0, atol=1e-6)
    np.testing.assert_allclose(vals(h["c1"], u.km / u.s), 160.0 * np.sin(np.deg2rad(50.0)), atol=1e-6)
    for name in ("s1", "c2", "s2", "c3", "s3"):
        np.testing.assert_allclose(vals(h[name], u.km / u.s), 0.0, atol=1e-6)


def test_harmonics_recover_m2_term():
    rng = np.random.default_rng(5)
    v, _ = begeman_field(SHAPE, x0=CX, y0=CY, v_sys=400.0, v_rot=160.0, pa=20.0, incl=50.0, r_max=52,
                         m2=(8.0, -5.0))
    v = v + rng.normal(0.0, 2.0, v.shape)
    radii = np.arange(10.0, 50.0, 5.0)
    h = harmonic_expansion(v, _truth_table(radii, 5.0, 20.0, 50.0, CX, CY), 1 * u.arcsec,
                           velocity_err=np.full(v.shape, 2.0))
    c2, s2 = vals(h["c2"], u.km / u.s), vals(h["s2"], u.km / u.s)
    c2e, s2e = vals(h["c2_err"], u.km / u.s), vals(h["s2_err"], u.km / u.s)
    assert np.all(np.abs(c2 - 8.0) < 4 * c2e) and np.all(np.abs(s2 + 5.0) < 4 * s2e)
    assert np.all(c2e < 0.5)
    np.testing.assert_allclose(vals(h["c3"], u.km / u.s), 0.0, atol=4 * np.max(vals(h["c3_err"], u.km / u.s)))


def test_harmonics_of_fit_are_small_for_circular_disk(flat_fit):
    h = flat_fit.harmonics
    ok = np.asarray(h["status"]) == Status.OK
    for name in ("c2", "s2", "c3", "s3"):
        assert np.all(np.abs(vals(h[name], u.km / u.s)[ok]) < 0.5)


# ----------------------------------------------------------------------------- mass, model, pv
def test_dynamical_mass_reference_value():
    # 200 km/s at 10 kpc -> 9.30e10 Msun with G = 4.30091e-3 pc Msun^-1 (km/s)^2
    # (astropy.constants; DESIGN.md reference value)
    m = dynamical_mass(200 * u.km / u.s, 10 * u.kpc)
    assert m.unit == u.M_sun
    assert m.value == pytest.approx(9.30e10, rel=2e-3)


def test_physical_radius_and_table_mass(flat_fit):
    # 1 arcsec at 1 Mpc is 4.848 pc (small-angle approximation; common practice)
    assert physical_radius(1 * u.arcsec, 1 * u.Mpc).to_value(u.pc) == pytest.approx(4.848, rel=1e-3)
    t = flat_fit.table
    r_kpc = vals(t["radius_kpc"], u.kpc)
    np.testing.assert_allclose(r_kpc, vals(t["radius"], u.arcsec) * 4.848e-3 * 10, rtol=1e-3)
    np.testing.assert_allclose(vals(t["mass_enclosed"], u.M_sun),
                               dynamical_mass(u.Quantity(t["v_rot"]), r_kpc * u.kpc).value, rtol=1e-12)


def test_model_field_matches_input(flat_field, flat_fit):
    v, r = flat_field
    model = flat_fit.model.to_value(u.km / u.s)
    inner = (r > 6) & (r < 46) & np.isfinite(v)
    assert np.all(np.isfinite(model[inner]))
    assert np.sqrt(np.mean((model[inner] - v[inner]) ** 2)) < 0.3
    np.testing.assert_allclose(flat_fit.residual.value[inner], (v - model)[inner])
    again = model_velocity_field(flat_fit.table, v.shape, 1 * u.arcsec)
    np.testing.assert_allclose(again.to_value(u.km / u.s), model, equal_nan=True)
    assert np.all(np.isnan(model[r > 60]))


def test_model_of_rising_curve_interpolates_between_rings():
    v, r = begeman_field(SHAPE, x0=CX, y0=CY, v_sys=0.0, v_rot=rising, pa=145.0, incl=62.0, r_max=52)
    res = fit_velocity_field(v, 1 * u.arcsec, radii=np.arange(2.0, 50.0, 4.0), ring_width=4, stages=(1,))
    model = res.model.to_value(u.km / u.s)
    band = (r > 14) & (r < 46) & np.isfinite(v)
    # linear interpolation of v_rot between ring centres (not steps) keeps errors small
    assert np.sqrt(np.mean((model[band] - v[band]) ** 2)) < 1.0


def test_major_axis_pv_follows_model(flat_field, flat_fit):
    v, r = flat_field
    vax = np.arange(700.0, 1300.0, 4.0)
    cube = np.exp(-r / 15.0)[None] * np.exp(-0.5 * ((vax[:, None, None] - v[None]) / 10.0) ** 2)
    pv = major_axis_pv(cube * u.K, vax * u.km / u.s, flat_fit)
    off = pv.offset.to_value(u.arcsec)
    sel = (np.abs(off) > 8) & (np.abs(off) < 40)
    peak_v = vax[np.nanargmax(pv.data[:, sel], axis=0)]
    np.testing.assert_allclose(peak_v, pv.model_velocity.to_value(u.km / u.s)[sel], atol=4.0)
    # receding side at positive offsets
    mv = pv.model_velocity.to_value(u.km / u.s)
    rec, app = np.isfinite(mv) & (off > 8), np.isfinite(mv) & (off < -8)
    assert rec.sum() > 20 and app.sum() > 20
    assert np.all(mv[rec] > 1100) and np.all(mv[app] < 900)
    assert pv.unit == u.K


# ----------------------------------------------------------------------------- plots
def test_plots_return_figures(flat_field, flat_fit):
    from matplotlib.colors import TwoSlopeNorm
    from matplotlib.figure import Figure

    from kinemap.plotting import rings as pr

    v, r = flat_field
    figs = [pr.plot_rotation_curve(flat_fit), pr.plot_ring_geometry(flat_fit), pr.plot_harmonics(flat_fit)]
    vf = pr.plot_velocity_fields(flat_fit)
    vax = np.arange(700.0, 1300.0, 10.0)
    cube = np.exp(-0.5 * ((vax[:, None, None] - v[None]) / 10.0) ** 2)
    pvf = pr.plot_pv_diagram(major_axis_pv(cube, vax, flat_fit), flat_fit)
    for f in figs + [vf, pvf]:
        assert isinstance(f, Figure)
    # each of the five geometry parameters is a panel, or (one value in every ring) named
    # in the note below the panels instead
    labels = " ".join(ax.get_ylabel() for ax in figs[1].axes).lower()
    note = figs[1]._supxlabel.get_text() if figs[1]._supxlabel is not None else ""
    for panel, short in (("position angle", "position angle"), ("inclination", "inclination"),
                         ("v_{\\rm sys}", "v_sys"), ("centre x", "centre x"),
                         ("centre y", "centre y")):
        assert (panel in labels) != (short in note), (panel, labels, note)
    image_axes = [ax for ax in vf.axes if ax.images]
    assert len(image_axes) == 3
    norm = image_axes[0].images[0].norm
    assert isinstance(norm, TwoSlopeNorm)
    assert norm.vcenter == pytest.approx(flat_fit.global_geometry["v_sys"].to_value(u.km / u.s))
    assert image_axes[0].images[0].get_cmap().name == "RdBu_r"


# ----------------------------------------------------------------------------- bad input
@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(inclination=95 * u.deg), r"'inclination' must be between 0 and 90 deg"),
        (dict(inclination=0.0), r"'inclination' must be between 0 and 90 deg"),
        (dict(x_center=500.0), r"'x_center' must lie inside the map"),
        (dict(y_center=-3.0), r"'y_center' must lie inside the map"),
        (dict(weighting="cos3"), r"'weighting' must be one of"),
        (dict(stages=(2, 3)), r"'stages' must contain 1"),
        (dict(fix=["tilt"]), r"'fix' entries must be among"),
        (dict(ring_free=["v_exp"]), r"'ring_free' lists geometry parameters only"),
        (dict(bootstrap=1), r"'bootstrap' must be 0"),
        (dict(exclude_minor_axis=95 * u.deg), r"'exclude_minor_axis' must be"),
        (dict(radii=[5.0, 3.0]), r"'radii' must increase"),
        (dict(radii=[5.0, 10.0], ring_width=8.0), r"'ring_width' .* larger than the ring spacing"),
        (dict(position_angle=[10.0, 20.0], radii=[5.0, 10.0]), r"per-ring values of 'position_angle'"),
        (dict(distance=-3 * u.Mpc), r"'distance' must be positive"),
        (dict(beam_fwhm=2 * u.km / u.s), r"'beam_fwhm' must be in units convertible to arcsec"),
        (dict(intensity=np.ones((5, 5))), r"'intensity' must have the same shape"),
    ],
)
def test_bad_input_raises(flat_field, kwargs, match):
    v, _ = flat_field
    with pytest.raises(KinemapError, match=match):
        fit_velocity_field(v, 1 * u.arcsec, **kwargs)


def test_bad_maps_raise():
    with pytest.raises(KinemapError, match=r"'velocity' has only 10 usable"):
        v = np.full((30, 30), np.nan)
        v.flat[:10] = 1.0
        fit_velocity_field(v, 1 * u.arcsec)
    with pytest.raises(KinemapError, match=r"'velocity' must be a 2-D"):
        fit_velocity_field(np.zeros((3, 10, 10)), 1 * u.arcsec)
    with pytest.raises(KinemapError, match=r"'pixel_scale' must be a positive"):
        fit_velocity_field(np.zeros((10, 10)), -1 * u.arcsec)
    with pytest.raises(KinemapError, match=r"'velocity' must be in units convertible to km / s"):
        fit_velocity_field(np.zeros((10, 10)) * u.K, 1 * u.arcsec)


def test_messages_are_one_line(flat_field):
    v, _ = flat_field
    with pytest.raises(KinemapError) as info:
        fit_velocity_field(v, 1 * u.arcsec, inclination=120)
    assert "\n" not in str(info.value)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a clean fit emits no warnings
        fit_velocity_field(v, 1 * u.arcsec, ring_width=6, stages=(1,))
