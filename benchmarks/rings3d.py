"""Timings of the 3D ring fit (a script, not a test).

Every figure is printed beside a baseline measured in the same run, as a ratio, so that
runs on a loaded machine can be compared: the fit time in units of one model cube of the
same size (how many model renders the fit costs), and against the 2D route on the same
cube (mask, moments and the 2D ring fit of moment 1), which the 3D fit runs first for its
first guesses (its 'first_guess' timing).

    PYTHONPATH=src .venv/bin/python benchmarks/rings3d.py          # 64 x 64 x 100, ~10 rings
    PYTHONPATH=src .venv/bin/python benchmarks/rings3d.py --big    # also 256 x 256 x 128, 20 rings
"""
import argparse
import os
import sys
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests" / "rings"))
from _mock3d import mock_disk  # noqa: E402

import kinemap  # noqa: E402
from kinemap.rings.disk3d import DiskModel  # noqa: E402


def model_time(shape, n, pix, beam, dv):
    """Best and median of 10 renders of a model cube of ``shape`` with ``n`` rings."""
    radii = (np.arange(n) + 0.5) * beam / 2
    model = DiskModel(shape, np.array([[-pix, 0], [0, pix]]),
                      (np.arange(shape[0]) - shape[0] / 2) * dv, radii, beam / 2,
                      beam=(beam, beam, 0.0))
    p = dict(v_rot=np.full(n, 150.0), v_exp=0.0, dispersion=np.full(n, 10.0),
             surface_brightness=np.exp(-radii / radii[-1]), x_center=shape[2] / 2 - 0.5,
             y_center=shape[1] / 2, position_angle=30.0, inclination=60.0, v_sys=0.0)
    model.render(p)  # compile
    ts = []
    for _ in range(10):
        t = time.perf_counter()
        model.render(p)
        ts.append(time.perf_counter() - t)
    return min(ts), float(np.median(ts))


def fit_case(label, mock_kw, ring_width=None):
    hdu, _ = mock_disk(**mock_kw)
    cube = kinemap.read_cube(hdu)
    n = mock_kw["n"]
    best, med = model_time(cube.shape, 10, mock_kw["pix"], mock_kw["beam"], mock_kw["dv"])
    print(f"{label}: load average {os.getloadavg()[0]:.1f}; model cube {best * 1e3:.0f} ms "
          f"(best of 10), median {med * 1e3:.0f} ms", flush=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = time.perf_counter()
        res = kinemap.fit_rings_3d(cube, ring_width=ring_width)
        t3d = time.perf_counter() - t
    t2d = res.timings["first_guess"]
    stages = ", ".join(f"{k} {v:.1f}" for k, v in res.timings.items() if v >= 0.05)
    print(f"{label} ({n} x {n} x {cube.shape[0]}, {len(res.table)} rings): 3D fit {t3d:.1f} s "
          f"= {t3d / med:.0f} model cubes = {t3d / t2d:.1f} x the 2D route ({t2d:.1f} s); "
          f"load average {os.getloadavg()[0]:.1f}\n  stages (s): {stages}", flush=True)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--big", action="store_true", help="also the 256 x 256 x 128 cube")
    args = ap.parse_args()
    fit_case("small", dict(n=64, pix=3.0, nchan=100, dv=4.0, beam=18.0, noise=0.001, r_max=80,
                           center=(31.4, 32.3)))
    if args.big:
        # 20 rings of half a beam: beam 16 arcsec, disk radius 160 arcsec
        fit_case("big", dict(n=256, pix=1.5, nchan=128, dv=4.0, beam=16.0, noise=0.001,
                             r_max=170, center=(127.4, 128.3), sub=3,
                             vrot=lambda r: 150 * (1 - np.exp(-r / 30.0)),
                             sigma=lambda r: np.exp(-r / 60.0)))


if __name__ == "__main__":
    main()
