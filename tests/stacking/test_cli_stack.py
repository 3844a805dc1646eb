"""`kinemap stack` through the command: products, units, geometry from a rings table, the
default velocity field, bad input, and the demo and real cubes."""
from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pytest
from astropy.table import Table
from astropy.wcs import WCS
from astropy.io import fits

from conftest import run_cli

sys.path.insert(0, str(Path(__file__).parent))
from _disk import disk_cube, write_map  # noqa: E402


@pytest.fixture(scope="module")
def disk(tmp_path_factory):
    d = tmp_path_factory.mktemp("disk")
    cube = d / "disk.fits"
    vel, truth = disk_cube(cube, seed=11)
    vmap = write_map(d / "velocity.fits", vel, cube)
    sky = WCS(fits.getheader(cube)).celestial.pixel_to_world(truth["x0"], truth["y0"])
    truth["center"] = f"{sky.ra.deg:.8f},{sky.dec.deg:.8f}"
    return str(cube), vmap, truth


def _geometry(truth):
    return ["--center", truth["center"], "--pa", "60", "--inclination", "50"]


def test_stack_writes_spectra_and_fits_with_units(disk, tmp_path):
    cube, vmap, truth = disk
    out = tmp_path / "o"
    code, stdout, err = run_cli("stack", cube, "--velocity-map", vmap, *_geometry(truth),
                                "--bin-width", "20", "--out", str(out), "--no-progress")
    assert code == 0, err
    assert "spectra stacked into" in stdout
    spectra = Table.read(out / "stacked_spectra.ecsv")
    assert spectra.colnames[:5] == ["bin", "velocity", "flux", "flux_err", "n_spectra"]
    assert spectra["velocity"].unit == "km / s" and spectra["flux"].unit == "K"
    fits_t = Table.read(out / "stack_fits.ecsv")
    for col, unit in (("radius", "arcsec"), ("dispersion", "km / s"),
                      ("dispersion_err", "km / s"), ("integrated", "K km / s")):
        assert fits_t[col].unit == unit, col
    d, e = fits_t["dispersion"].value, fits_t["dispersion_err"].value
    ok = np.isfinite(d)
    assert ok.sum() >= 6
    assert np.all(np.abs(d[ok] - truth["dispersion"]) < 4 * e[ok])
    manifest = json.loads((out / "manifest.json").read_text())
    assert {"stacked_spectra", "stack_dispersion"} <= set(manifest["figures"])
    assert manifest["summary"]["stack"]["bins_fitted"] == int(ok.sum())


def test_default_velocities_come_from_moment_1(tmp_path):
    # a brighter disk (peak S/N 10): moment 1 is a good velocity field, and its scatter
    # about the true velocities adds in quadrature to the stacked width (the stack is the
    # line convolved with the distribution of velocity errors; common practice)
    cube = tmp_path / "bright.fits"
    vel, truth = disk_cube(cube, seed=12, peak=10.0)
    sky = WCS(fits.getheader(cube)).celestial.pixel_to_world(truth["x0"], truth["y0"])
    out = tmp_path / "m"
    code, _, err = run_cli("stack", str(cube), "--center", f"{sky.ra.deg:.8f},{sky.dec.deg:.8f}",
                           "--pa", "60", "--inclination", "50", "--edges", "0,40,80,120",
                           "--components", "1", "--out", str(out), "--no-progress")
    assert code == 0, err
    f = Table.read(out / "stack_fits.ecsv")
    m0, m0e = fits.getdata(out / "moment0.fits"), fits.getdata(out / "moment0_err.fits")
    m1 = fits.getdata(out / "moment1.fits")
    used = np.isfinite(m1) & (m0 / m0e >= 3)  # the pixels the command stacks
    for b, (lo, hi) in enumerate(zip(f["radius_lo"].value, f["radius_hi"].value)):
        sel = used & (truth["radius"] >= lo) & (truth["radius"] < hi)
        spread = np.var(m1[sel] - vel[sel])
        expected = np.sqrt(truth["dispersion"] ** 2 + spread)
        d, e = f["dispersion"].value[b], f["dispersion_err"].value[b]
        assert abs(d - expected) < 4 * e + 0.02 * expected, (b, d, e, expected)
        assert d > truth["dispersion"] - 4 * e


def test_geometry_from_a_rings_table(disk, tmp_path):
    cube, vmap, truth = disk
    rings = Table()
    rings["radius"] = [10.0, 30.0, 50.0, 70.0] * np.array(1.0)
    rings["radius"].unit = "arcsec"
    for name, value, unit in (("x_center", truth["x0"], "pix"), ("y_center", truth["y0"], "pix"),
                              ("position_angle", 60.0, "deg"), ("inclination", 50.0, "deg")):
        rings[name] = np.full(4, value)
        rings[name].unit = unit
    rings["status"] = [0, 0, 2, 0]
    rings.meta["ring_width"] = 20.0
    rings.write(tmp_path / "rotation_curve.ecsv")
    out_r, out_g = tmp_path / "r", tmp_path / "g"
    code, _, err = run_cli("stack", cube, "--velocity-map", vmap, "--rings",
                           str(tmp_path / "rotation_curve.ecsv"), "--out", str(out_r),
                           "--no-progress")
    assert code == 0, err
    code, _, err = run_cli("stack", cube, "--velocity-map", vmap, *_geometry(truth),
                           "--edges", "0,20,40,60,80", "--out", str(out_g), "--no-progress")
    assert code == 0, err
    a, b = Table.read(out_r / "stack_fits.ecsv"), Table.read(out_g / "stack_fits.ecsv")
    assert np.allclose(a["radius_lo"].value, [0, 20, 40, 60])
    assert np.allclose(a["radius_hi"].value, [20, 40, 60, 80])
    assert np.array_equal(a["n_spectra"], b["n_spectra"])
    assert np.allclose(a["dispersion"].value, b["dispersion"].value, rtol=1e-6)


def test_stacking_by_the_values_of_a_map(disk, tmp_path):
    cube, vmap, truth = disk
    bmap = write_map(tmp_path / "bins.fits", truth["amplitude"], cube)
    out = tmp_path / "b"
    code, _, err = run_cli("stack", cube, "--velocity-map", vmap, "--bins", bmap,
                           "--edges", "0.5,1,2,3", "--out", str(out), "--no-progress")
    assert code == 0, err
    f = Table.read(out / "stack_fits.ecsv")
    assert f["value_lo"].tolist() == [0.5, 1.0, 2.0]
    n = (truth["amplitude"] >= 0.5) & (truth["amplitude"] < 3)
    assert f["n_spectra"].sum() == n.sum()


@pytest.mark.parametrize("args, message", [
    ([], "radius bins need the disk's --center"),
    (["--bins", "MAPFILE"], "binning by a map needs --edges"),
    (["--pa", "10", "--rings", "RINGS"], "give either --rings or --position-angle"),
    (["--velocity-map", "SMALLMAP", "--pa", "1", "--inclination", "1", "--center", "C"],
     "has shape (5, 5), the cube (40, 40)"),
    (["--center", "C", "--pa", "10", "--inclination", "95"], "'inclination' must be in [0, 90)"),
    (["--bins", "MAPFILE", "--edges", "3,1"], "'edges' must be at least two increasing numbers"),
])
def test_bad_input_is_one_line_and_exit_2(disk, tmp_path, args, message):
    cube, vmap, truth = disk
    small = write_map(tmp_path / "small.fits", np.zeros((5, 5)), cube)
    rings = tmp_path / "rc.ecsv"
    rings.write_text("# %ECSV 1.0\n---\nradius\n1\n")
    sub = {"MAPFILE": vmap, "SMALLMAP": small, "RINGS": str(rings), "C": truth["center"]}
    args = [sub.get(a, a) for a in args]
    code, _, err = run_cli("stack", cube, "--velocity-map", vmap, *args, "--out",
                           str(tmp_path / "x"), "--no-progress") if "--velocity-map" not in args \
        else run_cli("stack", cube, *args, "--out", str(tmp_path / "x"), "--no-progress")
    assert code == 2, err
    # the reader's warning (this invented cube has no beam) may come first
    lines = [x for x in err.strip().splitlines() if not x.startswith("kinemap: warning")]
    assert len(lines) == 1 and lines[0].startswith("kinemap: error:"), err
    assert message in lines[0], lines[0]
    assert not (tmp_path / "x").exists()
