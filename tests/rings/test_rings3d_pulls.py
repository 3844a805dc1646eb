"""Pull tests of the 3D fit's formal errors on noise realisations of a known cube.

The noiseless cube is the independent mock of tests/rings/_mock3d.py (sub-pixel sky
sampling, scipy's gaussian_filter beam); every realisation adds seeded noise correlated
like the beam (white noise smoothed by beam / sqrt(2): its correlation is the beam, the
assumption the sandwich covariance makes, and the usual one for interferometer images).
The geometry is held at the truth and only the rings' v_rot and dispersion are fitted:
this is the final pass of :func:`kinemap.fit_rings_3d`, whose covariance gives the
``v_rot_err_formal`` / ``dispersion_err_formal`` columns (the combined ``v_rot_err`` also
holds the halves' difference, which is not a noise error and is left out here).

Check: for a calibrated error, (fit - truth) / err has unit standard deviation over the
realisations (the definition of a pull; common practice); the issue asks [0.8, 1.25].
The constant offset of each ring (the model's linear interpolation between rings against
the mock's smooth curve, and the penalty's pull towards a straighter curve) does not
enter a standard deviation.  The final pass's set-up is copied here: the surface
brightness solved from each realisation's moment 0 and held, the smoothness penalty,
the covariance with both.
"""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

import kinemap
from kinemap.rings import fit3d
from kinemap.rings._stage3d_run import _smooth_weight
from kinemap.rings.disk3d import DiskModel
from kinemap.rings.grid import SkyGrid

sys.path.insert(0, str(Path(__file__).parent))
from _mock3d import mock_disk  # noqa: E402

N_REAL = 50
KW = dict(n=16, pix=8.0, nchan=20, dv=8.0, beam=24.0, r_max=50, pa=40.0, inc=60.0, vsys=0.0,
          vrot=lambda r: 80 * (1 - np.exp(-r / 20.0)), disp=lambda r: 12.0 + 0 * r,
          sigma=lambda r: np.exp(-r / 30.0), center=(7.6, 7.8))
# 1/20 of the cube's peak (0.0170): moderate S/N, where the errors used to be too small
# (inner ring's v_rot pull 1.7) until the covariance took in the noise the surface
# brightness brings from moment 0 and the rings, half a beam wide, were kept from trading
# v_rot by the smoothness penalty (at 'auto', 0.0625 here)
NOISE = 0.0170 / 20
RADII = np.array([12.0, 24.0, 36.0])
WIDTH, BEAM = 12.0, 24.0


def _problem(data, mask, model):
    weight = np.full(data.shape[1:], 1.0 / NOISE)
    return fit3d.Problem(model, data, mask, weight, data.sum(axis=0) * abs(model.dv),
                         mask.any(axis=0), "chi2")


def test_formal_errors_of_v_rot_and_dispersion_are_calibrated():
    clean, truth = mock_disk(noise=0.0, **KW)
    cube = kinemap.read_cube(clean)
    jac = np.asarray(SkyGrid.from_wcs(cube.meta.wcs, shape=cube.shape[1:]).jacobian)
    model = DiskModel(cube.shape, jac, cube.velocity, RADII, WIDTH, beam=(BEAM, BEAM, 0.0))
    assert abs(np.max(clean.data) / NOISE - 20) < 0.5
    smooth = _smooth_weight("auto", WIDTH, BEAM)
    mask = np.asarray(clean.data) > 0.05 * np.max(clean.data)  # the same voxels every time
    n = RADII.size
    p0 = dict(v_rot=truth["vrot"](RADII), v_exp=np.zeros(n), dispersion=truth["disp"](RADII),
              x_center=KW["center"][0], y_center=KW["center"][1], position_angle=KW["pa"],
              inclination=KW["inc"], v_sys=KW["vsys"])
    free = [("v_rot", k) for k in range(n)] + [("dispersion", k) for k in range(n)]
    fits_, errs = [], []
    for seed in range(N_REAL):
        hdu, _ = mock_disk(noise=NOISE, seed=1000 + seed, **KW)
        prob = _problem(np.asarray(hdu.data, float), mask, model)
        p = dict(p0, surface_brightness=prob.surface_brightness(p0))
        q, res, J = fit3d.fit_params(prob, p, free, max_nfev=30, smooth=smooth)
        cov, _ = fit3d.covariance(prob, J, res.fun, n_free=len(free), penalty=res.penalty, p=q)
        fits_.append(np.r_[q["v_rot"], q["dispersion"]])
        errs.append(np.sqrt(np.diag(cov)))
    fits_, errs = np.array(fits_), np.array(errs)
    pulls = (fits_ - np.r_[truth["vrot"](RADII), truth["disp"](RADII)]) / errs
    # each ring's pulls scatter about that ring's own offset: widths per ring, combined
    per_ring = np.std(pulls, axis=0)
    width_v = float(np.sqrt(np.mean(per_ring[:n] ** 2)))
    width_d = float(np.sqrt(np.mean(per_ring[n:] ** 2)))
    print(f"pull widths: v_rot {width_v:.3f}, dispersion {width_d:.3f}; per ring "
          f"{np.round(per_ring, 3)}")
    assert 0.8 <= width_v <= 1.25
    assert 0.8 <= width_d <= 1.25
