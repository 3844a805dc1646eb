"""The fused noise-and-moments pass against the separate passes it replaces.

Reference: :func:`estimate_noise` followed by :func:`compute_moments` with that noise (the
two-pass path, itself checked against spectral-cube in test_moments.py).  The fused pass
must give the same numbers bit for bit: it runs the same per-spectrum code, only reads
each block once, swaps big-endian bytes while loading and reads the next block ahead.
"""
import warnings

import numpy as np
import pytest
from astropy.io import fits

from conftest import gaussian_cube, make_header, write_cube
from kinemap.errors import KinemapError, NoiseWarning
from kinemap.io.reader import read_cube
from kinemap.maps.masks import make_mask
from kinemap.maps.moments import _KEYS, compute_moments, noise_and_moments
from kinemap.maps.noise import estimate_noise
from kinemap.parallel.store import on_disk

NCHAN, NY, NX = 64, 13, 10  # 130 spectra: two tiles of 128, the last partly filled


def _data(seed=3):
    rng = np.random.default_rng(seed)
    centre = 20 + 20 * rng.random((NY, NX))
    data = gaussian_cube(NCHAN, NY, NX, centre_chan=centre, sigma_chan=3.0, amp=2.0,
                         noise=0.3, seed=seed).astype(np.float32)
    data[5:9, 2, 3] = np.nan       # a few blank channels
    data[:, 4, 4] = np.nan         # a blank spectrum
    data[:, 7, 1] = 1.5            # a constant one (no noise to measure)
    return data


def _assert_same(a, b):
    assert np.array_equal(a, b, equal_nan=True), np.nanmax(np.abs(a - b))


def _two_passes(cube, mask, line_free, response):
    noise = estimate_noise(cube, line_free=line_free, channel_response=response)
    return noise, compute_moments(cube, mask=mask, noise=noise, channel_response=response)


@pytest.mark.parametrize("response", ["tophat", "hanning"])
@pytest.mark.parametrize("mask_kind", ["none", "threshold", "given"])
@pytest.mark.parametrize("line_free", ["auto", [(-1e9, -2e8)]])
def test_fused_equals_two_passes(tmp_path, response, mask_kind, line_free):
    h = make_header("VRAD", nchan=NCHAN, ny=NY, nx=NX, crval=-80.0e3, cdelt=2.5e3, cunit="m/s")
    data = _data()
    cube = read_cube(write_cube(tmp_path / "c.fits", data, h))
    if line_free != "auto":
        line_free = [(-80.0, -30.0)]  # km/s: the first 21 channels, before the lines
    mask = {"none": None, "threshold": make_mask(cube, method="threshold", threshold=3.0),
            "given": np.asarray(data > 0.5)}[mask_kind]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", NoiseWarning)
        noise, maps = _two_passes(cube, mask, line_free, response)
        fnoise, fmaps = noise_and_moments(cube, mask=mask, line_free=line_free,
                                          channel_response=response)
    _assert_same(noise.sigma, fnoise.sigma)
    assert np.array_equal(noise.nchan_used, fnoise.nchan_used)
    assert noise.method == fnoise.method
    for k in _KEYS + ("noise", "mask"):
        _assert_same(maps.arrays[k], fmaps.arrays[k])
    assert fmaps.settings == maps.settings


def test_swapped_and_native_reads_and_read_ahead_agree(tmp_path, monkeypatch):
    # The file holds big-endian floats (kernel swaps them); the HDU in memory is native;
    # a tiny max_memory cuts many blocks, so the read-ahead thread is exercised, and puts
    # the maps on disk (kinemap.parallel.store).
    h = make_header("VRAD", nchan=NCHAN, ny=NY, nx=NX, crval=-80.0e3, cdelt=2.5e3, cunit="m/s")
    data = _data(seed=5)
    from_file = read_cube(write_cube(tmp_path / "c.fits", data, h))
    assert from_file.source is not None
    from kinemap.maps import moments

    seen = []
    swapped = moments.fused_kernel_swapped
    monkeypatch.setattr(moments, "fused_kernel_swapped",
                        lambda *a: (seen.append(a[0].dtype), swapped(*a)))
    in_memory = read_cube(fits.PrimaryHDU(data=data.astype("=f4"), header=h))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", NoiseWarning)
        a = noise_and_moments(from_file)
        b = noise_and_moments(in_memory)
        c = noise_and_moments(from_file, max_memory=NCHAN * NX * 8 * 3)  # 2 rows a block
    assert seen and set(seen) == {np.dtype(np.uint32)}  # the file's blocks took the swap path
    n_file_blocks = len(seen)
    assert n_file_blocks >= 1 + -(-NY // 2)  # one block, then blocks of at most 2 rows
    # maps larger than a share of that bound were kept on disk, with the same values
    assert on_disk(c[1].arrays["moment0"]) and on_disk(c[0].sigma)
    assert not on_disk(a[1].arrays["moment0"])
    for n, m in (b, c):
        _assert_same(a[0].sigma, n.sigma)
        for k in _KEYS:
            _assert_same(a[1].arrays[k], m.arrays[k])


def test_compute_moments_without_noise_is_one_fused_pass(tmp_path):
    h = make_header("VRAD", nchan=NCHAN, ny=NY, nx=NX, crval=-80.0e3, cdelt=2.5e3, cunit="m/s")
    cube = read_cube(write_cube(tmp_path / "c.fits", _data(), h))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", NoiseWarning)
        noise, maps = _two_passes(cube, None, "auto", "tophat")
        alone = compute_moments(cube)
    for k in _KEYS + ("noise",):
        _assert_same(maps.arrays[k], alone.arrays[k])


def test_nothing_to_measure_refused_or_nan_errors(tmp_path):
    h = make_header("VRAD", nchan=NCHAN, ny=NY, nx=NX, crval=-80.0e3, cdelt=2.5e3, cunit="m/s")
    flat = np.ones((NCHAN, NY, NX), np.float32)  # a noiseless model: no noise anywhere
    cube = read_cube(write_cube(tmp_path / "c.fits", flat, h))
    with pytest.raises(KinemapError, match="noise could not be estimated"):
        noise_and_moments(cube)
    with pytest.warns(NoiseWarning, match="moment errors are NaN"):
        maps = compute_moments(cube)
    assert maps.arrays["noise"] is None
    assert np.isnan(maps.arrays["moment0_err"]).all()
    np.testing.assert_allclose(maps.arrays["moment0"], NCHAN * 2.5)
