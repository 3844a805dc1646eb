"""Timings of the 3D ring fit (a script, not a test): one model cube of 64 x 64 x 100,
and a fit of an invented 64 x 64 x 100 cube with about 8 rings.

    PYTHONPATH=src .venv/bin/python benchmarks/rings3d.py
"""
import sys
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests" / "rings"))
from _mock3d import mock_disk  # noqa: E402

import kinemap  # noqa: E402
from kinemap.rings.disk3d import DiskModel  # noqa: E402

n = 8
radii = (np.arange(n) + 0.5) * 6.0
model = DiskModel((100, 64, 64), np.array([[-2.0, 0], [0, 2.0]]), np.arange(100) * 4.0 - 200,
                  radii, 6.0, beam=(12.0, 12.0, 0.0))
p = dict(v_rot=np.full(n, 150.0), v_exp=0.0, dispersion=np.full(n, 10.0),
         surface_brightness=np.exp(-radii / 20), x_center=31.5, y_center=32.0,
         position_angle=30.0, inclination=60.0, v_sys=0.0)
model.render(p)  # compile
ts = []
for _ in range(10):
    t = time.perf_counter()
    model.render(p)
    ts.append(time.perf_counter() - t)
print(f"model cube 64x64x100: {min(ts) * 1e3:.1f} ms (best of 10), median {np.median(ts) * 1e3:.1f} ms")

hdu, _ = mock_disk(n=64, pix=3.0, nchan=100, dv=4.0, beam=18.0, noise=0.001, r_max=80,
                   center=(31.4, 32.3))
cube = kinemap.read_cube(hdu)
with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    t = time.perf_counter()
    res = kinemap.fit_rings_3d(cube)
print(f"fit 64x64x100, {len(res.table)} rings: {time.perf_counter() - t:.1f} s; stages {res.timings}")
