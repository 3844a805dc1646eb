"""`extract_spectrum` and `kinemap spectrum`: against spectral-cube, a point source of known
flux, the scatter of beam-correlated noise, and bad input."""
import json

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table
from scipy.signal import fftconvolve

from conftest import make_header, run_cli, write_cube
from kinemap import KinemapError, extract_spectrum, read_cube

PIX_DEG = 2e-3  # 7.2 arcsec pixels (make_header)
FWHM = 2 * np.sqrt(2 * np.log(2))


def _beam_image(ny, nx, x0, y0, major_pix, minor_pix):
    """A peak-1 Gaussian beam centred on pixel (x0, y0), major axis north-south (BPA 0)."""
    yy, xx = np.indices((ny, nx), dtype=float)
    return np.exp(-0.5 * (((yy - y0) / (major_pix / FWHM)) ** 2
                          + ((xx - x0) / (minor_pix / FWHM)) ** 2))


def _jy_cube(tmp_path, data, *, major_pix=5.0, minor_pix=3.0, name="cube.fits"):
    nchan, ny, nx = data.shape
    h = make_header("VRAD", nchan=nchan, ny=ny, nx=nx, crval=-60e3, cdelt=2e3, cunit="m/s",
                    extra={"BUNIT": "Jy/beam", "BMAJ": major_pix * PIX_DEG,
                           "BMIN": minor_pix * PIX_DEG, "BPA": 0.0})
    return write_cube(tmp_path / name, data, h)


def test_point_source_gives_its_flux(tmp_path):
    """A point source of S Jy in a Jy/beam map peaks at S Jy/beam with the beam's shape, so
    the sum over the source divided by the beam area in pixels is S (common practice)."""
    nchan, ny, nx = 60, 48, 48
    v = -60 + 2 * np.arange(nchan)
    s_true = 0.75 * np.exp(-0.5 * ((v - 4.0) / 9.0) ** 2)  # Jy
    beam = _beam_image(ny, nx, 23.0, 25.0, 5.0, 3.0)
    rng = np.random.default_rng(5)
    data = s_true[:, None, None] * beam[None] + rng.normal(0, 2e-3, (nchan, ny, nx))
    cube = read_cube(_jy_cube(tmp_path, data))
    at = cube.meta.wcs.pixel_to_world(23.0, 25.0)
    res = extract_spectrum(cube, at=at, radius=60 * u.arcsec)  # > 4 beam sigma
    flux = res.table["flux"].to_value(u.Jy)
    err = res.table["flux_err"].to_value(u.Jy)
    assert res.mode == "sum" and res.table["flux"].unit == u.Jy
    assert np.all(np.abs(flux - s_true) < 4 * err)
    fit = res.fit
    assert fit["status"] == "ok"
    assert abs(fit["amplitude"] - 0.75) < 3 * fit["amplitude_err"]
    assert abs(fit["centre"] - 4.0) < 3 * fit["centre_err"]
    assert abs(fit["dispersion"] - 9.0) < 3 * fit["dispersion_err"]
    # integral of a Gaussian: a sigma sqrt(2 pi) (exact)
    assert fit["integrated"] == pytest.approx(0.75 * 9.0 * np.sqrt(2 * np.pi), rel=0.03)
    assert res.moments["centroid"] == pytest.approx(4.0, abs=3 * res.moments["centroid_err"])


def test_global_profile_equals_spectral_cube_sum(tmp_path):
    """The global profile of a Jy/beam cube is spectral-cube's sum over the same pixels
    (reference library) divided by the beam solid angle in pixels from radio-beam
    (reference library) and the WCS pixel area."""
    from radio_beam import Beam
    from spectral_cube import SpectralCube

    rng = np.random.default_rng(2)
    data = rng.normal(0.01, 0.02, (20, 16, 18))
    data[3, 4, 5] = np.nan
    path = _jy_cube(tmp_path, data)
    res = extract_spectrum(read_cube(path))
    sc = SpectralCube.read(path)
    ref = sc.sum(axis=(1, 2)).value  # spectral-cube skips NaN
    beam = Beam(major=5 * PIX_DEG * u.deg, minor=3 * PIX_DEG * u.deg, pa=0 * u.deg)
    pix_sr = (PIX_DEG * u.deg) ** 2
    npix_beam = (beam.sr / pix_sr).decompose().value
    np.testing.assert_allclose(res.table["flux"].to_value(u.Jy), ref / npix_beam, rtol=1e-5)
    assert res.table["n_pixels"][3] == 16 * 18 - 1


def test_a_brightness_cube_is_averaged(tmp_path):
    """K cubes: the mean over the aperture, as numpy's nanmean of the same pixels."""
    rng = np.random.default_rng(3)
    data = rng.normal(1.0, 0.1, (24, 10, 12))
    h = make_header("VRAD", nchan=24, ny=10, nx=12, crval=-20e3, cdelt=1e3, cunit="m/s")
    res = extract_spectrum(read_cube(write_cube(tmp_path / "k.fits", data, h)))
    assert res.mode == "mean" and res.table["flux"].unit == u.K
    np.testing.assert_allclose(res.table["flux"].value,
                               np.nanmean(data.astype(np.float32), axis=(1, 2)), rtol=1e-5)
    assert "mean" in res.table.meta["flux"]


def test_errors_match_the_scatter_of_beam_correlated_noise(tmp_path):
    """Noise whose correlation is the beam (white noise smoothed by a Gaussian of sigma
    beam/sqrt(2), whose autocorrelation is then the beam: exact for Gaussians) is summed
    over a circle; the quoted error must equal the scatter of the summed noise over
    channels to within its sampling error (400 channels: ~3.5 %)."""
    nchan, ny, nx = 400, 40, 40
    major = minor = 4.0  # pixels FWHM
    rng = np.random.default_rng(11)
    s = major / FWHM / np.sqrt(2)
    k = np.arange(-12, 13)
    g = np.exp(-0.5 * (k / s) ** 2)
    kern = g[:, None] * g[None, :]
    white = rng.normal(0, 1, (nchan, ny + 24, nx + 24))
    data = fftconvolve(white, kern[None], mode="same", axes=(1, 2))[:, 12:-12, 12:-12]
    data /= data.std()
    cube = read_cube(_jy_cube(tmp_path, data, major_pix=major, minor_pix=minor))
    at = cube.meta.wcs.pixel_to_world(20, 20)
    res = extract_spectrum(cube, at=at, radius=5 * 7.2 * u.arcsec)
    scatter = np.std(res.table["flux"].value)
    quoted = res.table["flux_err"].value[0]
    assert quoted == pytest.approx(scatter, rel=0.12)
    # taking the pixels as independent would be far off: the correlation matters here
    naive = np.sqrt(res.pixels.sum()) * 1.0 / (np.pi / (4 * np.log(2)) * major * minor)
    assert abs(naive - scatter) / scatter > 0.5


def test_region_file_with_exclusion(tmp_path):
    """--region sums the pixels inside the include circle minus the excluded one (DS9
    `-circle`, written by hand as the regions package writes no DS9 exclusions)."""
    rng = np.random.default_rng(4)
    data = rng.normal(1.0, 0.05, (20, 30, 30))
    h = make_header("VRAD", nchan=20, ny=30, nx=30, crval=-20e3, cdelt=2e3, cunit="m/s")
    path = write_cube(tmp_path / "k.fits", data, h)
    cube = read_cube(path)
    c = cube.meta.wcs.pixel_to_world(15, 15)
    (tmp_path / "r.reg").write_text(f"# Region file format: DS9\nicrs\n"
                                    f"circle({c.ra.deg},{c.dec.deg},60\")\n"
                                    f"-circle({c.ra.deg},{c.dec.deg},20\")\n")
    res = extract_spectrum(cube, region=str(tmp_path / "r.reg"))
    assert not res.pixels[15, 15] and res.pixels[15, 22]
    full = extract_spectrum(cube, at=c, radius=60 * u.arcsec)
    assert res.pixels.sum() < full.pixels.sum()
    code, out, err = run_cli("spectrum", path, "--region", str(tmp_path / "r.reg"),
                             "--out", str(tmp_path / "o"), "--no-progress")
    assert code == 0, err
    t = Table.read(tmp_path / "o" / "spectrum.ecsv")
    assert t.meta["n_pixels"] == int(res.pixels.sum())


def test_command_writes_table_png_and_manifest(tmp_path):
    rng = np.random.default_rng(6)
    v = -60 + 2 * np.arange(60)
    beam = _beam_image(20, 20, 10, 10, 5, 3)
    data = (0.5 * np.exp(-0.5 * ((v - 0) / 8.0) ** 2))[:, None, None] * beam + \
        rng.normal(0, 1e-3, (60, 20, 20))
    path = _jy_cube(tmp_path, data)
    out = tmp_path / "o"
    code, stdout, err = run_cli("spectrum", path, "--at", "150.0,20.0", "--radius", "40",
                                "--out", str(out), "--no-progress")
    assert code == 0, err
    assert "integral" in stdout
    t = Table.read(out / "spectrum.ecsv")
    assert t.colnames[:3] == ["velocity", "flux", "flux_err"]
    assert str(t["velocity"].unit) == "km / s" and str(t["flux"].unit) == "Jy"
    assert t.meta["gaussian_fit"]["status"] == "ok" and "beam area" in t.meta["flux"]
    assert (out / "spectrum.png").exists()
    manifest = json.loads((out / "manifest.json").read_text())
    assert "spectrum" in manifest["products"] and "moment0" not in manifest["products"]


@pytest.mark.parametrize("args, match", [
    ([], "give one of --at"),
    (["--global", "--at", "150,20"], "not --at and --global"),
    (["--at", "151.5,20"], "lies off the map"),
    (["--at", "nowhere"], "'at' must be 'RA,DEC'"),
    (["--radius", "10", "--global"], "--radius needs --at"),
])
def test_bad_input_is_one_line(tmp_path, args, match):
    rng = np.random.default_rng(1)
    path = _jy_cube(tmp_path, rng.normal(0, 1, (12, 10, 10)))
    out = tmp_path / "o"
    code, stdout, err = run_cli("spectrum", path, *args, "--out", str(out), "--no-progress")
    assert code == 2
    assert match in err and err.count("\n") == 1 and "Traceback" not in err
    assert not out.exists()


def test_jy_per_beam_without_a_beam_is_refused(tmp_path):
    h = make_header("VRAD", nchan=12, ny=8, nx=8, crval=0.0, cdelt=1e3, cunit="m/s",
                    extra={"BUNIT": "Jy/beam"})
    cube = read_cube(write_cube(tmp_path / "c.fits", np.ones((12, 8, 8)), h))
    with pytest.raises(KinemapError, match="no beam.*--beam"):
        extract_spectrum(cube)


def test_real_cube_global_profile(real_cube_path, tmp_path):
    """The real cube (no BUNIT, a brightness cube): the global profile is the mean, equal to spectral-cube's
    mean over the same pixels (reference library)."""
    from spectral_cube import SpectralCube

    res = extract_spectrum(read_cube(real_cube_path))
    sc = SpectralCube.read(real_cube_path)
    ref = sc.mean(axis=(1, 2)).value
    np.testing.assert_allclose(res.table["flux"].value, ref, rtol=1e-4, atol=1e-6)
    assert res.fit["status"] == "ok"


def test_a_config_with_only_spectrum_makes_no_maps(tmp_path):
    """kinemap.run with [spectrum]: the spectrum and its figure, no moment maps or mask."""
    import kinemap

    rng = np.random.default_rng(9)
    path = _jy_cube(tmp_path, rng.normal(0, 1e-3, (30, 12, 12)))
    state = kinemap.run({"input": {"cube": path}, "spectrum": {"global": True},
                         "output": {"dir": str(tmp_path / "o")}}, progress=False)
    assert set(state.results) == {"continuum", "spectrum"}
    assert sorted(p.name for p in (tmp_path / "o").iterdir()) == [
        "manifest.json", "spectrum.ecsv", "spectrum.png"]
