"""Velocity gradients: exact planes, a pull test of the errors, the WCS orientation."""
import numpy as np
import pytest
from astropy.wcs import WCS

from conftest import make_header
from kinemap.errors import KinemapError
from kinemap.turbulence import local_gradients, plane_fit, sky_matrix


def linear_field(shape, g_east, g_north, v0, matrix):
    """v = v0 + g . (east, north), with (east, north) = matrix (x, y) (arcsec)."""
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    east = matrix[0, 0] * xx + matrix[0, 1] * yy
    north = matrix[1, 0] * xx + matrix[1, 1] * yy
    return v0 + g_east * east + g_north * north


@pytest.mark.parametrize("rotation_deg", [0.0, 30.0])
def test_a_linear_field_gives_back_its_gradient(rotation_deg):
    """Goodman et al. (1993, ApJ 406, 528) plane v = v0 + a dx + b dy: an exact plane is
    recovered exactly, on a WCS rotated or not (the map to the sky is linear)."""
    h = make_header("VRAD", nchan=2, ny=40, nx=50, crval=0.0, cdelt=1.0, cunit="km/s")
    t = np.radians(rotation_deg)
    h["PC1_1"], h["PC1_2"], h["PC2_1"], h["PC2_2"] = np.cos(t), -np.sin(t), np.sin(t), np.cos(t)
    m = sky_matrix(WCS(h))
    # 0.02 km/s/arcsec towards PA 120 deg (east of north)
    pa = np.radians(120.0)
    v = linear_field((40, 50), 0.02 * np.sin(pa), 0.02 * np.cos(pa), 3.0, m)
    v[5:12, 30:40] = np.nan
    err = np.full(v.shape, 0.1)
    r = plane_fit(v, err, matrix=m)
    assert r["gradient"] == pytest.approx(0.02, rel=1e-10)
    assert r["position_angle"] == pytest.approx(120.0, abs=1e-8)
    loc = local_gradients(v, err, matrix=m, window_pix=5)
    ok = np.isfinite(loc["gradient"])
    assert ok.sum() > 1500
    np.testing.assert_allclose(loc["gradient"][ok], 0.02, rtol=1e-8)
    np.testing.assert_allclose(loc["position_angle"][ok], 120.0, atol=1e-6)


def test_east_is_minus_x_without_a_wcs():
    # FITS convention (common practice): RA grows to the left, so a field rising towards
    # -x rises to the east, position angle 90 deg
    m = sky_matrix(pixel_scale=2.0)
    yy, xx = np.mgrid[0:20, 0:20]
    r = plane_fit(10.0 - 0.5 * xx, None, matrix=m)
    assert r["position_angle"] == pytest.approx(90.0)
    assert r["gradient"] == pytest.approx(0.25)  # 0.5 km/s per 2-arcsec pixel


def test_plane_errors_pass_a_pull_test():
    """Pull test: a plane plus Gaussian noise of the stated sigma, 400 times; the pulls
    (fit - truth)/error of the gradient components, magnitude, direction and v0 have mean
    0 and standard deviation 1 (the standard error check; tolerance from 400 draws)."""
    rng = np.random.default_rng(93)
    m = sky_matrix(pixel_scale=3.0)
    g_e, g_n = 0.01, -0.004
    truth = linear_field((24, 30), g_e, g_n, 2.0, m)
    mag = np.hypot(g_e, g_n)
    pa = np.degrees(np.arctan2(g_e, g_n)) % 360
    pulls = {k: [] for k in ("g_east", "g_north", "gradient", "position_angle", "v0")}
    sigma = rng.uniform(0.05, 0.15, truth.shape)  # unequal errors: the weights matter
    for _ in range(400):
        v = truth + sigma * rng.standard_normal(truth.shape)
        r = plane_fit(v, sigma, matrix=m)
        ge_err, gn_err = np.sqrt(np.diag(r["cov"]))
        v0_true = 2.0 + g_e * (m[0, 0] * r["x0"]) + g_n * (m[1, 1] * r["y0"])
        pulls["g_east"].append((r["g_east"] - g_e) / ge_err)
        pulls["g_north"].append((r["g_north"] - g_n) / gn_err)
        pulls["gradient"].append((r["gradient"] - mag) / r["gradient_err"])
        pulls["position_angle"].append((r["position_angle"] - pa) / r["position_angle_err"])
        pulls["v0"].append((r["v0"] - v0_true) / r["v0_err"])
    for key, p in pulls.items():
        p = np.asarray(p)
        assert abs(p.mean()) < 0.2, key  # 5 sigma of the mean of 400 unit pulls is 0.25
        assert 0.88 < p.std() < 1.12, key  # +-3.4 sigma of the std of 400 draws


def test_local_gradient_errors_pass_a_pull_test():
    # pull test of the moving-window errors: one noisy plane, every window's gradient
    # component pulls; windows overlap, so only the spread is checked (common practice)
    rng = np.random.default_rng(5)
    m = sky_matrix(pixel_scale=1.0)
    truth = linear_field((120, 120), 0.05, 0.0, 0.0, m)
    v = truth + 0.1 * rng.standard_normal(truth.shape)
    loc = local_gradients(v, np.full(v.shape, 0.1), matrix=m, window_pix=9)
    pull = (loc["gradient"] - 0.05) / loc["gradient_err"]
    pull = pull[np.isfinite(pull)][::17]  # thin out: neighbouring windows share pixels
    assert 0.85 < np.std(pull) < 1.15


def test_too_few_pixels_is_a_clear_error():
    with pytest.raises(KinemapError, match="at least 4 pixels"):
        plane_fit(np.full((3, 3), np.nan), None, matrix=sky_matrix(pixel_scale=1.0))
    with pytest.raises(KinemapError, match="lie on a line"):
        v = np.full((5, 5), np.nan)
        v[2, :] = 1.0
        plane_fit(v, None, matrix=sky_matrix(pixel_scale=1.0))
