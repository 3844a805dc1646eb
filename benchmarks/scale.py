"""Scale: a cube larger than the memory bound, and the speed-up from worker processes.

Usage:  .venv/bin/python benchmarks/scale.py [--size 1024 --nchan 1024] [--fits-only]

1. Writes a seeded cube of at least 4 GB plane by plane (never whole in memory), runs
   `kinemap maps --method moments --mask threshold --max-memory 1GB` on it in a fresh
   process and reports wall time and the peak resident memory of that process (goal:
   under 1.5 GB).  Baseline in the same run: the time to read the file once (cat to
   /dev/null), i.e. how close the moments pass comes to pure I/O.
2. Gaussian fits on a smaller cube with `--workers 1` and `--workers 2` (local cluster of
   worker processes) and reports the speed-up (goal: at least 1.7x on 2 cores).
This is a benchmark, not a test: CI does not run it.
"""
import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time

sys.path.insert(0, os.path.dirname(__file__))
from _cubes import write_line_cube  # noqa: E402

BIN = os.path.dirname(sys.executable)


def run(cmd):
    """Wall time and peak RSS (GB) of a child process."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    t0 = time.perf_counter()
    p = subprocess.run(cmd, capture_output=True, text=True)
    dt = time.perf_counter() - t0
    if p.returncode:
        sys.exit(f"failed: {' '.join(cmd)}\n{p.stderr}")
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    return dt, max(peak, before) / 1e6  # ru_maxrss is in kB on Linux


def moments_case(tmp, size, nchan):
    cube = os.path.join(tmp, "big.fits")
    t0 = time.perf_counter()
    write_line_cube(cube, nx=size, ny=size, nchan=nchan, seed=4)
    gb = os.path.getsize(cube) / 1e9
    print(f"wrote {size} x {size} x {nchan} cube, {gb:.2f} GB, in {time.perf_counter() - t0:.0f} s")
    t0 = time.perf_counter()
    with open(cube, "rb") as fh:
        while fh.read(1 << 24):
            pass
    t_read = time.perf_counter() - t0
    dt, rss = run([os.path.join(BIN, "kinemap"), "maps", cube, "--mask", "threshold",
                   "--max-memory", "1GB", "--no-plots", "--no-progress",
                   "--out", os.path.join(tmp, "out-moments")])
    print(f"read the file once:                   {t_read:7.1f} s (baseline)")
    print(f"kinemap maps --max-memory 1GB:        {dt:7.1f} s, peak RSS {rss:.2f} GB "
          f"({'under' if rss < 1.5 else 'OVER'} the 1.5 GB bound)")
    print(f"moments pass / one read of the file:  {dt / t_read:7.2f}x")
    os.remove(cube)


def fits_case(tmp):
    """Fit stage with --components auto (1-3 Gaussians by BIC, the costly path) in this
    process (numba threads) and on local clusters of 1 and 2 worker processes.  The
    figure compared is the fit stage's time from manifest.json (cluster start-up, which
    is the same for both, is reported separately through the whole-command time)."""
    import json

    cube = os.path.join(tmp, "fit.fits")
    write_line_cube(cube, nx=256, ny=256, nchan=128, seed=5)
    stage = {}
    for label, extra in (("in-process (2 numba threads)", []), ("1 worker process", ["--workers", "1"]),
                         ("2 worker processes", ["--workers", "2"])):
        out = os.path.join(tmp, "out-fit-" + label.split()[0])
        dt, _ = run([os.path.join(BIN, "kinemap"), "maps", cube, "--method", "gauss",
                     "--components", "auto", "--mask", "threshold", *extra, "--no-plots",
                     "--no-progress", "--out", out])
        with open(os.path.join(out, "manifest.json")) as fh:
            stage[label] = json.load(fh)["timings"]["fit"]
        print(f"gauss fits (auto), {label:30s}: fit stage {stage[label]:6.1f} s, whole command {dt:6.1f} s")
    one, two = stage["1 worker process"], stage["2 worker processes"]
    print(f"speed-up of the fit stage, 1 -> 2 worker processes: {one / two:.2f}x (aim 1.7x)")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--size", type=int, default=1024)
    ap.add_argument("--nchan", type=int, default=1024)
    ap.add_argument("--fits-only", action="store_true")
    ap.add_argument("--moments-only", action="store_true")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(dir=os.environ.get("KINEMAP_BENCH_TMP")) as tmp:
        if not args.fits_only:
            moments_case(tmp, args.size, args.nchan)
        if not args.moments_only:
            fits_case(tmp)


if __name__ == "__main__":
    main()
