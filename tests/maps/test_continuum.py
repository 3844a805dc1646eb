"""The continuum stage: fit on line-free channels, subtract, decide by itself ('auto').

Checks against outside references: scipy's curve_fit with the same line + baseline model on
single spectra, the analytic integral of a Gaussian, and the real 13CO cube (which has no
continuum and must come through 'auto' unchanged).  Synthetic cubes are seeded.
"""
from __future__ import annotations

import json

import numpy as np
import pytest
from astropy.io import fits
from scipy.optimize import curve_fit

import kinemap
from conftest import (C_KMS, HALPHA_AIR, make_header, optical_cube,
                      run_cli)
from kinemap.errors import KinemapError
from kinemap.maps.continuum import line_window_range, parse_method, subtract_continuum

def test_parse_method():
    assert parse_method("auto") == ("auto", 1)
    assert parse_method("Linear") == ("linear", 1)
    assert parse_method("poly:3") == ("poly:3", 3)
    with pytest.raises(KinemapError, match="poly:N"):
        parse_method("poly:9")
    with pytest.raises(KinemapError, match="'continuum' must be"):
        parse_method("spline")


def test_continuum_level_matches_curve_fit_on_single_spectra(tmp_path):
    """Reference library: scipy.optimize.curve_fit with the same model (H-alpha Gaussian +
    straight line) on single spectra, restricted to the H-alpha region; its baseline at the
    line centre and kinemap's continuum level agree within their combined 1-sigma errors
    (times 3), and both lie near the truth."""
    path = tmp_path / "c.fits"
    lam, truth = optical_cube(path, ny=3, nx=3)
    cube = kinemap.read_cube(str(path), rest_value="Halpha")
    res = subtract_continuum(cube, method="linear")
    data = fits.getdata(path).astype(float)
    lam_ha = HALPHA_AIR * (1 + truth["v"] / C_KMS)
    near = np.abs(lam - HALPHA_AIR) < 10.0  # H-alpha only: the [N II] lines are > 14 A away

    def model(x, a, mu, s, b0, b1):
        return a * np.exp(-0.5 * ((x - mu) / s) ** 2) + b0 + b1 * (x - lam_ha)

    for y, x in ((0, 0), (1, 2), (2, 1)):
        p, cov = curve_fit(model, lam[near], data[near, y, x], p0=(8, lam_ha, 0.5, 5, 0))
        ref, ref_err = p[3], np.sqrt(cov[3, 3])
        ours, ours_err = res.level[y, x], res.level_err[y, x]
        assert abs(ours - ref) < 3 * np.hypot(ref_err, ours_err), (ours, ref)
        assert abs(ours - truth["level_at_halpha"]) < 4 * ours_err


def test_moment0_on_sloped_continuum_within_two_percent(tmp_path):
    """Moment 0 of H-alpha on a sloped continuum, after subtraction, is within 2 % of the
    analytic Gaussian integral A sqrt(2 pi) sigma; without subtraction it is far off (the
    check can fail).  High S/N so that noise is not the limit."""
    path = tmp_path / "c.fits"
    _, truth = optical_cube(path, noise=0.01, level=0.3, slope=0.1, amp=1.0)
    cube = kinemap.read_cube(str(path), rest_value="Halpha")
    res = subtract_continuum(cube)
    assert res.method == "linear" and "subtracted a linear fit" in res.message
    window = line_window_range(res.cube, "Halpha", centres=res.lines)
    assert window[0] < truth["v"] - 5 * truth["sigma"] and window[1] > truth["v"] + 5 * truth["sigma"]
    from kinemap.io.subset import select_channels

    for c, expect_ok in ((res.cube, True), (cube, False)):
        sub, _ = select_channels(c, window)
        m = kinemap.compute_moments(sub, mask=None)
        m0 = np.nanmedian(np.asarray(m.moment0.value))
        assert (abs(m0 / truth["flux"] - 1) < 0.02) == expect_ok, m0
    m = kinemap.compute_moments(select_channels(res.cube, window)[0], mask=None)
    assert abs(np.nanmedian(np.asarray(m.moment1.value)) - truth["v"]) < 1.0


def test_auto_leaves_a_continuum_free_cube_alone(tmp_path):
    """A frequency cube with a line and only noise around it (as continuum-subtracted
    radio cubes are): 'auto' subtracts nothing and returns the input cube itself."""
    rng = np.random.default_rng(3)
    h = make_header("FREQ", nchan=200, ny=6, nx=6, crval=1.4205e9, cdelt=-2.0e4,
                    extra={"RESTFRQ": 1.420405751768e9})
    cube = kinemap.read_cube((rng.normal(0, 1, (200, 6, 6)).astype(np.float32), h))
    res = subtract_continuum(cube)
    assert res.method == "none" and res.cube is cube and res.products() == []
    assert "none found" in res.message


def test_real_cube_unchanged_by_auto(real_cube_path, tmp_path):
    """The real 13CO cube (../shared/data, no continuum; its line fills the band) comes
    through --continuum auto with identical moment maps to --continuum none."""
    cube = kinemap.read_cube(real_cube_path)
    res = subtract_continuum(cube)
    assert res.method == "none" and res.cube is cube
    outs = {}
    for method in ("auto", "none"):
        out = tmp_path / method
        code, stdout, err = run_cli("maps", real_cube_path, "--continuum", method, "--out",
                                    str(out), "--no-progress", "--no-plots")
        assert code == 0, err
        outs[method] = fits.getdata(out / "moment0.fits")
        assert "continuum.fits" not in {p.name for p in out.iterdir()}
    np.testing.assert_array_equal(outs["auto"], outs["none"])


def test_explicit_method_without_line_free_channels_is_refused(real_cube_path):
    cube = kinemap.read_cube(real_cube_path)
    with pytest.raises(KinemapError, match="line-free"):
        subtract_continuum(cube, method="constant")


def test_maps_line_with_no_restwav(tmp_path):
    """`kinemap maps CUBE --line Halpha` on an AWAV cube with a continuum and no RESTWAV:
    no other option; the continuum map is written and moments match the truth."""
    path = tmp_path / "c.fits"
    _, truth = optical_cube(path)
    out = tmp_path / "out"
    code, stdout, err = run_cli("maps", str(path), "--line", "Halpha", "--write-continuum",
                                "--out", str(out), "--no-progress", "--no-plots")
    assert code == 0, err
    assert "kinemap: continuum: subtracted a linear fit" in stdout
    manifest = json.loads((out / "manifest.json").read_text())
    assert {"continuum", "continuum_err", "continuum_cube"} <= set(manifest["products"])
    level = fits.getdata(out / "continuum.fits")
    assert abs(np.nanmedian(level) - truth["level_at_halpha"]) < 0.15
    m0 = np.nanmedian(fits.getdata(out / "moment0.fits"))
    m1 = np.nanmedian(fits.getdata(out / "moment1.fits"))
    assert abs(m0 / truth["flux"] - 1) < 0.05 and abs(m1 - truth["v"]) < 2.0
    assert fits.getdata(out / "continuum_cube.fits").shape == (120, 6, 6)


@pytest.mark.parametrize("value", ["poly:7", "wiggly"])
def test_bad_continuum_option_is_one_line(tmp_path, value):
    path = tmp_path / "c.fits"
    optical_cube(path)
    out = tmp_path / "out"
    code, stdout, err = run_cli("maps", str(path), "--line", "Halpha", "--continuum", value,
                                "--out", str(out))
    assert code == 2 and len(err.strip().splitlines()) == 1 and "continuum" in err
    assert not out.exists()


def test_auto_decides_on_a_subsample_of_a_large_map(tmp_path):
    """On a map of more than AUTO_SPECTRA spectra 'auto' looks at every k-th row: a cube
    with no continuum is left as it is, one with a continuum everywhere is subtracted
    everywhere (the decision is a fraction of spectra, estimated as well from a subsample)."""
    from kinemap.maps.continuum import AUTO_SPECTRA, _decision_rows

    ny = nx = 220
    assert ny * nx > AUTO_SPECTRA
    h = make_header("VRAD", nchan=24, ny=ny, nx=nx, crval=-60.0, cdelt=5.0, cunit="km/s")
    rng = np.random.default_rng(5)
    noise = rng.normal(0.0, 1.0, (24, ny, nx)).astype(np.float32)
    for name, offset, expect in (("flat.fits", 0.0, "none"), ("cont.fits", 8.0, "constant")):
        path = tmp_path / name
        fits.writeto(path, noise + offset, h)
        cube = kinemap.read_cube(str(path))
        assert _decision_rows(cube).shape[1] < ny
        res = subtract_continuum(cube, line_window=20.0)  # no line: keep most channels free
        assert res.method == expect, res.message
        if expect == "constant":
            # subtracted in every spectrum, not only in the rows the decision looked at
            assert np.nanmedian(np.abs(res.level - offset)) < 0.2
            assert np.isfinite(res.level).all()


def test_line_free_channels_hold_no_emission_of_a_rotating_disk():
    """A rotating disk spreads its line over +-140 km/s and its mean spectrum peaks at one
    horn.  Common practice: the channels a continuum is measured on hold no emission, so
    the window must cover the whole rotation range, not +-line_window about the brighter
    horn (that left the other horn's lines among the "line-free" channels; on a band only a
    little wider, 'auto' then found a continuum in 11 % of the spectra of a cube that has
    none).  The true 0.5 K offset is recovered in every spectrum within 5 errors."""
    nchan, n, offset = 400, 48, 0.5
    v = -500.0 + 2.5 * np.arange(nchan)
    yy, xx = np.mgrid[:n, :n] - n / 2 + 0.5
    r = np.hypot(xx, yy)
    vel = 200.0 * np.tanh(r / 4.0) * xx / r * 0.7          # +-140 km/s
    amp = 2.0 * np.exp(-r / n) * (1 + 0.2 * (xx > 0))      # the receding horn is brighter
    line = amp * np.exp(-0.5 * ((v[:, None, None] - vel) / 12.0) ** 2)
    rng = np.random.default_rng(11)
    data = (line + offset + rng.normal(0.0, 0.1, (nchan, n, n))).astype(np.float32)
    h = make_header("VRAD", nchan=nchan, ny=n, nx=n, crval=-500.0, cdelt=2.5, cunit="km/s")
    res = subtract_continuum(kinemap.read_cube((data, h)))
    assert res.method == "constant", res.message
    within = np.abs(v[:, None] - vel.ravel()[None, :]) < 3 * 12.0   # line cores, every pixel
    assert not (within & res.free_channels[:, None]).any()
    assert np.all(np.abs(res.level - offset) < 5 * res.level_err)


def test_auto_names_the_emission_when_a_disk_fills_the_band():
    """The same kind of disk in a band only 2 x 320 km/s wide: no channel lies 200 km/s
    beyond the emission, so 'auto' subtracts nothing and the message gives the emission's
    velocity range (both horns)."""
    nchan, n = 256, 48
    v = -320.0 + 2.5 * np.arange(nchan)
    yy, xx = np.mgrid[:n, :n] - n / 2 + 0.5
    r = np.hypot(xx, yy)
    vel = 200.0 * np.tanh(r / 4.0) * xx / r * 0.7
    amp = 2.0 * np.exp(-r / n) * (1 + 0.2 * (xx > 0))
    rng = np.random.default_rng(12)
    data = (amp * np.exp(-0.5 * ((v[:, None, None] - vel) / 12.0) ** 2)
            + rng.normal(0.0, 0.1, (nchan, n, n))).astype(np.float32)
    h = make_header("VRAD", nchan=nchan, ny=n, nx=n, crval=-320.0, cdelt=2.5, cunit="km/s")
    cube = kinemap.read_cube((data, h))
    res = subtract_continuum(cube)
    assert res.method == "none" and res.cube is cube
    lo, hi = (res.lines["peak of the mean spectrum"] + e for e in res.emission_extent)
    assert lo < -140 and hi > 140, (lo, hi)
    assert "beyond the emission of the lines" in res.message and "too few" in res.message
