"""`kinemap rings` from a velocity map or a cube: products, tables, bad input."""
import json
import re

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS

from conftest import run_cli
from kinemap.cli import main

REQUIRED = ["radius", "v_rot", "v_rot_err", "v_exp", "v_exp_err", "position_angle", "inclination",
            "v_sys", "x_center", "y_center", "npoints", "v_rot_approaching", "v_rot_receding",
            "beam_smeared"]


def begeman_map(tmp_path, *, pa=60.0, incl=50.0, vsys=900.0, vflat=150.0, n=80, pix=3.0, seed=3,
                noise=2.0):
    """Velocity field from the tilted-ring formula (Begeman 1989, A&A 223, 47) on an
    RA---TAN/DEC--TAN grid with east to the left; positions from astropy's WCS."""
    w = WCS(naxis=2)
    w.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    w.wcs.crval = [150.0, 2.0]
    w.wcs.crpix = [n / 2 + 0.5, n / 2 + 0.5]
    w.wcs.cdelt = [-pix / 3600, pix / 3600]
    yy, xx = np.mgrid[:n, :n].astype(float)
    from astropy.coordinates import SkyCoord
    centre = SkyCoord(*w.wcs.crval, unit="deg")
    sky = w.pixel_to_world(xx, yy)
    sep = centre.separation(sky).to_value(u.arcsec)
    ang = (centre.position_angle(sky) - pa * u.deg).to_value(u.rad)
    # disk-plane coordinates: along the receding major axis and perpendicular
    xm = sep * np.cos(ang)
    ym = sep * np.sin(ang) / np.cos(np.radians(incl))
    r = np.hypot(xm, ym)
    cos_t = np.where(r > 0, xm / np.maximum(r, 1e-9), 0.0)
    vrot = vflat * (1 - np.exp(-r / 20.0))
    v = vsys + vrot * cos_t * np.sin(np.radians(incl))
    rng = np.random.default_rng(seed)
    v = v + rng.normal(0, noise, v.shape)
    v[r > 110] = np.nan
    h = w.to_header()
    h["BUNIT"] = "km/s"
    h["BMAJ"] = h["BMIN"] = 6 / 3600
    h["BPA"] = 0.0
    path = tmp_path / "vfield.fits"
    fits.PrimaryHDU(v.astype(np.float32), h).writeto(path)
    err = tmp_path / "verr.fits"
    fits.PrimaryHDU(np.full_like(v, noise, dtype=np.float32), h).writeto(err)
    return str(path), str(err)


def test_rings_from_velocity_map(tmp_path):
    vmap, err = begeman_map(tmp_path)
    out = tmp_path / "out"
    assert main(["rings", vmap, "--velocity-error", err, "--distance", "10 Mpc", "--out", str(out),
                 "--no-progress"]) == 0
    tab = Table.read(out / "rotation_curve.ecsv", format="ascii.ecsv")
    assert tab.colnames[: len(REQUIRED)] == REQUIRED
    assert "radius_kpc" in tab.colnames and "mass_enclosed" in tab.colnames
    ok = (tab["status"] == 0) & ~tab["beam_smeared"]
    truth = 150.0 * (1 - np.exp(-np.asarray(tab["radius"][ok]) / 20.0))
    assert np.all(np.abs(tab["v_rot"][ok] - truth) < 5.0)  # tilted-ring recovery, km/s
    assert np.nanmedian(tab["position_angle"][ok]) == pytest.approx(60.0, abs=1.0)
    assert np.nanmedian(tab["inclination"][ok]) == pytest.approx(50.0, abs=2.0)
    # M(<R) = v^2 R / G with G from astropy.constants
    from astropy.constants import G
    row = tab[ok][-1]
    m = ((row["v_rot"] * u.km / u.s) ** 2 * row["radius_kpc"] * u.kpc / G).to_value(u.Msun)
    assert row["mass_enclosed"] == pytest.approx(m, rel=1e-6)
    manifest = json.loads((out / "manifest.json").read_text())
    for key in ("rotation_curve", "harmonics", "velocity_model", "velocity_residual"):
        assert key in manifest["products"]
    assert "rings" in manifest["timings"]
    assert (out / "rotation_curve.png").exists() and (out / "velocity_fields.png").exists()


@pytest.mark.parametrize("extra,match", [
    (["--inclination", "95"], "inclination"),
    (["--center", "10.0,-60.0"], "cent"),
    (["--weighting", "triangular"], "invalid choice"),
])
def test_rings_bad_input(tmp_path, extra, match):
    vmap, _ = begeman_map(tmp_path)
    out = tmp_path / "o"
    code, _, err = run_cli("rings", vmap, "--out", str(out), *extra)
    assert code == 2, err
    assert match in err and "Traceback" not in err
    assert not out.exists()


def test_rings_from_demo_galaxy_cube_recover_truth(tmp_path):
    """Acceptance: the invented demo disk (truth known by construction) with no geometry
    given; v_rot within 5 km/s outside two beams, PA within 2 deg, inclination within 4 deg."""
    from kinemap.datasets.generate import make_disk_galaxy

    demo = make_disk_galaxy()
    path = tmp_path / "galaxy.fits"
    demo.hdu.writeto(path)
    out = tmp_path / "o"
    assert main(["rings", str(path), "--out", str(out), "--no-plots", "--no-progress"]) == 0
    tab = Table.read(out / "rotation_curve.ecsv", format="ascii.ecsv")
    use = (tab["status"] == 0) & ~tab["beam_smeared"]
    assert use.sum() >= 5
    truth = np.interp(tab["radius"][use], demo.truth["radius_arcsec"],
                      demo.truth["rotation_velocity_kms"])
    assert np.max(np.abs(tab["v_rot"][use] - truth)) < 5.0
    manifest = json.loads((out / "manifest.json").read_text())
    summary = manifest["summary"]["rings"]
    assert abs(summary["position_angle_deg"] - demo.truth["position_angle_deg"]) < 2.0
    assert abs(summary["inclination_deg"] - demo.truth["inclination_deg"]) < 4.0
    # the default velocity field of a cube is the Gaussian fit ([rings] velocity_field)
    assert "fit" in manifest["timings"] and "fit_status" in manifest["products"]
    assert manifest["options"]["rings"]["velocity_field"] == "gauss"


def test_rings_velocity_field_from_moments(tmp_path):
    """--velocity-field moments: no Gaussian fit runs, the rings use moment 1."""
    from kinemap.datasets.generate import make_disk_galaxy

    path = tmp_path / "galaxy.fits"
    make_disk_galaxy().hdu.writeto(path)
    out = tmp_path / "o"
    assert main(["rings", str(path), "--velocity-field", "moments", "--stages", "1",
                 "--out", str(out), "--no-plots", "--no-progress"]) == 0
    manifest = json.loads((out / "manifest.json").read_text())
    assert "fit" not in manifest["timings"] and "fit_status" not in manifest["products"]
    assert "rings" in manifest["timings"]


def _thin_cube(tmp_path, nchan, ny, nx):
    from conftest import gaussian_cube, make_header, write_cube

    h = make_header("VRAD", nchan=nchan, ny=ny, nx=nx, crval=-20.0, cdelt=1.0, cunit="km/s",
                    extra={"BMAJ": 5e-3, "BMIN": 5e-3, "BPA": 0.0})
    data = gaussian_cube(nchan, ny, nx, centre_chan=nchan / 2, sigma_chan=2.0, amp=3.0,
                         noise=0.1, seed=2)
    return write_cube(tmp_path / "thin.fits", data, h)


@pytest.mark.parametrize("shape, match", [
    # a one-row cube is a cube (its velocity field is too small for rings), not a 2D map
    ((40, 1, 16), "usable .*pixels; a tilted-ring fit needs at least"),
    # a one-channel cube is an image in K: not a velocity map (the message names both)
    ((1, 16, 16), "BUNIT 'K', so it is not a velocity map.*one channel"),
])
def test_rings_on_thin_cubes_refused_in_one_line(tmp_path, shape, match):
    """benchmarks/fuzz.py: both crashed with "'K' and 'km / s' are not convertible"."""
    code, out, err = run_cli("rings", _thin_cube(tmp_path, *shape), "--out", str(tmp_path / "o"),
                             "--no-plots", "--no-progress")
    assert code == 2, err
    assert len(err.strip().splitlines()) == 1 and re.search(match, err), err
