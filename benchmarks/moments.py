"""Moment maps: kinemap against spectral-cube, whole process against whole process.

Usage:  .venv/bin/python benchmarks/moments.py [--size 512 --nchan 256]

Both sides run as fresh processes on the same generated 512 x 512 x 256 cube (256 MB) and
write their maps to FITS:
  spectral-cube: read, moment0, moment1, linewidth_sigma, write three FITS files
  kinemap:       `kinemap maps --no-mask --no-plots` (also makes peak, velocity at peak,
                 channel count, noise and the three error maps)
The ratio printed is spectral-cube time / kinemap time.
"""
import argparse
import os
import subprocess
import sys
import tempfile
import time

sys.path.insert(0, os.path.dirname(__file__))
from _cubes import write_line_cube  # noqa: E402

SPECTRAL_CUBE = r"""
import sys, warnings
import astropy.units as u
from spectral_cube import SpectralCube
warnings.simplefilter("ignore")
cube = SpectralCube.read(sys.argv[1]).with_spectral_unit(u.km / u.s)
cube.allow_huge_operations = True
out = sys.argv[2]
cube.moment0().write(out + "/m0.fits", overwrite=True)
cube.moment1().write(out + "/m1.fits", overwrite=True)
cube.linewidth_sigma().write(out + "/m2.fits", overwrite=True)
"""


def timed(cmd):
    t0 = time.perf_counter()
    p = subprocess.run(cmd, capture_output=True, text=True)
    dt = time.perf_counter() - t0
    if p.returncode:
        sys.exit(f"failed: {' '.join(cmd)}\n{p.stderr}")
    return dt


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--size", type=int, default=512)
    ap.add_argument("--nchan", type=int, default=256)
    ap.add_argument("--repeat", type=int, default=2)
    args = ap.parse_args()
    bindir = os.path.dirname(sys.executable)
    with tempfile.TemporaryDirectory() as tmp:
        cube = os.path.join(tmp, "cube.fits")
        write_line_cube(cube, nx=args.size, ny=args.size, nchan=args.nchan)
        mb = os.path.getsize(cube) / 1e6
        print(f"cube {args.size} x {args.size} x {args.nchan} ({mb:.0f} MB)")
        t_sc, t_km = [], []
        for i in range(args.repeat):
            out = os.path.join(tmp, f"sc{i}")
            os.mkdir(out)
            t_sc.append(timed([sys.executable, "-c", SPECTRAL_CUBE, cube, out]))
            t_km.append(timed([os.path.join(bindir, "kinemap"), "maps", cube, "--no-mask",
                               "--no-plots", "--no-progress", "--out", os.path.join(tmp, f"km{i}")]))
        sc, km = min(t_sc), min(t_km)
        print(f"spectral-cube moment0+moment1+linewidth_sigma: {sc:6.2f} s (best of {args.repeat})")
        print(f"kinemap maps --method moments --no-mask:       {km:6.2f} s (best of {args.repeat})")
        print(f"speed-up (spectral-cube / kinemap): {sc / km:.1f}x")


if __name__ == "__main__":
    main()
