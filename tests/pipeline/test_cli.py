"""The kinemap command: products, manifest, provenance, refusal to overwrite, bad input."""
import json
import warnings

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits

from conftest import gaussian_cube, make_header, run_cli, write_cube
from kinemap.cli import main

MOMENT_KEYS = {"moment0", "moment1", "moment2", "moment0_err", "moment1_err", "moment2_err",
               "peak", "velocity_at_peak", "nchan", "noise", "mask"}


def test_maps_on_real_cube_equal_spectral_cube(real_cube_path, tmp_path):
    out = tmp_path / "out"
    code, _, err = run_cli("maps", real_cube_path, "--method", "moments", "--no-mask",
                           "--out", str(out), "--no-progress")
    assert code == 0, err
    from spectral_cube import SpectralCube

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        sc = SpectralCube.read(real_cube_path).with_spectral_unit(u.km / u.s)
        ref0, ref1 = sc.moment0().value, sc.moment1().value  # reference library
    m0 = fits.getdata(out / "moment0.fits")
    m1 = fits.getdata(out / "moment1.fits")
    np.testing.assert_allclose(m0, ref0, rtol=1e-4)
    np.testing.assert_allclose(m1, ref1, rtol=1e-4)
    manifest = json.loads((out / "manifest.json").read_text())
    assert MOMENT_KEYS <= set(manifest["products"])
    for key, entry in manifest["products"].items():
        assert (out / entry["path"]).exists()
        assert entry["description"]
    assert manifest["products"]["moment1"]["unit"] == "km / s"
    # --no-mask: the noise and the moments come from one fused pass over the cube
    assert {"read", "noise+moments"} <= set(manifest["timings"])
    assert not {"noise", "moments"} & set(manifest["timings"])
    h = fits.getheader(out / "moment1.fits")
    assert h["BUNIT"] == "km s-1" and h["VCONV"] == "optical" and h["SPECSYS"] == "LSRK"
    assert h["KMSHA256"] == "de4d44cd2841d34cfe98915ab322f83e302f13b9599ef8629079249e53ad6d49"
    assert "RA---SFL" in h["CTYPE1"]
    assert (out / "moment1.png").stat().st_size > 10_000


def test_second_run_refuses_then_overwrite(tmp_path, tmp_cube):
    path = tmp_cube("VRAD", crval=-100.0, cdelt=5.0, cunit="km/s")
    out = tmp_path / "o"
    assert main(["maps", path, "--out", str(out), "--no-plots", "--no-progress"]) == 0
    before = {p.name: p.stat().st_mtime_ns for p in out.iterdir()}
    code, _, err = run_cli("maps", path, "--out", str(out), "--no-plots")
    assert code == 2 and "not empty" in err and "--overwrite" in err
    assert {p.name: p.stat().st_mtime_ns for p in out.iterdir()} == before
    assert main(["maps", path, "--out", str(out), "--no-plots", "--overwrite", "--no-progress"]) == 0


def test_input_is_never_modified(tmp_path, tmp_cube):
    path = tmp_cube("VRAD", crval=-100.0, cdelt=5.0, cunit="km/s")
    before = open(path, "rb").read()
    assert main(["maps", path, "--out", str(tmp_path / "o"), "--no-progress"]) == 0
    assert open(path, "rb").read() == before


BAD = [
    ("missing", lambda p: ["maps", str(p / "nope.fits")], "not found"),
    ("not-fits", lambda p: ["maps", _text(p)], "not a readable FITS file"),
    ("2d-image", lambda p: ["maps", _image(p)], "no spectral axis"),
    ("all-nan", lambda p: ["maps", _nan_cube(p)], "no finite values"),
    ("bad-unit", lambda p: ["maps", _cube(p, extra={"BUNIT": "bananas per parsec"})], "BUNIT"),
    ("no-rest", lambda p: ["maps", _cube(p, ctype="FREQ", crval=1.42e9, cdelt=-2e4, cunit="Hz")],
     "no rest value"),
    ("bad-choice", lambda p: ["maps", _cube(p), "--method", "wavelets"], "invalid choice"),
    ("bad-rest", lambda p: ["maps", _cube(p), "--rest-value", "12 km/s"], "frequency or a wavelength"),
]


def _text(p):
    (p / "t.fits").write_text("hello")
    return str(p / "t.fits")


def _image(p):
    fits.PrimaryHDU(np.zeros((4, 4), np.float32)).writeto(p / "i.fits")
    return str(p / "i.fits")


def _nan_cube(p):
    return write_cube(p / "n.fits", np.full((20, 5, 5), np.nan),
                      make_header("VRAD", nchan=20, ny=5, nx=5, crval=0, cdelt=1, cunit="km/s"))


def _cube(p, ctype="VRAD", crval=-100.0, cdelt=5.0, cunit="km/s", extra=None):
    return write_cube(p / "c.fits", gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3, noise=0.05),
                      make_header(ctype, crval=crval, cdelt=cdelt, cunit=cunit, extra=extra))


@pytest.mark.parametrize("name,args,match", BAD, ids=[b[0] for b in BAD])
def test_bad_input_one_line_exit_2_nothing_written(tmp_path, name, args, match):
    out = tmp_path / "out"
    code, stdout, err = run_cli(*args(tmp_path), "--out", str(out))
    assert code == 2, err
    lines = [ln for ln in err.strip().splitlines() if not ln.startswith("kinemap: warning")]
    assert len(lines) == 1 and match in lines[0], err
    assert "Traceback" not in err
    assert not out.exists()
    assert not [p for p in tmp_path.iterdir() if ".staging-" in p.name]


def test_debug_shows_traceback(tmp_path):
    code, _, err = run_cli("--debug", "maps", str(tmp_path / "nope.fits"))
    assert code != 0 and "Traceback" in err


def test_info_reports_axis_convention_and_noise(real_cube_path):
    code, out, err = run_cli("info", real_cube_path)
    assert code == 0, err
    assert "VOPT" in out and "optical" in out and "LSRK" in out and "noise" in out
    assert "2.5282 to 5.9822 km/s" in out  # shared/data/README: emission 3-6 km/s inside


def test_run_config(tmp_path, tmp_cube):
    path = tmp_cube("VRAD", crval=-100.0, cdelt=5.0, cunit="km/s")
    cfg = tmp_path / "c.toml"
    cfg.write_text(f'[input]\ncube = "{path}"\n[mask]\nmethod = "threshold"\nthreshold = 4\n'
                   f'[output]\ndir = "{tmp_path / "o"}"\nplots = false\n')
    assert main(["run", str(cfg)]) == 0
    assert (tmp_path / "o" / "moment0.fits").exists()
    cfg.write_text(f'[input]\ncube = "{path}"\n[mask]\nmethd = "threshold"\n')
    code, _, err = run_cli("run", str(cfg))
    assert code == 2 and "did you mean 'method'" in err
