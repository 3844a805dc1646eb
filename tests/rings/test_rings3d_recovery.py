"""Recovery of a poorly resolved invented disk: the 3D fit finds the geometry and the
rotation the 2D route misses.  Truth: the seeded mock of tests/rings/_mock3d.py (made by an
independent code path: sub-pixel sky sampling and scipy's gaussian_filter for the beam)."""
from __future__ import annotations

import sys
import warnings
from pathlib import Path

import numpy as np

import kinemap
from kinemap.rings.stage3d import fit_rings_3d

sys.path.insert(0, str(Path(__file__).parent))
from _mock3d import mock_disk  # noqa: E402


def test_poorly_resolved_disk_3d_recovers_what_2d_misses():
    hdu, truth = mock_disk(n=32, pix=8.0, beam=40.0, noise=0.001, r_max=100,
                           vrot=lambda r: 100 * (1 - np.exp(-r / 25.0)),
                           sigma=lambda r: np.exp(-r / 35.0), center=(15.6, 16.2), inc=58.0)
    cube = kinemap.read_cube(hdu)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = fit_rings_3d(cube, stages=(1, 3))
    g = res.geometry
    # issue 10: 3D within 4 deg where 2D is off (beam 40", disk radius 100")
    assert abs(g["inclination"] - truth["inc"]) < 4.0
    assert abs(g["position_angle"] - truth["pa"]) < 4.0
    inc2d = res.rings_2d.result.global_geometry["inclination"].value
    assert abs(inc2d - truth["inc"]) > 8.0
    t = res.table
    r = t["radius"].value
    dv = np.abs(t["v_rot"].value - truth["vrot"](r))
    # issue 10: within 8 km/s (measured 6.9 km/s in the innermost ring, where the curve
    # rises most steeply and the smoothness penalty pulls; 8.9 before the penalty)
    assert np.nanmax(dv) < 8.0
    assert np.all(np.isfinite(t["v_rot_err"])) and np.all(t["v_rot_err"].value > 0)
    # products: model and residual cubes on the cube's grid
    assert res.model_cube.shape == cube.shape and res.residual_cube.shape == cube.shape
