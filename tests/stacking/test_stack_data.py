"""Stacking on the real cube (tests/conftest.py REAL_CUBE) and the invented demo cubes."""
from __future__ import annotations

import warnings

import numpy as np
import pytest
from astropy.table import Table

from conftest import REAL_CUBE, run_cli
from kinemap.datasets.cache import demo_cube, load_truth


@pytest.fixture(scope="module")
def real_stack():
    if not REAL_CUBE.exists():
        pytest.skip(f"real cube not found at {REAL_CUBE} (the shared data folder is absent)")
    real_cube_path = str(REAL_CUBE)
    from kinemap.io.reader import read_cube
    from kinemap.maps.moments import compute_moments
    from kinemap.maps.noise import estimate_noise
    from kinemap.stacking.bins import map_bins
    from kinemap.stacking.stage import stack_spectra

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cube = read_cube(real_cube_path)
        noise = estimate_noise(cube)
        v = compute_moments(cube, noise=noise).velocity_field(min_snr=3.0)[0]
        one_bin = map_bins(np.ones(v.shape), "", [0.5, 1.5])
        result = stack_spectra(cube, v, one_bin, noise=noise, components=1)
    return result, v


def test_real_cube_stack_keeps_the_flux_of_spectral_cube_moment_0(real_stack, real_cube_path):
    # spectral-cube's moment0 (reference library) of the stacked pixels, over the channel
    # width, is the sum of their spectra; the stack holds it up to the shift's ripple of
    # the band-edge noise that it leaves out (measured 7e-4)
    from spectral_cube import SpectralCube

    result, v = real_stack
    sc = SpectralCube.read(real_cube_path)
    dv = abs(float(np.diff(sc.spectral_axis.value)[0]))
    direct = np.nansum(sc.moment0().value[np.isfinite(v)]) / dv
    t = result.spectra
    stacked = np.sum(t["flux"].value * t["n_spectra"])
    assert stacked == pytest.approx(direct, rel=2e-3)


def test_real_cube_stacked_width_is_the_typical_line_width(real_stack, real_cube_path):
    # spectral-cube's linewidth_sigma (moment 2, reference library): the stack removes the
    # centroid scatter between pixels, so its width is the typical width of one spectrum
    from spectral_cube import SpectralCube

    result, v = real_stack
    sc = SpectralCube.read(real_cube_path)
    typical = np.nanmedian(sc.linewidth_sigma().to_value("km/s")[np.isfinite(v)])
    sigma = float(result.fits["dispersion"].value[0])
    assert sigma == pytest.approx(typical, rel=0.15)
    # supersonic: the sound speed of molecular gas at 10 K is 0.188 km/s (Kauffmann et al.
    # 2008; from memory)
    assert sigma > 2 * 0.188


def test_real_cube_stack_command(real_cube_path, tmp_path):
    # centre of the map, face-on rings of 10 arcmin
    out = tmp_path / "r"
    code, stdout, err = run_cli("stack", real_cube_path, "--center", "51.4,30.6", "--pa", "0",
                                "--inclination", "0", "--bin-width", "600", "--out", str(out),
                                "--no-progress")
    assert code == 0, err
    f = Table.read(out / "stack_fits.ecsv")
    ok = np.isfinite(f["dispersion"].value)
    assert ok.sum() >= 2
    assert np.all(f["dispersion"].value[ok] > 0.188)  # supersonic, as above
    assert (out / "stacked_spectra.png").exists() and (out / "stack_dispersion.png").exists()


def test_demo_dwarf_rings_feed_the_stack(tmp_path):
    # the demo dwarf: constant dispersion 14 km/s (its truth file); geometry from the
    # rings command's table
    cube = demo_cube("dwarf_hi")
    truth = load_truth(cube)
    code, _, err = run_cli("rings", cube, "--velocity-field", "moments", "--out",
                           str(tmp_path / "rings"), "--no-progress")
    assert code == 0, err
    code, _, err = run_cli("stack", cube, "--rings", str(tmp_path / "rings" / "rotation_curve.ecsv"),
                           "--out", str(tmp_path / "s"), "--no-progress")
    assert code == 0, err
    f = Table.read(tmp_path / "s" / "stack_fits.ecsv")
    d, e = f["dispersion"].value, f["dispersion_err"].value
    assert np.isfinite(d).sum() >= 2
    # beam smearing and velocity-map errors only broaden a stack (common practice) ...
    assert np.all(d > truth["dispersion_kms"] - 3 * e)
    # ... and matter least in the outer rings
    assert d[-1] == pytest.approx(truth["dispersion_kms"], rel=0.1)


def test_demo_galaxy_stack(tmp_path):
    cube = demo_cube("galaxy_hi")
    t = load_truth(cube)
    code, _, err = run_cli("stack", cube, "--center", f"{t['center_ra_deg']},{t['center_dec_deg']}",
                           "--pa", str(t["position_angle_deg"]), "--inclination",
                           str(t["inclination_deg"]), "--edges", "0,25,50,75,100,125,150",
                           "--out", str(tmp_path / "g"), "--no-progress")
    assert code == 0, err
    f = Table.read(tmp_path / "g" / "stack_fits.ecsv")
    d, e = f["dispersion"].value, f["dispersion_err"].value
    assert np.isfinite(d).all()
    assert np.all(d > t["dispersion_kms"] - 3 * e)
    # the beam (16 x 12 arcsec) smears the steep inner rotation curve most (common
    # practice): widest at the centre, within 25 per cent of the truth beyond 100 arcsec
    assert d[0] == d.max()
    assert np.all(np.abs(d[-2:] / t["dispersion_kms"] - 1) < 0.25)
