"""Moment maps of cubes of unusual shape, and maps that would be blank everywhere.

Found by benchmarks/fuzz.py: on a cube one row (or one column) wide the smooth mask asked
every island to cover a whole resolution element (23 pixels) that a 16-pixel map cannot
hold, and wrote all-NaN maps with exit 0; a beam of 1e30 degrees made its smoothing kernel
exhaust the memory.
"""
from __future__ import annotations

import numpy as np
import pytest
from conftest import gaussian_cube, make_header, run_cli, write_cube

from kinemap import KinemapError, compute_moments, estimate_noise, make_mask, read_cube
from kinemap.maps.moments import noise_and_moments

BEAM = {"BMAJ": 5e-3, "BMIN": 5e-3, "BPA": 0.0}  # 2.5 pixels of 2e-3 deg


def _strip(tmp_path, ny, nx, *, seed=0, extra=None):
    """A VRAD cube (1 km/s channels from -20 km/s) with a line whose centre moves along x."""
    nchan = 40
    h = make_header("VRAD", nchan=nchan, ny=ny, nx=nx, crval=-20.0, cdelt=1.0, cunit="km/s",
                    extra={**BEAM, **(extra or {})})
    centre = np.broadcast_to(15.0 + 10.0 * np.arange(nx) / max(nx - 1, 1), (ny, nx))
    data = gaussian_cube(nchan, ny, nx, centre_chan=centre, sigma_chan=2.5, amp=3.0,
                         noise=0.1, seed=seed)
    truth = -20.0 + centre  # channel k has velocity -20 + k km/s
    return write_cube(tmp_path / "strip.fits", data, h), truth


@pytest.mark.parametrize("ny, nx", [(1, 16), (16, 1), (2, 16), (1, 3), (3, 3)])
def test_smooth_mask_keeps_emission_of_a_thin_map(tmp_path, ny, nx):
    path, truth = _strip(tmp_path, ny, nx)
    cube = read_cube(path)
    noise = estimate_noise(cube)
    mask = make_mask(cube, noise=noise)
    # an island cannot be larger than the map: the resolution element is cut to it
    assert mask.settings["min_pixels"] <= ny * nx
    maps = compute_moments(cube, mask=mask, noise=noise)
    m1 = maps.arrays["moment1"]
    assert np.isfinite(m1).all()
    # seeded synthetic truth: the line centre of every spectrum (S/N 30 per channel)
    np.testing.assert_allclose(m1, truth, atol=0.5)


def test_smooth_mask_unchanged_on_a_full_map(tmp_path):
    """On a map wider than the resolution element the element is not cut: 1.1331 FWHM^2
    (Gaussian area over FWHM squared, pi / (4 ln 2), common practice)."""
    path, _ = _strip(tmp_path, 16, 16)
    cube = read_cube(path)
    mask = make_mask(cube, noise=estimate_noise(cube))
    beam_pix = 2.5  # 5e-3 deg over 2e-3 deg pixels
    expected = round(1.1331 * (beam_pix ** 2 + (1.5 * beam_pix) ** 2))
    assert mask.settings["min_pixels"] == expected


def test_blank_maps_are_refused_not_written(tmp_path):
    """Noise only and a 5-sigma seed threshold: the smooth mask finds nothing, and the
    moments say so instead of returning maps that are NaN everywhere."""
    h = make_header("VRAD", nchan=30, ny=12, nx=10, crval=-20.0, cdelt=1.0, cunit="km/s",
                    extra=BEAM)
    rng = np.random.default_rng(4)
    path = write_cube(tmp_path / "noise.fits", rng.normal(0, 0.1, (30, 12, 10)), h)
    cube = read_cube(path)
    noise = estimate_noise(cube)
    mask = make_mask(cube, noise=noise, threshold=50.0)
    assert not mask.mask.any()
    with pytest.raises(KinemapError, match="signal mask found no emission.*--mask none"):
        compute_moments(cube, mask=mask, noise=noise)
    # without a mask every finite channel counts (as spectral-cube's moments do)
    assert np.isfinite(compute_moments(cube, noise=noise).arrays["moment0"]).all()


def test_absurd_beam_refused_before_smoothing(tmp_path):
    """A 1e5-degree beam made the smoothing kernel hang; the reader refuses it by name
    before any kernel is built."""
    path, _ = _strip(tmp_path, 8, 8, extra={"BMAJ": 1e5, "BMIN": 1e5})
    with pytest.raises(KinemapError, match="BMAJ/BMIN.*--beam"):
        read_cube(path)


def test_command_on_a_one_row_cube(tmp_path):
    path, truth = _strip(tmp_path, 1, 16)
    code, out, err = run_cli("maps", path, "--method", "moments", "--out", str(tmp_path / "o"),
                             "--no-plots", "--no-progress")
    assert code == 0, err
    from astropy.io import fits

    m1 = fits.getdata(tmp_path / "o" / "moment1.fits")
    np.testing.assert_allclose(m1, truth, atol=0.5)  # seeded synthetic truth


def test_smooth_mask_through_scattered_blank_spectra(tmp_path):
    """60 % of the spectra blank (NaN), scattered: the islands grow through the blanks
    instead of breaking into pieces smaller than a resolution element, so every spectrum
    left keeps its moment 1 (before: the mask was empty and the maps blank)."""
    path, truth = _strip(tmp_path, 16, 16, seed=5)
    data = read_cube(path).data.copy()
    blank = np.random.default_rng(7).random((16, 16)) < 0.6
    data[:, blank] = np.nan
    h = make_header("VRAD", nchan=40, ny=16, nx=16, crval=-20.0, cdelt=1.0, cunit="km/s",
                    extra=BEAM)
    cube = read_cube(write_cube(tmp_path / "holes.fits", data, h))
    noise = estimate_noise(cube)
    mask = make_mask(cube, noise=noise)
    assert not mask.mask[:, blank].any()  # blank voxels are never signal
    m1 = compute_moments(cube, mask=mask, noise=noise).arrays["moment1"]
    assert np.isfinite(m1[~blank]).all() and np.isnan(m1[blank]).all()
    np.testing.assert_allclose(m1[~blank], truth[~blank], atol=0.5)  # seeded synthetic truth


@pytest.mark.parametrize("nchan", [1, 2, 4])
def test_too_few_channels_named(tmp_path, nchan):
    """A cube of fewer than five channels has fewer than three second differences per
    spectrum, too few for a clipped RMS: the message names the channel count, not
    line-free ranges (which cannot help)."""
    h = make_header("VRAD", nchan=nchan, ny=6, nx=6, crval=-2.0, cdelt=1.0, cunit="km/s",
                    extra=BEAM)
    data = np.random.default_rng(9).normal(0, 0.1, (nchan, 6, 6)) + 1.0
    cube = read_cube(write_cube(tmp_path / "few.fits", data, h))
    s = "s" if nchan > 1 else ""
    with pytest.raises(KinemapError, match=f"the cube has {nchan} channel{s}: too few"):
        estimate_noise(cube)
    with pytest.raises(KinemapError, match=f"the cube has {nchan} channel{s}: too few"):
        noise_and_moments(cube)  # the fused pass the maps command runs says the same


def test_empty_threshold_mask_suggests_no_mask(tmp_path):
    h = make_header("VRAD", nchan=30, ny=8, nx=8, crval=-20.0, cdelt=1.0, cunit="km/s",
                    extra=BEAM)
    rng = np.random.default_rng(11)
    cube = read_cube(write_cube(tmp_path / "n.fits", rng.normal(0, 0.1, (30, 8, 8)), h))
    noise = estimate_noise(cube)
    mask = make_mask(cube, noise=noise, method="threshold", threshold=50.0)
    with pytest.raises(KinemapError, match=r"threshold signal mask found no emission \(no "
                       r"voxel above S/N 50\).*or use --mask none$"):
        compute_moments(cube, mask=mask, noise=noise)
