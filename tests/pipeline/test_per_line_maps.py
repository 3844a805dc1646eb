"""`kinemap maps --lines A,B`: moment and fit maps of each line on its own velocity axis,
with keys suffixed by the line's name and the line's own rest value in each header."""
from __future__ import annotations

import json

import numpy as np
import pytest
from astropy.io import fits

from conftest import optical_cube, run_cli


def test_each_line_gets_its_own_maps(tmp_path):
    path = tmp_path / "c.fits"
    _, truth = optical_cube(path, ny=4, nx=4, nchan=160, v=20.0)
    out = tmp_path / "o"
    code, _, err = run_cli("maps", str(path), "--lines", "Halpha,NII_6583", "--method", "gauss",
                           "--out", str(out), "--no-plots", "--no-progress")
    assert code == 0, err
    keys = json.loads((out / "manifest.json").read_text())["products"]
    for line in ("Halpha", "NII_6583"):
        for key in ("moment0", "moment1", "velocity", "dispersion"):
            assert f"{key}_{line}" in keys
        v = fits.getdata(out / f"velocity_{line}.fits")
        err = fits.getdata(out / f"velocity_err_{line}.fits")
        # both lines move with the source: the same velocity on their own axes, within the
        # fits' own errors (mean of the pixels' standardised offsets, 16 pixels)
        z = (v - truth["v"]) / err
        assert np.isfinite(z).sum() >= 12
        assert abs(np.nanmean(z)) < 4.0 / np.sqrt(np.isfinite(z).sum())
    # RESTWAV is each line's vacuum wavelength (FITS WCS Paper III); vacuum H-alpha
    # 6564.61 A and [N II] 6585.27 A (NIST ASD; from memory)
    assert fits.getheader(out / "moment1_Halpha.fits")["RESTWAV"] * 1e10 == pytest.approx(6564.61, abs=0.02)
    assert fits.getheader(out / "moment1_NII_6583.fits")["RESTWAV"] * 1e10 == pytest.approx(6585.27, abs=0.03)


def test_unknown_line_is_one_clear_error(tmp_path):
    path = tmp_path / "c.fits"
    optical_cube(path, ny=2, nx=2)
    code, _, err = run_cli("maps", str(path), "--lines", "Halpha,NotALine", "--out",
                           str(tmp_path / "o"), "--no-progress")
    assert code == 2 and err.count("\n") == 1, err
    assert "NotALine" in err
    assert not (tmp_path / "o").exists()
