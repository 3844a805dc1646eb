"""The public Python API: every input kind, Projections out, results that write themselves.

Outside references: the real 13CO cube in ../shared/data and spectral-cube's moment0 /
moment1 on it (reference library); the cube's beam of about 46 arcsec is the FCRAO 14 m
beam quoted in the data README (from memory).
"""
from __future__ import annotations

import gc
import json
import warnings

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits
from astropy.wcs import WCS

import kinemap
from kinemap.errors import BeamWarning, KinemapError

KMS = u.km / u.s


def _quiet_read(source, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return kinemap.read_cube(source, **kw)


def _spectral_cube(path):
    from spectral_cube import SpectralCube

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return SpectralCube.read(path)


@pytest.fixture(scope="module")
def real_inputs(request):
    from conftest import REAL_CUBE

    if not REAL_CUBE.exists():
        pytest.skip(f"real cube not found at {REAL_CUBE}")
    path = str(REAL_CUBE)
    hdul = fits.open(path)
    request.addfinalizer(hdul.close)
    data, header = hdul[0].data.copy(), hdul[0].header.copy()
    return {"path": path, "hdu": hdul[0], "hdulist": hdul, "spectral_cube": _spectral_cube(path),
            "array+header": (data, header), "array+wcs": (data, WCS(header))}


@pytest.mark.parametrize("kind", ["path", "hdu", "hdulist", "spectral_cube", "array+header",
                                  "array+wcs"])
def test_every_input_kind_gives_the_same_moments(real_inputs, kind):
    """A path, HDU, HDUList, SpectralCube and (array, header/WCS) give equal maps, equal to
    spectral-cube's own moments of the same cube (reference library)."""
    cube = _quiet_read(real_inputs[kind])
    assert cube.shape == (53, 105, 105)
    noise = kinemap.estimate_noise(cube)
    m = kinemap.compute_moments(cube, noise=noise)
    sc = real_inputs["spectral_cube"].with_spectral_unit(KMS)
    ref0 = sc.moment0().to_value(KMS)
    ref1 = sc.moment1().to_value(KMS)
    np.testing.assert_allclose(m.moment0.value, ref0, rtol=1e-6)
    ok = np.isfinite(ref1)
    np.testing.assert_allclose(m.moment1.to_value(KMS)[ok], ref1[ok], rtol=1e-6)
    assert np.isfinite(m.moment0_err.value).mean() > 0.99


def test_maps_are_projections_with_unit_wcs_and_beam(real_inputs):
    from spectral_cube import Projection

    cube = _quiet_read(real_inputs["path"], beam="46arcsec", bunit="K")
    m = kinemap.compute_moments(cube)
    for key in ("moment0", "moment1", "moment2_err", "peak", "nchan", "mask"):
        assert isinstance(getattr(m, key), Projection), key
    assert m.moment1.unit == KMS
    assert m.moment0.unit == u.K * KMS
    assert m.moment1.wcs.wcs.ctype[0].startswith("RA")
    assert m.moment1.beam.major.to_value(u.arcsec) == pytest.approx(46.0)
    assert set(m.keys) >= {"moment0", "moment1", "moment2", "noise", "mask"}
    with pytest.raises(AttributeError, match="no attribute or product 'moment3'"):
        m.moment3


def test_beam_given_is_recorded_in_every_product(real_inputs, tmp_path):
    cube = _quiet_read(real_inputs["path"], beam="46arcsec,40arcsec,30deg")
    assert cube.meta.beam.major.to_value(u.arcsec) == pytest.approx(46.0)
    assert cube.meta.beam.minor.to_value(u.arcsec) == pytest.approx(40.0)
    kinemap.compute_moments(cube).write(tmp_path / "out", plots=False)
    for f in ("moment0.fits", "moment1.fits", "mask.fits"):
        h = fits.getheader(tmp_path / "out" / f)
        assert h["BMAJ"] * 3600 == pytest.approx(46.0) and h["BPA"] == pytest.approx(30.0)
    with pytest.raises(KinemapError, match="'beam' must look like"):
        _quiet_read(real_inputs["path"], beam="46 parsecs")


def test_boolean_masks_equal_a_signal_mask(real_inputs):
    cube = _quiet_read(real_inputs["path"])
    noise = kinemap.estimate_noise(cube)
    mask = kinemap.make_mask(cube, noise=noise)
    ref = kinemap.compute_moments(cube, mask=mask, noise=noise)
    voxels = kinemap.compute_moments(cube, mask=np.asarray(mask.mask), noise=noise)
    np.testing.assert_array_equal(voxels.arrays["moment0"], ref.arrays["moment0"])
    spectra = mask.mask.any(axis=0)
    by_pixel = kinemap.compute_moments(cube, mask=spectra, noise=noise)
    keep = spectra
    assert np.isnan(by_pixel.arrays["moment0"][~keep]).all()
    with pytest.raises(KinemapError, match="'mask' has shape"):
        kinemap.compute_moments(cube, mask=np.ones((3, 3), bool))


def test_result_write_matches_the_command(real_inputs, tmp_path):
    """write() produces the files and manifest keys the command produces for the same run."""
    from conftest import run_cli

    cube = _quiet_read(real_inputs["path"])
    m = kinemap.compute_moments(cube, mask=kinemap.make_mask(cube, method="threshold"))
    manifest = m.write(tmp_path / "api")
    code, _, err = run_cli("maps", real_inputs["path"], "--mask", "threshold",
                           "--out", str(tmp_path / "cli"), "--no-progress")
    assert code == 0, err
    cli = json.loads((tmp_path / "cli" / "manifest.json").read_text())
    assert set(manifest["products"]) == set(cli["products"])
    np.testing.assert_allclose(fits.getdata(tmp_path / "api" / "moment1.fits"),
                               fits.getdata(tmp_path / "cli" / "moment1.fits"), equal_nan=True)
    assert (tmp_path / "api" / "moment1.png").exists()
    assert manifest["versions"]["numpy"] == np.__version__
    assert cli["command_line"].startswith("kinemap maps ")
    with pytest.raises(KinemapError, match="not empty"):
        m.write(tmp_path / "api")


def test_read_cube_closes_its_file(real_inputs):
    with warnings.catch_warnings():
        warnings.simplefilter("error", ResourceWarning)
        warnings.filterwarnings("ignore", category=kinemap.KinemapWarning)
        cube = kinemap.read_cube(real_inputs["path"])
        kinemap.compute_moments(cube)
        del cube
        gc.collect()


def test_bad_source_is_one_clear_error():
    with pytest.raises(KinemapError, match="'source' must be a FITS path"):
        kinemap.read_cube(42)
    with pytest.raises(KinemapError, match="give a cube of shape"):
        kinemap.read_cube((np.zeros((3, 3)), fits.Header()))


def test_fit_rings_takes_the_beam_from_the_map(tmp_path):
    """A velocity Projection that carries its beam needs no beam=; without one the fit
    warns.  Field: the Begeman (1989) tilted-ring formula, flat rotation curve."""
    from spectral_cube import Projection
    from radio_beam import Beam

    ny = nx = 81
    w = WCS(naxis=2)
    w.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    w.wcs.crval = [150.0, 20.0]
    w.wcs.crpix = [41.0, 41.0]
    w.wcs.cdelt = [-2.0 / 3600, 2.0 / 3600]
    yy, xx = np.mgrid[:ny, :nx].astype(float)
    pa, incl, vsys, vrot = np.deg2rad(40.0), np.deg2rad(60.0), 1000.0, 150.0
    east, north = -(xx - 40) * 2.0, (yy - 40) * 2.0  # arcsec, east to the left
    xd = east * np.sin(pa) + north * np.cos(pa)
    yd = (-east * np.cos(pa) + north * np.sin(pa)) / np.cos(incl)
    r = np.hypot(xd, yd)
    v = vsys + vrot * np.sin(incl) * xd / np.maximum(r, 1e-9)
    v[r > 70] = np.nan
    rng = np.random.default_rng(3)
    v += rng.normal(0, 2.0, v.shape)
    beam = Beam(8 * u.arcsec)
    proj = Projection(v, unit=KMS, wcs=w, beam=beam)
    fit = kinemap.fit_rings(proj, velocity_err=np.full(v.shape, 2.0), center="150,20")
    t = fit.table
    assert np.asarray(t["beam_smeared"]).any()
    good = np.asarray(t["status"]) == 0
    assert np.nanmedian(t["v_rot"][good].to_value(KMS)) == pytest.approx(vrot, abs=3.0)
    assert fit.velocity_model.unit == KMS and fit.velocity_model.beam is not None
    with pytest.warns(BeamWarning, match="no beam"):
        nobeam = kinemap.fit_rings(Projection(v, unit=KMS, wcs=w), center="150,20")
    assert not np.asarray(nobeam.table["beam_smeared"]).any()
    fit.write(tmp_path / "rings")
    assert (tmp_path / "rings" / "rotation_curve.ecsv").exists()
    assert (tmp_path / "rings" / "rotation_curve.png").exists()
