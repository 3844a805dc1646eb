"""A Gaussian fit in which no spectrum can be fitted is refused with its commonest reason
(benchmarks/fuzz.py found all-NaN velocity maps written with exit 0)."""
from __future__ import annotations

import numpy as np
import pytest
from conftest import gaussian_cube, make_header, run_cli, write_cube

from kinemap import KinemapError, fit_cube, make_mask, read_cube


def _cube(tmp_path, amp):
    h = make_header("VRAD", nchan=40, ny=6, nx=5, crval=-20.0, cdelt=1.0, cunit="km/s",
                    extra={"BMAJ": 5e-3, "BMIN": 5e-3, "BPA": 0.0})
    data = gaussian_cube(40, 6, 5, centre_chan=20.0, sigma_chan=3.0, amp=amp, noise=0.1, seed=3)
    return write_cube(tmp_path / "c.fits", data, h)


def test_all_too_faint_is_refused(tmp_path):
    cube = read_cube(_cube(tmp_path, amp=0.0))
    with pytest.raises(KinemapError, match=r"no spectrum could be fitted \(30 of 30 pixels: "
                       r"peak S/N below threshold 50.*lower --snr-threshold"):
        fit_cube(cube, snr_threshold=50.0, mask=make_mask(cube, method="none"))


def test_a_fitted_cube_still_fits(tmp_path):
    """The check does not touch a cube with lines: velocities at the seeded truth, channel
    20 of a -20 km/s + 1 km/s axis = 0 km/s (S/N 30)."""
    fit = fit_cube(read_cube(_cube(tmp_path, amp=3.0)))
    v = fit.component("velocity", 0)
    assert np.isfinite(v).all()
    np.testing.assert_allclose(v, 0.0, atol=0.3)


def test_command_refuses_in_one_line(tmp_path):
    code, out, err = run_cli("maps", _cube(tmp_path, amp=0.0), "--method", "gauss",
                             "--snr-threshold", "50", "--mask", "none", "--out",
                             str(tmp_path / "o"), "--no-plots", "--no-progress")
    assert code == 2
    assert err.strip().splitlines() == [err.strip()] and "no spectrum could be fitted" in err
    assert not (tmp_path / "o").exists()
