"""`kinemap widths`: the budget on the invented nebula and the real cloud, and bad input."""
import json

import numpy as np
import pytest
from astropy.io import fits

from conftest import run_cli
from kinemap.cli import main
from kinemap.status import Status


@pytest.fixture(scope="module")
def nebula(tmp_path_factory):
    from kinemap.datasets.generate import make_nebula

    demo = make_nebula()
    path = tmp_path_factory.mktemp("neb") / "nebula.fits"
    demo.hdu.writeto(path)
    return str(path), demo.truth


def test_nebula_temperature_and_turbulence_recovered(nebula, tmp_path):
    """Acceptance: T within 700 K in the median and sigma_nt within 1 km/s at high S/N.
    Truth: the invented nebula's own fields; thermal widths kT/m with astropy.constants."""
    path, truth = nebula
    out = tmp_path / "o"
    assert main(["widths", path, "--lines", "Halpha,NII_6583,NII_6548", "--resolving-power",
                 str(truth["resolving_power"]), "--mu", "0.6", "--out", str(out), "--no-plots",
                 "--no-progress"]) == 0
    t = fits.getdata(out / "temperature.fits")
    nt = fits.getdata(out / "nonthermal_dispersion.fits")
    status = fits.getdata(out / "width_status.fits")
    ok = status == Status.OK
    bright = np.asarray(truth["halpha_flux_1e-20_erg_s_cm2"]) > np.percentile(
        truth["halpha_flux_1e-20_erg_s_cm2"], 50)
    sel = ok & bright
    assert sel.sum() > 500
    assert abs(np.median(t[sel] - truth["electron_temperature_k"][sel])) < 700
    assert abs(np.median(nt[sel] - truth["nonthermal_dispersion_kms"][sel])) < 1.0
    manifest = json.loads((out / "manifest.json").read_text())
    for key in ("nonthermal_dispersion", "nonthermal_dispersion_err", "thermal_dispersion",
                "temperature", "temperature_err", "sound_speed", "mach_number", "width_status",
                "dispersion_Halpha", "dispersion_NII_6583", "dispersion_NII_6548"):
        assert key in manifest["products"], key
    assert manifest["summary"]["widths"]["unphysical"] >= 0


def test_real_cloud_is_supersonic(real_cube_path, tmp_path):
    """13CO at an assumed 10 K: median Mach number 3.5-8 where peak S/N > 8 (molecular clouds
    are supersonically turbulent, Larson 1981; a curve_fit reference measured by the project
    gives about 5.6)."""
    out = tmp_path / "o"
    assert main(["widths", real_cube_path, "--lines", "13CO_1-0", "--temperature", "10 K",
                 "--out", str(out), "--no-plots", "--no-progress"]) == 0
    mach = fits.getdata(out / "mach_number.fits")
    status = fits.getdata(out / "width_status.fits")
    peak = fits.getdata(out / "peak.fits")
    noise = fits.getdata(out / "noise.fits")
    good = (status == Status.OK) & (peak / noise > 8)
    assert good.sum() > 1000
    assert 3.5 < np.median(mach[good]) < 8.0


@pytest.mark.parametrize("extra,match", [
    (["--lines", "Hgamma"], "known"),
    (["--lines", "OIII_5007", "--temperature", "1e4 K"], "outside"),
    (["--lines", "Halpha", "--temperature", "5 km/s"], "temperature"),
    (["--lines", "NII_6583,NII_6548"], "different emitter mass"),
])
def test_widths_bad_input(nebula, tmp_path, extra, match):
    path, _ = nebula
    out = tmp_path / "o"
    code, _, err = run_cli("widths", path, "--out", str(out), *extra)
    assert code == 2, err
    assert match in err and "Traceback" not in err
    assert not out.exists()
