"""Moment maps against spectral-cube (reference library) and a Monte Carlo over noise."""
import warnings

import astropy.units as u
import dask.array as da
import numpy as np
import pytest

from conftest import make_header, write_cube
from kinemap.io.reader import read_cube
from kinemap.maps.masks import make_mask
from kinemap.maps.moments import compute_moments
from kinemap.maps.noise import estimate_noise


def _spectral_cube(path, mask=None):
    from spectral_cube import SpectralCube

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        sc = SpectralCube.read(path).with_spectral_unit(u.km / u.s)
        if mask is not None:
            sc = sc.with_mask(mask)
        return sc.moment0().value, sc.moment1().value, sc.linewidth_sigma().value


def test_real_cube_no_mask_equals_spectral_cube(real_cube_path):
    # Reference: spectral-cube's moment0 / moment1 / linewidth_sigma on the same channels.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cube = read_cube(real_cube_path)
    m = compute_moments(cube)
    ref0, ref1, ref2 = _spectral_cube(real_cube_path)
    np.testing.assert_allclose(m.moment0.value, ref0, rtol=1e-6)
    np.testing.assert_allclose(m.moment1.value, ref1, rtol=1e-6)
    ok = np.isfinite(ref2)
    np.testing.assert_allclose(m.moment2.value[ok], ref2[ok], rtol=1e-6)


@pytest.mark.parametrize("method", ["threshold", "smooth"])
def test_real_cube_with_mask_equals_spectral_cube(real_cube_path, method):
    # Reference: spectral-cube with the same boolean mask (with_mask).
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cube = read_cube(real_cube_path)
    noise = estimate_noise(cube)
    mask = make_mask(cube, noise=noise, method=method)
    m = compute_moments(cube, mask=mask, noise=noise)
    data = np.asarray(cube.data)
    full = mask.block(slice(0, cube.shape[1]), data, noise.sigma)
    assert 0.05 < full.mean() < 0.999  # a real mask, not all or nothing
    ref0, ref1, ref2 = _spectral_cube(real_cube_path, mask=full)
    ok = np.isfinite(ref1) & (m.nchan.value > 1)
    np.testing.assert_allclose(m.moment0.value[ok], ref0[ok], rtol=1e-5)
    np.testing.assert_allclose(m.moment1.value[ok], ref1[ok], rtol=1e-5)
    ok2 = ok & np.isfinite(ref2)
    np.testing.assert_allclose(m.moment2.value[ok2], ref2[ok2], rtol=1e-5, atol=1e-9)


def _mc_cube(tmp_path, nchan=64):
    h = make_header("VRAD", nchan=nchan, ny=1, nx=1, crval=-160.0, cdelt=5.0, cunit="km/s")
    path = write_cube(tmp_path / "c.fits", np.zeros((nchan, 1, 1)), h)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return read_cube(path)


@pytest.mark.parametrize("response", ["tophat", "hanning"])
def test_analytic_errors_match_monte_carlo(tmp_path, response):
    """Analytic 1-sigma errors equal the scatter over 4000 noise realisations (Monte Carlo).

    The errors are first-order propagation, so the check runs at high S/N (peak S/N 33);
    at peak S/N ~12 the moment-2 error comes out ~9 % optimistic for Hanning-correlated
    noise, as the moments module docstring warns.
    """
    cube = _mc_cube(tmp_path)
    v = cube.velocity
    rng = np.random.default_rng(42)
    nreal, sigma_noise = 4000, 0.03
    line = 1.0 * np.exp(-0.5 * ((v - 3.0) / 18.0) ** 2)
    white = rng.normal(0.0, 1.0, (nreal, v.size + 2))
    if response == "hanning":
        noise = 0.25 * white[:, :-2] + 0.5 * white[:, 1:-1] + 0.25 * white[:, 2:]
        noise *= sigma_noise / np.sqrt(3 / 8)
    else:
        noise = sigma_noise * white[:, 1:-1]
    spectra = (line[None] + noise).T.reshape(v.size, 1, nreal)
    mc = cube.with_changes(data=da.from_array(spectra))
    # fixed channel window (no data-dependent mask) so the estimator is a fixed function
    from kinemap.maps.masks import SignalMask
    window = SignalMask("none")
    vsel = np.abs(v - 3.0) < 60
    mc = mc.with_changes(data=da.from_array(spectra[vsel]), velocity=v[vsel])
    from kinemap.maps.noise import NoiseMap
    nm = NoiseMap(np.full((1, nreal), sigma_noise), np.ones((1, nreal)), u.K, "given")
    m = compute_moments(mc, mask=window, noise=nm, channel_response=response)
    for key in ("moment0", "moment1", "moment2"):
        vals = getattr(m, key).value[0]
        assert np.isfinite(vals).mean() > 0.99
        scatter = np.nanstd(vals, ddof=1)
        predicted = np.nanmedian(getattr(m, key + "_err").value[0])
        # the Monte Carlo scatter itself is uncertain by ~1/sqrt(2 nreal) = 1.1 %
        assert predicted == pytest.approx(scatter, rel=0.06), key


def test_known_gaussian_moments(tmp_path):
    """Moment 1 and 2 of a noiseless, well-sampled Gaussian are its centre and sigma
    (common practice; the top-hat channel sampling adds nothing when sampled at centres)."""
    cube = _mc_cube(tmp_path, nchan=200)
    v = cube.velocity
    spec = 2.0 * np.exp(-0.5 * ((v - 40.0) / 25.0) ** 2)
    c = cube.with_changes(data=da.from_array(spec[:, None, None]))
    m = compute_moments(c)
    assert m.moment1.value[0, 0] == pytest.approx(40.0, abs=1e-6)
    assert m.moment2.value[0, 0] == pytest.approx(25.0, rel=1e-4)
    assert m.moment0.value[0, 0] == pytest.approx(2.0 * np.sqrt(2 * np.pi) * 25.0, rel=1e-6)
    assert m.peak.value[0, 0] == pytest.approx(2.0, rel=1e-3)
    assert m.velocity_at_peak.value[0, 0] == pytest.approx(40.0, abs=2.5)


def test_nan_pixels_give_nan_and_zero_channels(tmp_path):
    cube = _mc_cube(tmp_path, nchan=30)
    data = np.ones((30, 2, 2))
    data[:, 0, 0] = np.nan
    m = compute_moments(cube.with_changes(data=da.from_array(data)))
    assert np.isnan(m.moment0.value[0, 0]) and np.isnan(m.moment1.value[0, 0]) and m.nchan.value[0, 0] == 0
    assert m.nchan.value[1, 1] == 30


def test_single_channel_pixel_error_is_the_channel_quantisation(tmp_path):
    """One signal channel: velocity known to dv/sqrt(12) (top-hat sigma, exact); no width."""
    from kinemap.maps.masks import SignalMask
    from kinemap.maps.noise import NoiseMap

    cube = _mc_cube(tmp_path, nchan=30)
    data = np.zeros((30, 1, 1))
    data[12] = 5.0
    nm = NoiseMap(np.full((1, 1), 1.0), np.ones((1, 1)), u.K, "given")
    m = compute_moments(cube.with_changes(data=da.from_array(data)),
                        mask=SignalMask("threshold", threshold=3.0), noise=nm)
    assert m.nchan.value[0, 0] == 1
    assert m.moment1_err.value[0, 0] == pytest.approx(5.0 / np.sqrt(12.0))
    assert np.isnan(m.moment2.value[0, 0]) and np.isnan(m.moment2_err.value[0, 0])
