"""A 4.3 GB cube's moment maps against one plain read of the same file, same run.

Usage:  .venv/bin/python benchmarks/bigcube.py [--size 1024 --nchan 1024] [--repeat 3]
                                              [--cube existing.fits] [--dir /tmp]

1. Writes a seeded 1024 x 1024 x 1024 float32 cube (big-endian, as FITS stores it; 4.3 GB)
   plane by plane into a temporary folder under ``--dir`` (checks the free space first and
   deletes the cube at the end), unless ``--cube`` names one.
2. Baseline: one read-and-byteswap pass over the file (64 MB ``readinto`` chunks, numpy
   byteswap), in this process, from the page cache (the first of the passes warms it).
3. ``kinemap maps --method moments --no-mask --no-plots --max-memory 1GB --continuum none``
   in a fresh process, ``--repeat`` times; the manifest's per-stage timings are printed
   too.  ``--continuum-auto`` also times one run with the default continuum check, which
   is a separate numpy pass and (so far) far slower than everything else.

Prints every time with the 1-minute load average read just before it (the machine may be
shared), and the ratio kinemap / read pass of the best times.
"""
import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time

import numpy as np

sys.path.insert(0, os.path.dirname(__file__))
from _cubes import load, write_line_cube  # noqa: E402

CHUNK = 64 << 20


def read_pass(path) -> float:
    """Seconds to read ``path`` once into a reused buffer and byteswap each chunk."""
    buf = np.empty(CHUNK // 4, dtype=">f4")
    view = memoryview(buf).cast("B")
    t0 = time.perf_counter()
    with open(path, "rb", buffering=0) as fh:
        while True:
            n = fh.readinto(view)
            if not n:
                break
            buf[: n // 4].byteswap(inplace=True)
    return time.perf_counter() - t0


def kinemap_run(cube, out, extra=()):
    cmd = [os.path.join(os.path.dirname(sys.executable), "kinemap"), "maps", cube,
           "--method", "moments", "--no-mask", "--no-plots", "--max-memory", "1GB",
           "--no-progress", "--out", out, *(extra or ["--continuum", "none"])]
    t0 = time.perf_counter()
    p = subprocess.run(cmd, capture_output=True, text=True)
    dt = time.perf_counter() - t0
    if p.returncode:
        sys.exit(f"failed: {' '.join(cmd)}\n{p.stderr}")
    with open(os.path.join(out, "manifest.json")) as fh:
        timings = json.load(fh)["timings"]
    shutil.rmtree(out)
    return dt, timings


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--size", type=int, default=1024)
    ap.add_argument("--nchan", type=int, default=1024)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--cube", help="use this cube instead of writing one (kept)")
    ap.add_argument("--dir", default=tempfile.gettempdir(), help="where to write the cube")
    ap.add_argument("--continuum-auto", action="store_true",
                    help="also time one run with the default --continuum auto")
    args = ap.parse_args()
    tmp = tempfile.mkdtemp(prefix="kinemap-bigcube-", dir=args.dir)
    try:
        cube = args.cube
        if cube is None:
            need = 4 * args.size * args.size * args.nchan * 1.05
            free = shutil.disk_usage(tmp).free
            if free < need:
                sys.exit(f"needs {need / 1e9:.1f} GB free in {tmp}, has {free / 1e9:.1f} GB")
            cube = os.path.join(tmp, "cube.fits")
            t0 = time.perf_counter()
            write_line_cube(cube, nx=args.size, ny=args.size, nchan=args.nchan, seed=4)
            print(f"wrote the cube in {time.perf_counter() - t0:.0f} s")
        print(f"cube {args.size} x {args.size} x {args.nchan}, {os.path.getsize(cube) / 1e9:.2f} GB,"
              f" {os.cpu_count()} cores")
        reads, runs = [], []
        for i in range(args.repeat + 1):
            la = load()
            reads.append(read_pass(cube))
            print(f"read-and-byteswap pass:   {reads[-1]:6.2f} s ({la})"
                  + ("  [warms the page cache, not counted]" if i == 0 else ""))
        reads = reads[1:]
        for i in range(args.repeat):
            la = load()
            dt, timings = kinemap_run(cube, os.path.join(tmp, f"out{i}"))
            runs.append(dt)
            stages = ", ".join(f"{k} {v:.2f}" for k, v in timings.items())
            print(f"kinemap maps (whole process): {dt:6.2f} s ({la}); stages: {stages}; "
                  f"noise+moments pass alone {timings.get('noise+moments', float('nan')) / min(reads):.1f}x"
                  " the read pass")
        print(f"ratio kinemap / read pass (best of each): {min(runs) / min(reads):.1f}x "
              f"(aim: at most 10x)")
        if args.continuum_auto:
            la = load()
            dt, timings = kinemap_run(cube, os.path.join(tmp, "outa"), ["--continuum", "auto"])
            print(f"kinemap maps --continuum auto: {dt:6.2f} s ({la}); "
                  + ", ".join(f"{k} {v:.2f}" for k, v in timings.items())
                  + f"; ratio {dt / min(reads):.1f}x")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
