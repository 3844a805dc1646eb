"""A width budget with no valid pixel is refused with its reason (benchmarks/fuzz.py: a
spectral axis with 1 Hz channels wrote all-NaN budgets with exit 0)."""
from __future__ import annotations

import numpy as np
import pytest
from conftest import gaussian_cube, make_header, write_cube

from kinemap import KinemapError, line_widths, read_cube


def _hi_cube(tmp_path, sigma_kms):
    """An HI line (VRAD axis, 1 km/s channels) of the given Gaussian sigma, S/N 30."""
    h = make_header("VRAD", nchan=80, ny=4, nx=4, crval=-40.0, cdelt=1.0, cunit="km/s",
                    extra={"RESTFRQ": 1.420405751768e9})
    data = gaussian_cube(80, 4, 4, centre_chan=40.0, sigma_chan=sigma_kms, amp=3.0, noise=0.1,
                         seed=8)
    return read_cube(write_cube(tmp_path / "hi.fits", data, h))


def test_lines_narrower_than_thermal_everywhere_are_refused(tmp_path):
    # hydrogen at 1e4 K has sigma_th 9.08 km/s (Spitzer 1978), so 1e6 K gives 90.8 km/s,
    # far wider than these 3 km/s lines: no pixel has room for non-thermal motions
    cube = _hi_cube(tmp_path, 3.0)
    with pytest.raises(KinemapError, match=r"no pixel has a line-width budget \(16 of 16 "
                       r"pixels: width below instrumental \+ thermal\); check the temperature"):
        line_widths(cube, lines="HI_21cm", temperature="1e6 K")


def test_a_valid_budget_is_kept(tmp_path):
    # 12 km/s lines at 1e4 K: sigma_nt = sqrt(12^2 - 9.08^2) = 7.85 km/s (Spitzer 1978 for
    # the thermal part; the channel response of 1 km/s top-hat channels is removed by the fit)
    wb = line_widths(_hi_cube(tmp_path, 12.0), lines="HI_21cm", temperature="1e4 K")
    nt = wb.budget.nonthermal_dispersion
    assert np.isfinite(nt).all()
    np.testing.assert_allclose(np.median(nt), np.sqrt(12.0**2 - 9.08**2), atol=0.4)
