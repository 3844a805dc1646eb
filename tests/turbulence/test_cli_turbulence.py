"""`kinemap turbulence` on the real 13CO cube, and bad input."""
import json

import numpy as np
import pytest
from astropy.table import Table

from conftest import run_cli


@pytest.fixture(scope="module")
def real_run(tmp_path_factory):
    from conftest import REAL_CUBE

    if not REAL_CUBE.exists():
        pytest.skip(f"real cube not found at {REAL_CUBE}")
    out = tmp_path_factory.mktemp("l1448") / "o"
    code, stdout, stderr = run_cli("turbulence", str(REAL_CUBE), "--beam", "46arcsec",
                                   "--bunit", "K", "--lines", "13CO_1-0", "--temperature",
                                   "10 K", "--distance", "250 pc", "--out", str(out),
                                   "--no-progress")
    assert code == 0, stderr
    return out, stdout


def test_real_cloud_size_linewidth_and_structure_function(real_run):
    out, stdout = real_run
    sf = Table.read(out / "structure_function.ecsv")
    lw = Table.read(out / "size_linewidth.ecsv")
    for col in ("lag", "sf2", "sf2_err", "npairs"):
        assert col in sf.colnames
    for col in ("size", "size_pc", "sigma", "sigma_nt", "sigma_err"):
        assert col in lw.colnames
    # the velocity field's structure function rises with lag (common practice for clouds)
    big = ~np.asarray(sf["beam_smoothed"])
    assert np.all(np.diff(np.asarray(sf["sf2"])[big]) > 0)
    assert sf.meta["slope"] > 5 * sf.meta["slope_err"] > 0
    # size-linewidth of the centroid motions inside apertures: 0.2-0.7, the range found for
    # molecular clouds (Larson 1981, MNRAS 194, 809 found 0.38; common practice to expect
    # scatter).  The aperture-averaged spectra themselves are nearly flat here: each line of
    # sight already crosses the whole cloud, so it is held only to "positive and below".
    manifest = json.loads((out / "manifest.json").read_text())
    s = manifest["summary"]["turbulence"]
    assert 0.2 < s["size_linewidth_centroid_slope"] < 0.7
    assert 0 < s["size_linewidth_slope"] < s["size_linewidth_centroid_slope"]
    # 13CO at 10 K is supersonic at the beam (shared/data/README.md), so no sonic scale
    assert s["sonic_scale_reached"] is False
    assert abs(s["sound_speed_kms"] - 0.188) < 0.001  # Kauffmann et al. 2008 (from memory)
    for key in ("velocity_gradient", "velocity_gradient_pa", "structure_function",
                "size_linewidth"):
        assert key in manifest["products"]
    assert manifest["products"]["velocity_gradient"]["unit"] == "km / (pc s)"
    for fig in ("structure_function_plot", "size_linewidth_plot", "velocity_gradients_plot"):
        assert (out / f"{fig}.png").exists()
    assert "structure function slope" in stdout


@pytest.mark.parametrize("args,message", [
    (["--lag-range", "600,90"], "two increasing positive lags"),
    (["--distance", "-3 pc"], "'distance' must be positive"),
    (["--weighting", "pairs"], "invalid choice"),
    (["--temperature", "10 K"], "needs lines"),
])
def test_bad_input_one_line_exit_2_nothing_written(tmp_cube, tmp_path, args, message):
    cube = tmp_cube("VRAD", nchan=40, ny=12, nx=12, crval=-20.0, cdelt=1.0, cunit="km/s")
    out = tmp_path / "o"
    code, _, stderr = run_cli("turbulence", cube, "--out", str(out), "--no-progress",
                              "--method", "moments", *args)
    assert code == 2
    assert message in stderr and "Traceback" not in stderr
    assert len(stderr.strip().splitlines()) == 1
    assert not out.exists()
