"""The user's own mask (--mask-file / make_mask(file=...)): combined with the signal mask or
replacing it, matched to the cube's grid by WCS, refused clearly when it does not fit."""
import hashlib
import warnings

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits
from astropy.wcs import WCS

from conftest import make_header, run_cli, write_cube
from kinemap.errors import KinemapError
from kinemap.io.reader import read_cube
from kinemap.maps.masks import make_mask
from kinemap.maps.moments import compute_moments
from kinemap.maps.noise import estimate_noise


def _read(path, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return read_cube(path, **kw)


def _sc_moment0(path, mask):
    """Reference: spectral-cube's moment0 of the same cube under the same boolean mask."""
    from spectral_cube import SpectralCube

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        sc = SpectralCube.read(path).with_spectral_unit(u.km / u.s).with_mask(mask)
        return sc.moment0().value, sc.moment1().value


def _sky_mask_file(path, cube_path, keep2d):
    """A 2D mask with the cube's celestial WCS."""
    h = WCS(fits.getheader(cube_path)).celestial.to_header()
    fits.writeto(path, keep2d.astype(np.uint8), h, overwrite=True)
    return str(path)


def _disk_mask(ny, nx, r):
    y, x = np.mgrid[:ny, :nx]
    return (x - nx / 2) ** 2 + (y - ny / 2) ** 2 < r ** 2


def test_replace_equals_spectral_cube_with_the_same_mask(real_cube_path, tmp_path):
    cube = _read(real_cube_path)
    ny, nx = cube.shape[1:]
    keep = _disk_mask(ny, nx, min(ny, nx) / 3)
    mpath = _sky_mask_file(tmp_path / "m.fits", real_cube_path, keep)
    m = compute_moments(cube, mask=make_mask(cube, file=mpath, mode="replace"),
                        noise=estimate_noise(cube))
    # Reference library: spectral-cube moments under the same (broadcast) mask.
    ref0, ref1 = _sc_moment0(real_cube_path, np.broadcast_to(keep[None], cube.shape))
    np.testing.assert_allclose(m.moment0.value[keep], ref0[keep], rtol=1e-5)
    ok = keep & np.isfinite(ref1)
    np.testing.assert_allclose(m.moment1.value[ok], ref1[ok], rtol=1e-5)
    assert np.all(np.isnan(m.moment0.value[~keep]))
    # compute_moments accepts the file itself (it replaces the signal mask)
    direct = compute_moments(cube, mask=mpath, noise=estimate_noise(cube))
    np.testing.assert_array_equal(direct.moment0.value[keep], m.moment0.value[keep])


def test_and_with_threshold_equals_spectral_cube(real_cube_path, tmp_path):
    cube = _read(real_cube_path)
    noise = estimate_noise(cube)
    ny, nx = cube.shape[1:]
    keep = _disk_mask(ny, nx, min(ny, nx) / 2.5)
    mpath = _sky_mask_file(tmp_path / "m.fits", real_cube_path, keep)
    mask = make_mask(cube, noise=noise, method="threshold", file=mpath, mode="and")
    m = compute_moments(cube, mask=mask, noise=noise)
    data = np.asarray(cube.data, dtype=float)
    with np.errstate(invalid="ignore"):
        both = np.isfinite(data) & (data > 3.0 * noise.sigma[None]) & keep[None]
    assert 0.01 < both.mean() < 0.5  # a real mask: some voxels, not all
    ref0, ref1 = _sc_moment0(real_cube_path, both)  # reference library: spectral-cube
    ok = np.isfinite(ref1) & (m.nchan.value > 1)
    np.testing.assert_allclose(m.moment0.value[ok], ref0[ok], rtol=1e-5)
    np.testing.assert_allclose(m.moment1.value[ok], ref1[ok], rtol=1e-5)
    # the same numbers through the fused noise-and-moments pass
    from kinemap.maps.moments import noise_and_moments

    _, fused = noise_and_moments(cube, mask=mask)
    np.testing.assert_allclose(fused.moment0.value[ok], ref0[ok], rtol=1e-5)
    # the smooth mask AND the file: nothing outside the file's pixels
    smooth = compute_moments(cube, mask=make_mask(cube, noise=noise, file=mpath), noise=noise)
    assert np.all(np.isnan(smooth.moment0.value[~keep]))
    assert np.isfinite(smooth.moment0.value[keep]).any()


def _small(tmp_path):
    beam = {"BMAJ": 6e-3, "BMIN": 6e-3, "BPA": 0.0}
    h = make_header("VRAD", nchan=20, ny=12, nx=10, crval=-10e3, cdelt=1e3, cunit="m/s",
                    extra=beam)
    rng = np.random.default_rng(3)
    data = rng.normal(0, 1, (20, 12, 10))
    data[8:12] += 10.0
    return write_cube(tmp_path / "c.fits", data, h), h


def test_whole_cube_mask_follows_a_box_and_a_velocity_window(tmp_path):
    path, h = _small(tmp_path)
    keep3 = np.zeros((20, 12, 10), bool)
    keep3[9:11, 2:9, 1:7] = True
    h3 = WCS(h).to_header()
    fits.writeto(tmp_path / "m3.fits", keep3.astype(np.int16), h3)
    full = _read(path)
    cut = _read(path, box="2:8,3:10", vrange=(-4, 8))  # x 2:8, y 3:10; channels by velocity
    m_full = compute_moments(full, mask=str(tmp_path / "m3.fits"))
    m_cut = compute_moments(cut, mask=str(tmp_path / "m3.fits"))
    # the cut cube's maps are the matching part of the whole cube's (same voxels kept)
    np.testing.assert_allclose(m_cut.moment0.value, m_full.moment0.value[3:10, 2:8],
                               rtol=1e-6, equal_nan=True)


@pytest.mark.parametrize("how, message", [
    ("half_pixel", "not on the cube's sky grid"),
    ("small", "does not cover the cube"),
    ("zeros", "keeps no pixel"),
    ("shape", "no sky coordinates and shape"),
    ("text", "not a readable FITS file"),
])
def test_bad_masks_are_refused_with_one_clear_line(tmp_path, how, message):
    path, h = _small(tmp_path)
    cube = _read(path)
    w = WCS(h).celestial
    m = tmp_path / "m.fits"
    if how == "half_pixel":
        w.wcs.crpix = [w.wcs.crpix[0] + 0.5, w.wcs.crpix[1]]
        fits.writeto(m, np.ones((12, 10), np.uint8), w.to_header())
    elif how == "small":
        fits.writeto(m, np.ones((5, 10), np.uint8), w.to_header())
    elif how == "zeros":
        fits.writeto(m, np.zeros((12, 10), np.uint8), w.to_header())
    elif how == "shape":
        fits.writeto(m, np.ones((7, 7), np.uint8))
    else:
        m.write_text("not a FITS file")
    with pytest.raises(KinemapError, match=message):
        make_mask(cube, method="none", file=str(m))


def test_cli_mask_file_and_mode(tmp_path):
    path, h = _small(tmp_path)
    keep = np.zeros((12, 10), bool)
    keep[2:9, 1:7] = True
    mpath = tmp_path / "m.fits"
    fits.writeto(mpath, keep.astype(np.uint8), WCS(h).celestial.to_header())
    before = hashlib.sha256(mpath.read_bytes()).hexdigest()
    out = tmp_path / "out"
    code, _, err = run_cli("maps", path, "--mask", "threshold", "--mask-file", str(mpath),
                           "--out", str(out), "--no-plots", "--no-progress", "--continuum", "none")
    assert code == 0, err
    m0 = fits.getdata(out / "moment0.fits")
    assert np.all(np.isnan(m0[~keep])) and np.isfinite(m0[keep]).all()
    history = "".join(str(x) for x in fits.getheader(out / "mask.fits")["HISTORY"])
    assert "threshold and m.fits" in history  # the mask's provenance names the file
    assert hashlib.sha256(mpath.read_bytes()).hexdigest() == before  # input untouched
    # a wrong grid: one line, exit 2, nothing written
    bad = tmp_path / "bad.fits"
    fits.writeto(bad, np.ones((3, 3), np.uint8))
    code, out2, err = run_cli("maps", path, "--mask-file", str(bad), "--mask-mode", "replace",
                              "--out", str(tmp_path / "out2"), "--no-progress")
    assert code == 2
    assert err.startswith("kinemap: error: the mask") and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "out2").exists()


def test_mask_file_with_a_velocity_map_input_is_refused():
    from kinemap.pipeline.config import validate_config

    with pytest.raises(KinemapError, match="--mask-file masks a cube, and the input is a "
                                           "velocity map"):
        validate_config({"input": {"velocity_map": "v.fits"}, "rings": {},
                         "mask": {"file": "m.fits"}})
