"""Moment maps: kinemap against spectral-cube, whole process against whole process.

Usage:  .venv/bin/python benchmarks/moments.py [--size 512 --nchan 256]

Both sides run as fresh processes on the same generated 512 x 512 x 256 cube (256 MB) and
write their maps to FITS:
  spectral-cube: read, moment0, moment1, linewidth_sigma, write three FITS files
  kinemap:       `kinemap maps --no-mask --no-plots --continuum none` (also makes peak,
                 velocity at peak, channel count, noise and the three error maps; spectral-cube
                 does not look for a continuum either)
  kinemap with its default PNGs (eleven map plots), for the plot overhead
  kinemap with the default continuum check (--continuum auto), once, for information
The ratios printed are spectral-cube time / kinemap time (FITS only) and the plots' extra
time / the FITS-only time, from the best of --repeat runs; each time is printed with the
1-minute load average read before it (the machine may be shared).
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


def load() -> str:
    return "load " + " ".join(f"{x:.2f}" for x in os.getloadavg())


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
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    bindir = os.path.dirname(sys.executable)
    with tempfile.TemporaryDirectory() as tmp:
        cube = os.path.join(tmp, "cube.fits")
        write_line_cube(cube, nx=args.size, ny=args.size, nchan=args.nchan)
        mb = os.path.getsize(cube) / 1e6
        print(f"cube {args.size} x {args.size} x {args.nchan} ({mb:.0f} MB)")
        km = os.path.join(bindir, "kinemap")

        def kinemap(i, *extra):
            return timed([km, "maps", cube, "--no-mask", "--no-progress", "--out",
                          os.path.join(tmp, f"km{i}-{len(extra)}"), *extra])

        times = {"spectral-cube": [], "kinemap FITS only": [], "kinemap with PNGs": []}
        for i in range(args.repeat):
            out = os.path.join(tmp, f"sc{i}")
            os.mkdir(out)
            for name, run in (
                    ("spectral-cube", lambda: timed([sys.executable, "-c", SPECTRAL_CUBE, cube, out])),
                    ("kinemap FITS only", lambda: kinemap(i, "--no-plots", "--continuum", "none")),
                    ("kinemap with PNGs", lambda: kinemap(i, "--continuum", "none"))):
                la = load()
                times[name].append(run())
                print(f"{name:20s} {times[name][-1]:6.2f} s ({la})")
        la = load()
        auto = kinemap("auto", "--no-plots", "--continuum", "auto")
        print(f"{'kinemap FITS only, --continuum auto':20s} {auto:6.2f} s ({la})")
        sc, fits_only, pngs = (min(times[k]) for k in times)
        print(f"best of {args.repeat}: spectral-cube {sc:.2f} s, kinemap FITS only {fits_only:.2f} s, "
              f"with PNGs {pngs:.2f} s")
        print(f"speed-up (spectral-cube / kinemap FITS only): {sc / fits_only:.1f}x (aim: 5x)")
        print(f"plot overhead (with PNGs - FITS only) / FITS only: "
              f"{(pngs - fits_only) / fits_only:.2f} (aim: at most 0.5)")

if __name__ == "__main__":
    main()
