"""Channel-map panels (kinemap.maps.channels): images, velocities and panel noise."""
from __future__ import annotations

import warnings

import numpy as np
import pytest

from conftest import gaussian_cube, make_header, write_cube
from kinemap.errors import KinemapError
from kinemap.io.reader import read_cube
from kinemap.maps.channels import _panel_noise, channel_maps


@pytest.fixture
def small_cube(tmp_path):
    data = gaussian_cube(30, 8, 9, centre_chan=14.0, sigma_chan=3.0, amp=2.0, noise=0.1, seed=2)
    data[5, 2, 3] = np.nan
    path = write_cube(tmp_path / "c.fits", data,
                      make_header("VRAD", nchan=30, ny=8, nx=9, crval=-30e3, cdelt=2e3,
                                  cunit="m/s"))
    return path


@pytest.mark.parametrize("every", [1, 3, 4])
def test_panels_equal_spectral_cube_downsampling(small_cube, every):
    # spectral-cube's downsample_axis averages blocks of channels (reference library)
    from spectral_cube import SpectralCube

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cube = read_cube(small_cube)
        ref = SpectralCube.read(small_cube).downsample_axis(every, axis=0, truncate=True)
    result = channel_maps(cube, noise=0.1, every=every)
    full = 30 // every
    assert result.images.shape == (-(-30 // every), 8, 9)
    assert np.allclose(result.images[:full], ref.filled_data[:].value, equal_nan=True,
                       rtol=1e-6, atol=1e-7)
    assert np.allclose(result.velocity[:full], ref.spectral_axis.to_value("km/s"), rtol=0,
                       atol=1e-6)
    assert np.all(np.diff(result.velocity) > 0)
    assert np.allclose(result.velocity_hi - result.velocity_lo,
                       [min(every, 30 - k) * 2.0 for k in range(0, 30, every)])


@pytest.mark.parametrize("response", ["tophat", "hanning"])
def test_panel_noise_matches_simulated_noise(response):
    # Monte Carlo: white noise (Hanning-smoothed with [1/4, 1/2, 1/4] for 'hanning'),
    # averaged over 4 channels; the measured spread is the reference
    rng = np.random.default_rng(5)
    x = rng.normal(size=(200000, 40))
    if response == "hanning":
        x = 0.25 * x[:, :-2] + 0.5 * x[:, 1:-1] + 0.25 * x[:, 2:]
    sigma = x[:, 10].std()
    measured = x[:, 10:14].mean(axis=1).std()
    assert _panel_noise(sigma, 4, response) == pytest.approx(measured, rel=0.01)


def test_bad_options_raise(small_cube):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cube = read_cube(small_cube)
    with pytest.raises(KinemapError, match="'every' must be a whole number"):
        channel_maps(cube, noise=0.1, every=0)
    with pytest.raises(KinemapError, match="'levels' must be non-zero multiples"):
        channel_maps(cube, noise=0.1, levels=[0, 3])


def test_too_many_panels_ask_for_every(tmp_path):
    data = np.zeros((400, 4, 4), np.float32)
    path = write_cube(tmp_path / "long.fits", data,
                      make_header("VRAD", nchan=400, ny=4, nx=4, crval=0, cdelt=1e3, cunit="m/s"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cube = read_cube(path)
    with pytest.raises(KinemapError, match=r"400 channel maps would fill 25 pages.*--every 2"):
        channel_maps(cube, noise=1.0)


def test_real_cube_panels_equal_spectral_cube(real_cube_path):
    # the real cube (tests/conftest.py REAL_CUBE) against spectral-cube's downsampling
    from spectral_cube import SpectralCube

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cube = read_cube(real_cube_path)
        ref = SpectralCube.read(real_cube_path).downsample_axis(4, axis=0, truncate=True)
    result = channel_maps(cube, every=4)
    assert result.images.shape[0] == 14
    assert np.allclose(result.images[:13], ref.filled_data[:].value, rtol=1e-5, atol=1e-6,
                       equal_nan=True)
    # emission sits between about 3 and 6 km/s LSRK (data README; common practice)
    peaks = np.nanmax(result.images, axis=(1, 2)) / result.noise
    bright = result.velocity[peaks > 10]
    assert bright.min() > 2.5 and bright.max() < 6.5
