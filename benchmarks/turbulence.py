"""Turbulence statistics of a 1000 x 1000 velocity map: FFT pair sums against a naive pair
count measured in the same run (not a test; CI does not run it).

    .venv/bin/python benchmarks/turbulence.py

The naive baseline loops over every lag vector up to the largest lag and sums the pairs
at that offset with array slices (O(N * lags^2)); it is timed on a fraction of the lag
vectors and scaled up, since the whole count takes hours.  Both give the same numbers
(tests/turbulence/test_structure.py checks the FFT against a pair-by-pair count).
"""
from __future__ import annotations

import time

import numpy as np

from kinemap.turbulence import local_gradients, plane_fit, sky_matrix, structure_function_arrays


def naive_lag_sum(v, w, dy, dx):
    """Weighted sum of squared differences and weights of all pairs at offset (dy, dx)."""
    ny, nx = v.shape
    a = v[max(0, -dy):ny - max(0, dy), max(0, -dx):nx - max(0, dx)]
    b = v[max(0, dy):ny - max(0, -dy) if dy < 0 else ny, max(0, dx):nx if dx >= 0 else nx + dx]
    wa = w[max(0, -dy):ny - max(0, dy), max(0, -dx):nx - max(0, dx)]
    wb = w[max(0, dy):ny - max(0, -dy) if dy < 0 else ny, max(0, dx):nx if dx >= 0 else nx + dx]
    ww = wa * wb
    return float(np.sum(ww * (a - b) ** 2)), float(np.sum(ww))


def main(n=1000):
    rng = np.random.default_rng(0)
    v = np.cumsum(np.cumsum(rng.standard_normal((n, n)), 0), 1) * 1e-3
    err = rng.uniform(0.02, 0.1, (n, n))
    v[rng.random((n, n)) < 0.1] = np.nan  # holes, as in a masked map
    t0 = time.perf_counter()
    sf = structure_function_arrays(v, err, blocks=0)
    t_fft = time.perf_counter() - t0
    t0 = time.perf_counter()
    structure_function_arrays(v, err, blocks=3)
    t_fft_jk = time.perf_counter() - t0
    t0 = time.perf_counter()
    m = sky_matrix(pixel_scale=1.0)
    plane_fit(v, err, matrix=m)
    local_gradients(v, err, matrix=m, window_pix=15)
    t_grad = time.perf_counter() - t0

    # naive: every lag vector with |l| < n/3 in the half plane; time a sample, scale up
    good = np.isfinite(v)
    vz, w = np.where(good, v, 0.0), np.where(good, 1 / err ** 2, 0.0)
    lmax = n // 3
    n_vectors = sum(1 for dy in range(0, lmax) for dx in range(-lmax + 1, lmax)
                    if (dy > 0 or dx > 0) and dy * dy + dx * dx < lmax * lmax)
    sample = [(int(dy), int(dx)) for dy, dx in rng.integers(-lmax // 2, lmax // 2, (40, 2))]
    t0 = time.perf_counter()
    for dy, dx in sample:
        naive_lag_sum(vz, w, abs(dy), dx)
    t_naive = (time.perf_counter() - t0) / len(sample) * n_vectors
    print(f"{n}x{n} map, {int(good.sum())} valid pixels, {len(sf['sf2'])} lag bins")
    print(f"structure function, FFT (all pairs, no errors): {t_fft:7.2f} s")
    print(f"structure function, FFT + 3x3 jackknife errors: {t_fft_jk:7.2f} s")
    print(f"plane fit + local gradients (15 px window):      {t_grad:7.2f} s")
    print(f"naive pair sums, {n_vectors} lag vectors (scaled from {len(sample)}): "
          f"{t_naive:9.0f} s")
    print(f"ratio naive / FFT: {t_naive / t_fft:.0f}x")


if __name__ == "__main__":
    main()
