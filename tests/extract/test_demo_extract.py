"""Both extraction commands on the invented demo cubes, against the generators' truth."""
import numpy as np
from astropy.io import fits
from astropy.table import Table

from conftest import run_cli
from kinemap.datasets.cache import demo_cube, load_truth


def test_galaxy_global_profile_holds_the_generated_flux(tmp_path):
    """The demo disk's total flux and flux-weighted velocity (its generator's truth) from the
    global profile, within 3 errors.  The quoted errors assume noise correlated like the
    beam (an interferometer's naturally weighted noise); the demo smooths white noise by
    the beam, whose correlation is the beam convolved with itself, of twice the beam's
    area, so its errors are sqrt(2) larger (exact for Gaussians)."""
    cube = demo_cube("galaxy_hi")
    truth = load_truth(cube)
    out = tmp_path / "o"
    code, stdout, err = run_cli("spectrum", cube, "--global", "--out", str(out), "--no-progress")
    assert code == 0, err
    t = Table.read(out / "spectrum.ecsv")
    v = t["velocity"].value
    dv = np.abs(np.gradient(v))
    total = np.nansum(t["flux"].value * dv)
    total_err = np.sqrt(2) * np.sqrt(np.sum((t["flux_err"].value * dv) ** 2))
    assert abs(total - truth["total_flux_jy_kms"]) < 3 * total_err
    # 1500 km/s: the truth's moment-0-weighted velocity, as the generator places the disk
    m = t.meta["moments"]
    assert abs(m["centroid"] - truth["systemic_velocity_kms"]) < 3 * np.sqrt(2) * m["centroid_err"]


def test_dwarf_major_axis_cut_spans_the_rotation(tmp_path):
    """A cut along the demo dwarf's major axis (truth: centre, PA): the emission peaks
    above v_sys on the receding side and below it on the approaching side."""
    cube = demo_cube("dwarf_hi")
    truth = load_truth(cube)
    out = tmp_path / "o"
    centre = f"{truth['center_ra_deg']},{truth['center_dec_deg']}"
    code, stdout, err = run_cli("pv", cube, "--center", centre, "--pa",
                                str(truth["position_angle_deg"]), "--length", "120",
                                "--width", "12", "--out", str(out), "--no-progress")
    assert code == 0, err
    data = fits.getdata(out / "pv.fits")
    h = fits.getheader(out / "pv.fits")
    off = h["CRVAL1"] + h["CDELT1"] * (np.arange(h["NAXIS1"]) + 1 - h["CRPIX1"])
    vel = h["CRVAL2"] + h["CDELT2"] * (np.arange(h["NAXIS2"]) + 1 - h["CRPIX2"])  # km/s
    peak = vel[np.nanargmax(data, axis=0)]
    vsys = truth["systemic_velocity_kms"]
    assert np.median(peak[(off > 25) & (off < 55)]) > vsys + 10
    assert np.median(peak[(off < -25) & (off > -55)]) < vsys - 10
    assert (out / "pv.png").exists()
