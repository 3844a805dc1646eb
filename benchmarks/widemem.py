"""Peak memory of `kinemap maps` on cubes with very wide planes and few channels.

Usage:  .venv/bin/python benchmarks/widemem.py [--size 8000 --nchan 10 --max-memory 1GB]
        [--fits-only]

A cube of size x size x nchan (float32; 8000 x 8000 x 10 is 2.6 GB, and --size 20000 gives
the 16 GB cube of the reliability issue) is written band by band, then
`kinemap maps --method moments --no-mask --max-memory M` runs on it in a fresh process, with and
without its PNGs.  Such a cube makes more map values than it has data: eleven float64 maps
of 8000 x 8000 are 5.6 GB.  Baseline in the same run: the same command on a 64 x 64 cube
(the start-up: Python, astropy, numba and their libraries).  Printed: each run's peak
resident memory, that peak minus the start-up's, and the ratio of the latter to M (goal:
at most 1, i.e. `--max-memory` bounds what the run adds).  Each child starts with a small
parent (the cubes are written by children too), so no memory of this script is counted.  This is a benchmark, not a test.
"""
import argparse
import os
import subprocess
import sys
import tempfile
import time

KINEMAP = [sys.executable, "-c", "import sys; from kinemap.cli import main; sys.exit(main())"]


def peak_run(cube, out, max_memory, extra=()):
    """(seconds, peak RSS in MB) of one kinemap run, measured with wait4 on that child."""
    cmd = KINEMAP + ["maps", cube, "--method", "moments", "--no-mask", "--out", out, "--overwrite",
                     "--max-memory", max_memory, *extra]
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    _, status, usage = os.wait4(proc.pid, 0)
    dt = time.perf_counter() - t0
    err = proc.stderr.read()
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode:
        sys.exit(f"failed: {' '.join(cmd)}\n{err}")
    return dt, usage.ru_maxrss / 1024  # kB on Linux


def _write(path, size, nchan):
    subprocess.run([sys.executable, "-c", "import sys; sys.path.insert(0, sys.argv[1]); "
                    "from _cubes import write_wide_cube; write_wide_cube(sys.argv[2], "
                    "nx=int(sys.argv[3]), ny=int(sys.argv[3]), nchan=int(sys.argv[4]))",
                    os.path.dirname(os.path.abspath(__file__)), path, str(size), str(nchan)],
                   check=True)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--size", type=int, default=8000)
    ap.add_argument("--nchan", type=int, default=10)
    ap.add_argument("--max-memory", default="1GB")
    ap.add_argument("--fits-only", action="store_true", help="skip the run with PNGs")
    args = ap.parse_args()
    from kinemap.pipeline.values import parse_size

    limit_mb = parse_size(args.max_memory) / 2**20
    with tempfile.TemporaryDirectory(prefix="kinemap-widemem-") as tmp:
        small, big = os.path.join(tmp, "small.fits"), os.path.join(tmp, "wide.fits")
        # cubes are written by child processes: a child started by a large parent may
        # count the parent's pages in its peak until it execs
        _write(small, 64, args.nchan)
        t0 = time.perf_counter()
        _write(big, args.size, args.nchan)
        gb = os.path.getsize(big) / 1e9
        print(f"cube {args.size} x {args.size} x {args.nchan}: {gb:.2f} GB written in "
              f"{time.perf_counter() - t0:.0f} s; maps of float64 would take "
              f"{11 * 8 * args.size**2 / 2**30:.1f} GiB; --max-memory {args.max_memory}")
        _, base = peak_run(small, os.path.join(tmp, "o0"), args.max_memory, ["--no-plots"])
        print(f"start-up (64 x 64 cube): peak {base:.0f} MB   load {os.getloadavg()[0]:.2f}")
        cases = (("FITS only", ["--no-plots"]), ("with PNGs", []))
        for label, extra in cases[:1] if args.fits_only else cases:
            dt, peak = peak_run(big, os.path.join(tmp, "o1"), args.max_memory, extra)
            print(f"{label:10s}: {dt:6.1f} s, peak {peak:6.0f} MB, above start-up "
                  f"{peak - base:6.0f} MB = {(peak - base) / limit_mb:.2f} x --max-memory   "
                  f"load {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
