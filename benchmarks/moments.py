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
  kinemap as a user types it (smooth mask, continuum auto, PNGs), once, for information
The ratios printed are spectral-cube time / kinemap time (FITS only) and the plots' extra
time / the FITS-only time, from the best of --repeat runs; each time is printed with the
1-minute load average read before it (the machine may be shared).

With --per-plot, each default map PNG is also timed in this process (CPU time of the
drawing thread, median of 3): as the writer draws it (plotting.maps.save_map: a kept
figure, the unfiltered PNG writer) against a new figure saved by matplotlib's savefig
(PIL's PNG encoder at zlib level 1), the baseline measured in the same run.
"""
import argparse
import os
import subprocess
import sys
import tempfile
import time

sys.path.insert(0, os.path.dirname(__file__))
from _cubes import load, write_line_cube  # noqa: E402

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


CPU = {}  # command name -> CPU seconds (user + system, the process and its children) of each run


def timed(cmd, name=None):
    """Wall time of ``cmd``; its CPU time (with its own child processes) goes to CPU[name]."""
    import resource

    r0 = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    p = subprocess.run(cmd, capture_output=True, text=True)
    dt = time.perf_counter() - t0
    r1 = resource.getrusage(resource.RUSAGE_CHILDREN)
    if p.returncode:
        sys.exit(f"failed: {' '.join(cmd)}\n{p.stderr}")
    if name:
        CPU.setdefault(name, []).append((r1.ru_utime - r0.ru_utime) + (r1.ru_stime - r0.ru_stime))
    return dt


def per_plot(cube):
    """Per-map CPU time of the writer's PNG drawing against a new figure + savefig."""
    import io
    import warnings

    import numpy as np

    import kinemap
    from kinemap.plotting import maps as pm

    warnings.simplefilter("ignore")
    res = kinemap.compute_moments(kinemap.read_cube(cube))
    maps = [p for p in res.products() if p.plot and np.ndim(p.data) == 2]
    meta, center = res.meta, res.systemic_velocity()

    def general(p):
        fig = pm.plot_map(np.asarray(p.data), meta, title=p.description, unit=p.unit,
                          kind=p.kind, center=center)
        fig.savefig(io.BytesIO(), format="png", dpi=120, pil_kwargs={"compress_level": 1})

    def writer(p):
        pm.save_map(io.BytesIO(), np.asarray(p.data), meta, title=p.description, unit=p.unit,
                    kind=p.kind, center=center)

    def cpu(fn, p):
        t = time.thread_time()
        fn(p)
        return time.thread_time() - t

    for p in maps:  # first drawings: layout template, frame picture, text caches
        general(p)
        writer(p)
    totals = [0.0, 0.0]
    print(f"{'map':20s} {'new figure + savefig':>22s} {'writer':>8s}  ratio ({load()})")
    for p in maps:
        a = float(np.median([cpu(general, p) for _ in range(3)]))
        b = float(np.median([cpu(writer, p) for _ in range(3)]))
        totals[0] += a
        totals[1] += b
        print(f"{p.key:20s} {a * 1e3:19.1f} ms {b * 1e3:5.1f} ms  {b / a:.2f}")
    print(f"{'all ' + str(len(maps)) + ' maps':20s} {totals[0] * 1e3:19.0f} ms {totals[1] * 1e3:5.0f} ms"
          f"  {totals[1] / totals[0]:.2f}")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--size", type=int, default=512)
    ap.add_argument("--nchan", type=int, default=256)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--per-plot", action="store_true",
                    help="also time each map PNG in this process (see the module doc)")
    args = ap.parse_args()
    bindir = os.path.dirname(sys.executable)
    with tempfile.TemporaryDirectory() as tmp:
        cube = os.path.join(tmp, "cube.fits")
        write_line_cube(cube, nx=args.size, ny=args.size, nchan=args.nchan)
        mb = os.path.getsize(cube) / 1e6
        print(f"cube {args.size} x {args.size} x {args.nchan} ({mb:.0f} MB)")
        km = os.path.join(bindir, "kinemap")

        def kinemap(i, *extra, name=None, mask=("--no-mask",)):
            return timed([km, "maps", cube, *mask, "--no-progress", "--out",
                          os.path.join(tmp, f"km{i}-{len(extra)}"), *extra], name)

        times = {"spectral-cube": [], "kinemap FITS only": [], "kinemap with PNGs": []}
        for i in range(args.repeat):
            out = os.path.join(tmp, f"sc{i}")
            os.mkdir(out)
            for name, run in (
                    ("spectral-cube", lambda: timed([sys.executable, "-c", SPECTRAL_CUBE, cube, out])),
                    ("kinemap FITS only", lambda: kinemap(i, "--no-plots", "--continuum", "none",
                                                          name="fits")),
                    ("kinemap with PNGs", lambda: kinemap(i, "--continuum", "none", name="png"))):
                la = load()
                times[name].append(run())
                print(f"{name:20s} {times[name][-1]:6.2f} s ({la})")
        la = load()
        auto = kinemap("auto", "--no-plots", "--continuum", "auto")
        print(f"{'kinemap FITS only, --continuum auto':20s} {auto:6.2f} s ({la})")
        la = load()
        default = kinemap("default", mask=())
        print(f"{'kinemap default (smooth mask, continuum auto, PNGs)':20s} {default:6.2f} s ({la})")
        sc, fits_only, pngs = (min(times[k]) for k in times)
        print(f"best of {args.repeat}: spectral-cube {sc:.2f} s, kinemap FITS only {fits_only:.2f} s, "
              f"with PNGs {pngs:.2f} s")
        print(f"speed-up (spectral-cube / kinemap FITS only): {sc / fits_only:.1f}x (aim: 5x)")
        print(f"plot overhead (with PNGs - FITS only) / FITS only: "
              f"{(pngs - fits_only) / fits_only:.2f} (aim: at most 0.5)")
        import statistics

        mf, mp = (statistics.median(times[k]) for k in ("kinemap FITS only", "kinemap with PNGs"))
        print(f"medians of {args.repeat} (steadier on a shared machine): FITS only {mf:.2f} s, "
              f"with PNGs {mp:.2f} s, overhead {(mp - mf) / mf:.2f}; spectral-cube "
              f"{statistics.median(times['spectral-cube']):.2f} s")
        cf, cp = min(CPU["fits"]), min(CPU["png"])
        print(f"CPU time (user + system, with child processes), best of {args.repeat}: FITS only "
              f"{cf:.2f} s, with PNGs {cp:.2f} s: the PNGs cost {cp - cf:.2f} s of CPU, "
              f"{(cp - cf) / cf:.2f}x the FITS-only run's")
        if args.per_plot:
            per_plot(cube)

if __name__ == "__main__":
    main()
