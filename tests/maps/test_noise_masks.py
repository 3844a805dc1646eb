"""Noise estimates and signal masks on seeded synthetic cubes with known truth."""
import warnings

import numpy as np
import pytest
from scipy import stats

from conftest import make_header, write_cube
from kinemap.io.reader import read_cube
from kinemap.errors import KinemapError
from kinemap.maps.masks import make_mask
from kinemap.maps.noise import CLIP, clip_correction, estimate_noise


def test_clip_correction_is_truncated_normal_sigma():
    # sigma of a unit normal truncated at +-c (scipy.stats.truncnorm, reference library)
    assert clip_correction(CLIP) == pytest.approx(stats.truncnorm(-CLIP, CLIP).std(), rel=1e-12)
    assert clip_correction(2.0) == pytest.approx(stats.truncnorm(-2, 2).std(), rel=1e-12)


def _cube(tmp_path, data, **kw):
    tmp_path.mkdir(parents=True, exist_ok=True)
    nchan, ny, nx = data.shape
    h = make_header("VRAD", nchan=nchan, ny=ny, nx=nx, crval=-200.0, cdelt=4.0, cunit="km/s", **kw)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return read_cube(write_cube(tmp_path / "c.fits", data, h))


def _line_cube(rng, nchan=120, ny=20, nx=20, sigma=0.1, amp=1.0, response="tophat"):
    v = -200.0 + 4.0 * np.arange(nchan)
    line = amp * np.exp(-0.5 * ((v - 10.0) / 20.0) ** 2)
    white = rng.normal(0.0, 1.0, (nchan + 2, ny, nx))
    if response == "hanning":
        noise = (0.25 * white[:-2] + 0.5 * white[1:-1] + 0.25 * white[2:]) / np.sqrt(3 / 8)
    else:
        noise = white[1:-1]
    return line[:, None, None] + sigma * noise


@pytest.mark.parametrize("response", ["tophat", "hanning"])
def test_automatic_noise_recovers_truth_with_line_present(tmp_path, response):
    rng = np.random.default_rng(7)
    cube = _cube(tmp_path, _line_cube(rng, response=response))
    n = estimate_noise(cube, channel_response=response)
    assert n.median == pytest.approx(0.1, rel=0.05)


def test_line_free_ranges(tmp_path):
    rng = np.random.default_rng(8)
    cube = _cube(tmp_path, _line_cube(rng))
    n = estimate_noise(cube, line_free=[(-200, -80), (100, 276)])
    assert n.median == pytest.approx(0.1, rel=0.05)
    assert n.method == "line-free ranges"
    with pytest.raises(KinemapError, match="line_free"):
        estimate_noise(cube, line_free=[(1000, 2000)])


def test_all_nan_cube_is_a_clear_error(tmp_path):
    cube = _cube(tmp_path, np.full((20, 4, 4), np.nan))
    with pytest.raises(KinemapError, match="no finite values"):
        estimate_noise(cube)


def test_masks_find_the_source_and_not_the_noise(tmp_path):
    rng = np.random.default_rng(9)
    data = _line_cube(rng, ny=30, nx=30, amp=0.0)
    yy, xx = np.mgrid[:30, :30]
    blob = np.exp(-0.5 * (((yy - 15) ** 2 + (xx - 15) ** 2) / 4.0 ** 2))
    v = -200.0 + 4.0 * np.arange(data.shape[0])
    truth = 0.6 * blob[None] * np.exp(-0.5 * ((v - 10.0) / 20.0) ** 2)[:, None, None]
    data = data + truth
    cube = _cube(tmp_path, data)
    noise = estimate_noise(cube)
    strong = truth > 0.5  # S/N > 5 per channel in the truth
    pure = _cube(tmp_path / "n", _line_cube(np.random.default_rng(10), ny=30, nx=30, amp=0.0))
    pure_noise = estimate_noise(pure)
    for method in ("threshold", "smooth"):
        m = make_mask(cube, noise=noise, method=method)
        full = m.block(slice(0, 30), np.asarray(cube.data, dtype=float), noise.sigma)
        assert full[strong].mean() > 0.8, method  # finds the source
        m0 = make_mask(pure, noise=pure_noise, method=method)
        fp = m0.block(slice(0, 30), np.asarray(pure.data, dtype=float), pure_noise.sigma).mean()
        # plain 3-sigma threshold: one-sided Gaussian tail, 0.135 % false positives
        # (scipy.stats.norm.sf(3)), raised somewhat because each pixel's noise estimate
        # (~120 channels) scatters by ~8 % and the tail is steep; smooth-and-mask keeps
        # no noise islands at all
        if method == "threshold":
            assert stats.norm.sf(3) < fp < 2 * stats.norm.sf(3)
        else:
            assert fp == 0.0
    with pytest.raises(KinemapError, match="mask method"):
        make_mask(cube, noise=noise, method="magic")


def _scipy_smooth_mask(data, sigma_map, factor, sig, nbox, seed, grow, min_pixels,
                       min_channels):
    """Smooth-and-mask written with scipy.ndimage on the whole cube (the reference:
    gaussian_filter, uniform_filter1d, binary_propagation, label, find_objects)."""
    from scipy import ndimage

    finite = np.isfinite(data)
    filled = np.where(finite, data, 0.0).astype(np.float32)
    sm = ndimage.gaussian_filter(filled, sigma=(0, sig, sig), mode="constant")
    if nbox > 1:
        sm = ndimage.uniform_filter1d(sm, size=nbox, axis=0, mode="constant")
    with np.errstate(invalid="ignore", divide="ignore"):
        snr = sm / (sigma_map[None] * factor)
    grown = ndimage.binary_propagation(snr > seed, mask=snr > grow)
    labels, n = ndimage.label(grown)
    keep = np.zeros(n + 1, bool)
    for k, sl in enumerate(ndimage.find_objects(labels), start=1):
        sub = labels[sl] == k
        keep[k] = sub.any(axis=0).sum() >= min_pixels and sub.any(axis=(1, 2)).sum() >= min_channels
    return keep[labels] & finite


@pytest.mark.parametrize("beam, nbox", [(True, 3), (False, 4), (True, 1)])
def test_smooth_mask_matches_scipy_ndimage_in_small_blocks(tmp_path, beam, nbox):
    """Reference library: scipy.ndimage on the whole cube.  The block-wise mask (blocks of
    a few rows forced by a small --max-memory, so islands and the Gaussian cross block
    edges) is the same mask, on a cube with NaN edges, blank spectra inside the source,
    an even boxcar and no beam."""
    rng = np.random.default_rng(21)
    nchan, ny, nx = 60, 45, 38
    v = -200.0 + 4.0 * np.arange(nchan)
    yy, xx = np.mgrid[:ny, :nx]
    blob = np.exp(-0.5 * (((yy - 20) ** 2 + (xx - 17) ** 2) / 5.0 ** 2))
    vel = 3.0 * (xx - 17)
    data = (0.5 * blob[None] * np.exp(-0.5 * ((v[:, None, None] - vel) / 15.0) ** 2)
            + rng.normal(0.0, 0.1, (nchan, ny, nx)))
    data[:, :3, :] = np.nan           # NaN edge
    data[:, :, -2:] = np.nan
    data[:, 20, 15:19] = np.nan        # blank spectra inside the source
    data[10:13, 30, 30] = np.nan       # blank channels
    extra = {"BMAJ": 6e-3, "BMIN": 4e-3, "BPA": 0.0} if beam else {}
    cube = _cube(tmp_path, data, extra=extra)
    noise = estimate_noise(cube)
    small = 7 * nchan * ny * nx + 16 * nchan * nx * 8   # the whole-cube bytes + ~10 rows
    m = make_mask(cube, noise=noise, method="smooth", smooth_channels=nbox, max_memory=small)
    s = m.settings
    sigma = np.where(np.isfinite(noise.sigma), noise.sigma, np.nanmedian(noise.sigma))
    ref = _scipy_smooth_mask(np.asarray(cube.data, dtype=np.float32), sigma,
                             s["smoothed_noise_factor"], s["smooth_fwhm_pixels"] / 2.354820045,
                             nbox, s["threshold"], s["grow_threshold"], s["min_pixels"],
                             s["min_channels"])
    assert ref.sum() > 500                       # the source is found ...
    np.testing.assert_array_equal(m.mask, ref)   # ... and it is the same mask


def test_smooth_mask_of_the_real_cube_matches_scipy_ndimage(real_cube_path):
    """Open data (the 13CO cube in ../shared/data) against the reference library: the
    block-wise smooth mask is scipy.ndimage's whole-cube smooth-and-mask, voxel for voxel."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cube = read_cube(real_cube_path)
    noise = estimate_noise(cube)
    m = make_mask(cube, noise=noise, method="smooth")
    s = m.settings
    sigma = np.where(np.isfinite(noise.sigma), noise.sigma, np.nanmedian(noise.sigma))
    ref = _scipy_smooth_mask(np.asarray(cube.data, dtype=np.float32), sigma,
                             s["smoothed_noise_factor"], s["smooth_fwhm_pixels"] / 2.354820045,
                             s["smooth_channels"], s["threshold"], s["grow_threshold"],
                             s["min_pixels"], s["min_channels"])
    assert ref.sum() > 100000
    np.testing.assert_array_equal(m.mask, ref)
