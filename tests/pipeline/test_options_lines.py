"""A line the cube cannot hold is an error, not a folder of NaN maps."""
from __future__ import annotations

from astropy.io import fits

from conftest import run_cli

# 13CO(1-0) 110.2013543 GHz (CDMS catalogue; from memory, as in DESIGN.md)
RESTFRQ_13CO = 110.2013543e9


def test_halpha_on_a_co_cube_is_refused(real_cube_path, tmp_path):
    """The real 13CO cube (a VOPT axis) with its rest frequency written in: H-alpha's rest
    value is about c away from it, far beyond the 3.5 km/s band."""
    cube = tmp_path / "co.fits"
    with fits.open(real_cube_path) as hdul:
        hdul[0].header["RESTFRQ"] = RESTFRQ_13CO
        hdul.writeto(cube)
    out = tmp_path / "out"
    code, _, err = run_cli("widths", str(cube), "--lines", "Halpha", "--temperature", "1e4 K",
                           "--out", str(out), "--no-plots")
    assert code == 2, err
    lines = [ln for ln in err.strip().splitlines() if not ln.startswith("kinemap: warning")]
    assert len(lines) == 1 and "'Halpha' cannot be in this cube" in lines[0], err
    assert not out.exists()
    # the line the cube holds still works
    code, _, err = run_cli("widths", str(cube), "--lines", "13CO_1-0", "--temperature", "10 K",
                           "--out", str(out), "--no-plots")
    assert code == 0, err
