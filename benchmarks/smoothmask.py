"""The smooth-and-mask signal mask: the current block-wise code against a baseline commit's
whole-cube scipy code, in the same run, on the same cube, each in a fresh process.

Usage:  .venv/bin/python benchmarks/smoothmask.py [--size 512 --nchan 256]
                                                  [--baseline 25ec57c] [--repeat 3]

The baseline's ``maps/masks.py`` is taken from git (``git show``) into a temporary folder
and imported there (it smoothed float32 copies of the whole cube with scipy.ndimage and
grew the seeds with binary_propagation).  Both sides get the same cube (the rotating disk
of ``_cubes.write_line_cube``, with its beam) and the same noise map (today's
``estimate_noise`` in both); each side's process reads the cube, makes the mask and reports
the wall time of ``make_mask`` and its peak resident memory.  Prints best-of-``--repeat`` times with the load
average, the ratio baseline / current for time and memory, and whether the masks agree
(the number of voxels that differ; 0 is expected).
"""
import argparse
import os
import subprocess
import sys
import tempfile

sys.path.insert(0, os.path.dirname(__file__))
from _cubes import load, write_line_cube  # noqa: E402

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

CHILD = r"""
import resource, sys, time, warnings
import numpy as np
warnings.simplefilter("ignore")
import kinemap
cube_path, out_path, which = sys.argv[1:4]
if which == "baseline":
    sys.path.insert(0, sys.argv[4])
    from old_masks import make_mask
else:
    from kinemap.maps.masks import make_mask
cube = kinemap.read_cube(cube_path)
noise = kinemap.estimate_noise(cube)
t = time.perf_counter()
m = make_mask(cube, noise=noise, method="smooth")
dt = time.perf_counter() - t
np.save(out_path, np.packbits(m.mask))
print(dt, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, int(m.mask.sum()))
"""


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--size", type=int, default=512)
    ap.add_argument("--nchan", type=int, default=256)
    ap.add_argument("--baseline", default="25ec57c")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    import numpy as np

    with tempfile.TemporaryDirectory() as tmp:
        src = subprocess.run(["git", "-C", ROOT, "show", f"{args.baseline}:src/kinemap/maps/masks.py"],
                             capture_output=True, text=True, check=True).stdout
        with open(os.path.join(tmp, "old_masks.py"), "w") as fh:
            fh.write(src)
        cube = os.path.join(tmp, "cube.fits")
        write_line_cube(cube, nx=args.size, ny=args.size, nchan=args.nchan)
        print(f"cube {args.size} x {args.size} x {args.nchan} "
              f"({os.path.getsize(cube) / 1e6:.0f} MB), baseline {args.baseline}")
        best = {}
        for i in range(args.repeat):
            for which in ("baseline", "current"):
                la = load()
                out = os.path.join(tmp, f"{which}.npy")
                p = subprocess.run([sys.executable, "-c", CHILD, cube, out, which, tmp],
                                   capture_output=True, text=True)
                if p.returncode:
                    sys.exit(f"{which} failed:\n{p.stderr}")
                dt, rss, n = p.stdout.split()[-3:]
                dt, rss = float(dt), float(rss)
                print(f"{which:9s} make_mask {dt:6.2f} s, peak memory {rss:7.0f} MB, "
                      f"{int(n)} voxels ({la})")
                b = best.setdefault(which, [dt, rss])
                best[which] = [min(b[0], dt), min(b[1], rss)]
        a, b = (np.unpackbits(np.load(os.path.join(tmp, f"{w}.npy"))) for w in ("baseline", "current"))
        (t0, m0), (t1, m1) = best["baseline"], best["current"]
        print(f"best of {args.repeat}: baseline {t0:.2f} s / {m0:.0f} MB, current {t1:.2f} s / {m1:.0f} MB")
        print(f"speed-up {t0 / t1:.1f}x, peak memory {m0 / m1:.1f}x smaller (whole process, "
              f"cube read lazily); voxels that differ: {int(np.count_nonzero(a != b))}")


if __name__ == "__main__":
    main()
