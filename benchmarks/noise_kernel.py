"""The fused noise+moments kernel (and the standalone noise kernel): the current code against
the code of a baseline commit, in the same run, on the same in-memory data.

Usage:  .venv/bin/python benchmarks/noise_kernel.py [--nchan 1024 --npix 65536]
                                                    [--baseline 74fa1f6] [--repeat 3]

The baseline's ``maps/_noise_kernel.py``, ``_moments_kernel.py`` and ``_fused_kernel.py`` are
taken from git (``git show``) into a temporary folder and imported from there, so both
versions compile in this process.  The data: seeded float32 spectra with one Gaussian line
each plus noise, a few NaN channels and outliers, held big-endian as FITS stores them (the
fused kernel swaps the bytes as it loads them, as in ``kinemap maps``).  Also timed, as the
floor of any one-read pass: a numpy byteswapping copy of the same bytes (one streaming
pass).  Prints best-of-``--repeat`` wall and CPU times (CPU summed over threads: steadier on
a shared machine) with the load average, the ratios old / new and kernel / streaming pass,
CPU ns per voxel, and the largest relative difference of the outputs (the kernels keep
each spectrum's summation order, so 0 is expected; counts must agree).
"""
import argparse
import importlib
import os
import subprocess
import sys
import tempfile
import time

import numba
import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
MODULES = ("_noise_kernel", "_moments_kernel", "_fused_kernel")


def load() -> str:
    return "load " + " ".join(f"{x:.2f}" for x in os.getloadavg())


def baseline_modules(commit, folder):
    """Import the baseline's three kernel modules as old_<name> from ``folder``."""
    for name in MODULES:
        src = subprocess.run(["git", "-C", ROOT, "show", f"{commit}:src/kinemap/maps/{name}.py"],
                             capture_output=True, text=True, check=True).stdout
        for other in MODULES:
            src = src.replace(f"kinemap.maps.{other}", f"old{other}")
        with open(os.path.join(folder, f"old{name}.py"), "w") as fh:
            fh.write(src)
    sys.path.insert(0, folder)
    return {name: importlib.import_module(f"old{name}") for name in MODULES}


def make_data(nchan, npix, seed=7):
    rng = np.random.default_rng(seed)
    v = np.arange(nchan, dtype=np.float64)
    centre = rng.uniform(0.2, 0.8, npix) * nchan
    amp = rng.uniform(0.0, 3.0, npix)
    data = rng.normal(0.0, 0.1, (nchan, npix)).astype(np.float32)
    for c0 in range(0, nchan, 64):  # the line, in slabs to keep memory small
        sl = slice(c0, min(nchan, c0 + 64))
        data[sl] += (amp * np.exp(-0.5 * ((v[sl, None] - centre) / 12.0) ** 2)).astype(np.float32)
    k = rng.integers(0, nchan * npix, npix // 4)
    data.flat[k[: k.size // 2]] = np.nan            # blank channels
    data.flat[k[k.size // 2:]] += 50.0               # outliers
    return data.astype(">f4")


def best(fn, repeat):
    """(wall, CPU) seconds of the best of ``repeat`` calls; CPU time (all threads) is the
    steadier figure on a shared machine."""
    times = []
    for _ in range(repeat):
        t0, c0 = time.perf_counter(), time.process_time()
        fn()
        times.append((time.perf_counter() - t0, time.process_time() - c0))
    return min(times)


def run_fused(kern, raw, nchan, npix, rho):
    sigma = np.empty(npix)
    nused = np.empty(npix, np.int64)
    nfinite = np.empty(npix, np.int64)
    out = np.empty((9, npix))
    v = np.linspace(-300.0, 300.0, nchan)
    dv = np.full(nchan, v[1] - v[0])
    kern.fused_kernel_swapped(raw, True, np.ones(nchan, np.bool_), np.sqrt(6.0), 3.5, 0.9969,
                              v, dv, 0, 0.0, np.zeros((1, 1), np.bool_),
                              np.ones(npix, np.bool_), rho, sigma, nused, nfinite, out)
    return sigma, nused, nfinite, out


def run_noise(kern, data, nchan, npix):
    s = np.empty(npix)
    n = np.empty(npix, np.int64)
    nf = np.empty(npix, np.int64)
    kern.noise_kernel(data, True, np.ones(nchan, np.bool_), np.sqrt(6.0), 3.5, 0.9969, s, n, nf)
    return s, n, nf


def rel(a, b):
    a, b = np.asarray(a, float), np.asarray(b, float)
    both = np.isfinite(a) & np.isfinite(b)
    if not np.array_equal(np.isfinite(a), np.isfinite(b)):
        return float("inf")
    d = np.abs(a[both] - b[both]) / np.maximum(np.abs(b[both]), 1e-300)
    return float(d.max()) if d.size else 0.0


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--nchan", type=int, default=1024)
    ap.add_argument("--npix", type=int, default=65536)
    ap.add_argument("--baseline", default="74fa1f6")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    sys.path.insert(0, os.path.join(ROOT, "src"))
    os.environ.setdefault("NUMBA_CACHE_DIR", tempfile.mkdtemp(prefix="kinemap-nkbench-"))
    from kinemap.maps import _fused_kernel as new_fused, _noise_kernel as new_noise

    with tempfile.TemporaryDirectory() as folder:
        old = baseline_modules(args.baseline, folder)
        nchan, npix = args.nchan, args.npix
        raw_be = make_data(nchan, npix)
        raw = raw_be.view(np.uint32)
        native = raw_be.astype(np.float32)
        rho = np.array([1.0])
        voxels = nchan * npix
        print(f"{nchan} channels x {npix} spectra ({raw.nbytes / 1e6:.0f} MB float32), "
              f"{numba.get_num_threads()} threads, baseline {args.baseline}")
        res = {}
        for label, kern in (("old", old["_fused_kernel"]), ("new", new_fused)):
            run_fused(kern, raw[:, :64], nchan, 64, rho)  # compile
            res[label] = run_fused(kern, raw, nchan, npix, rho)
        la = load()
        (t_stream, c_stream), (t_old, c_old), (t_new, c_new) = (best(f, args.repeat) for f in (
            lambda: raw_be.astype(np.float32),
            lambda: run_fused(old["_fused_kernel"], raw, nchan, npix, rho),
            lambda: run_fused(new_fused, raw, nchan, npix, rho)))
        per = 1e9 / voxels
        print(f"streaming pass (numpy byteswapping copy, one thread): {t_stream:.3f} s wall, "
              f"{c_stream * per:.2f} ns CPU per voxel ({la})")
        print(f"fused kernel old {t_old:.3f} s wall, {c_old * per:.2f} ns CPU per voxel; "
              f"new {t_new:.3f} s wall, {c_new * per:.2f} ns CPU per voxel: old / new "
              f"{t_old / t_new:.2f}x wall, {c_old / c_new:.2f}x CPU; new / streaming pass "
              f"{c_new / c_stream:.1f}x CPU ({load()})")
        names = ("sigma", "nused", "nfinite") + tuple(f"out[{i}]" for i in range(9))
        o, n = res["old"], res["new"]
        diffs = [rel(a, b) for a, b in zip(o[:3] + tuple(o[3]), n[:3] + tuple(n[3]))]
        print("largest relative difference new vs old: "
              + ", ".join(f"{k} {d:.1e}" for k, d in zip(names, diffs)))

        for label, kern in (("old", old["_noise_kernel"]), ("new", new_noise)):
            run_noise(kern, native[:, :64], nchan, 64)
        la = load()
        (t_old, c_old), (t_new, c_new) = (best(f, args.repeat) for f in (
            lambda: run_noise(old["_noise_kernel"], native, nchan, npix),
            lambda: run_noise(new_noise, native, nchan, npix)))
        print(f"noise kernel alone: old {t_old:.3f} s wall, {c_old * per:.2f} ns CPU per voxel; "
              f"new {t_new:.3f} s wall, {c_new * per:.2f} ns CPU per voxel: old / new "
              f"{t_old / t_new:.2f}x wall, {c_old / c_new:.2f}x CPU ({la})")


if __name__ == "__main__":
    main()
