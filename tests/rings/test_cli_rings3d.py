"""`kinemap rings CUBE --model 3d` through the command: products, WCS, manifest, bad input.

The cube is the independent seeded mock of tests/rings/_mock3d.py (sub-pixel sky sampling,
scipy's gaussian_filter for the beam), written as FITS with its beam in the header."""
from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS

from conftest import run_cli

sys.path.insert(0, str(Path(__file__).parent))
from _mock3d import mock_disk  # noqa: E402

NEW_COLUMNS = ["dispersion", "dispersion_err", "surface_brightness", "asymmetric_drift",
               "v_circ", "v_circ_err", "v_rot_err_formal", "dispersion_err_formal"]
TRUE_INC, TRUE_PA = 58.0, 60.0


def _small_cube(path, **kw):
    hdu, truth = mock_disk(n=24, pix=8.0, nchan=30, dv=8.0, beam=24.0, noise=0.003, r_max=70,
                           vrot=lambda r: 100 * (1 - np.exp(-r / 25.0)), center=(11.6, 12.2),
                           inc=TRUE_INC, pa=TRUE_PA, **kw)
    hdu.writeto(path)
    return truth


def test_model_3d_through_the_command(tmp_path):
    cube = tmp_path / "disk.fits"
    _small_cube(cube)
    out = tmp_path / "out"
    code, stdout, err = run_cli("rings", str(cube), "--model", "3d", "--stages", "1",
                                "--out", str(out), "--no-progress")
    assert code == 0, err
    assert "model 3d" in stdout + err  # the command says which model it used (issue 10)
    tab = Table.read(out / "rotation_curve.ecsv", format="ascii.ecsv")
    for col in ["radius", "v_rot", "v_rot_err", "position_angle", "inclination", *NEW_COLUMNS]:
        assert col in tab.colnames
    ok = tab["status"] == 0
    assert ok.sum() >= 2 and np.all(np.isfinite(tab["v_circ"][ok]))
    # V_c^2 = v_rot^2 + V_A^2 (signed V_A), the definition, row by row
    va = np.asarray(tab["asymmetric_drift"][ok])
    np.testing.assert_allclose(np.asarray(tab["v_circ"][ok]) ** 2,
                               np.asarray(tab["v_rot"][ok]) ** 2 + np.sign(va) * va**2, rtol=1e-6)
    # a 3-beam disk: the geometry is still found (stage 1 only; see the recovery tests)
    summary = json.loads((out / "manifest.json").read_text())["summary"]["rings3d"]
    assert abs(summary["inclination_deg"] - TRUE_INC) < 8.0
    assert abs(summary["position_angle_deg"] - TRUE_PA) < 8.0

    # model and residual cubes on the input's grid: same shape, same world coordinates
    # (astropy.wcs evaluates both headers), and data = model + residual
    data = fits.getdata(cube)
    w_in = WCS(fits.getheader(cube))
    for name in ("model_cube", "residual_cube"):
        with fits.open(out / f"{name}.fits") as hd:
            assert hd[0].data.shape == data.shape
            w_out = WCS(hd[0].header)
            pix = np.array([[0, 0, 0], [23, 5, 29], [7, 19, 12]], float)
            np.testing.assert_allclose(w_out.all_pix2world(pix, 0), w_in.all_pix2world(pix, 0),
                                       rtol=1e-9, atol=1e-9)
    model = fits.getdata(out / "model_cube.fits")
    resid = fits.getdata(out / "residual_cube.fits")
    np.testing.assert_allclose(model + resid, data, atol=1e-6 * np.abs(data).max())

    manifest = json.loads((out / "manifest.json").read_text())
    assert "rings3d" in manifest["timings"]
    for key in ("first_guess", "stage1", "stage3", "halves"):
        assert summary["timings"][key] >= 0.0
    for key in ("rotation_curve", "model_cube", "residual_cube"):
        assert key in manifest["products"]
    # no per-pixel Gaussian fit is run for the 3D model (its first guesses are moments)
    assert "fit" not in manifest["timings"]
    for png in ("rings3d_channels", "rings3d_pv", "rings3d_curve"):
        assert (out / f"{png}.png").stat().st_size > 10_000


def test_model_3d_refuses_a_velocity_map(tmp_path):
    vmap = tmp_path / "v.fits"
    hdu, _ = mock_disk(n=16, nchan=4, noise=0.0)
    h = WCS(hdu.header).celestial.to_header()
    h["BUNIT"] = "km/s"
    fits.PrimaryHDU(np.full((16, 16), 30.0, np.float32), h).writeto(vmap)
    out = tmp_path / "o"
    code, _, err = run_cli("rings", str(vmap), "--model", "3d", "--out", str(out))
    assert code == 2, err
    assert len(err.strip().splitlines()) == 1 and "cube" in err and "Traceback" not in err
    assert not out.exists()


def test_model_3d_refuses_a_cube_without_signal(tmp_path):
    cube = tmp_path / "empty.fits"
    _small_cube(cube, sigma=lambda r: 0.0 * r)
    out = tmp_path / "o"
    code, _, err = run_cli("rings", str(cube), "--model", "3d", "--out", str(out),
                           "--no-progress")
    assert code == 2, err
    lines = [ln for ln in err.strip().splitlines() if "error" in ln]
    assert len(lines) == 1 and "mask" in lines[0] and "Traceback" not in err
    assert not out.exists()


@pytest.mark.parametrize("fix", ["inclination,bogus"])
def test_model_3d_bad_fix_name(tmp_path, fix):
    cube = tmp_path / "disk.fits"
    _small_cube(cube)
    out = tmp_path / "o"
    code, _, err = run_cli("rings", str(cube), "--model", "3d", "--fix", fix, "--out", str(out))
    assert code == 2 and "bogus" in err and "Traceback" not in err
    assert not out.exists()
