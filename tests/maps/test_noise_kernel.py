"""The compiled clipped-RMS noise against a plain numpy implementation of its definition.

Reference (written here from the docstring of kinemap.maps._noise_kernel, common practice
for an iteratively clipped RMS): start from every finite value; repeatedly take the mean
and the sample standard deviation (ddof=1) of the kept values and keep the values within
clip * sigma of the mean, until the kept set stops changing (at most 20 rounds); the noise
is that sigma / correction / factor, NaN with fewer than three values.
"""
import numpy as np
import pytest

from kinemap.maps._noise_kernel import MAX_ITER, TILE, noise_kernel
from kinemap.maps.noise import CLIP, clip_correction


def _reference(x, second_differences, keep, factor, clip, correction):
    x = np.asarray(x, np.float64)
    v = x[:-2] - 2.0 * x[1:-1] + x[2:] if second_differences else x[keep]
    v = v[np.isfinite(v)]
    kept = np.ones(v.size, bool)
    sigma = np.nan
    for _ in range(MAX_ITER):
        if kept.sum() < 3:
            return np.nan, int(kept.sum()), v.size
        mean = v[kept].mean()
        sigma = v[kept].std(ddof=1)
        new = np.abs(v - mean) <= clip * sigma
        if np.array_equal(new, kept):
            break
        kept = new
    s = sigma / correction
    return (s / factor if s > 0 else np.nan), int(kept.sum()), v.size


def _spectra(rng, nchan, npix, dtype):
    x = rng.normal(0.4, 1.0, (nchan, npix))
    z = (np.arange(nchan)[:, None] - rng.uniform(0, nchan, npix)) / 4.0
    x += 5.0 * np.exp(-0.5 * z ** 2)                                # a line
    out = rng.random((nchan, npix)) < 0.03
    x[out] += rng.choice([-1.0, 1.0], out.sum()) * rng.uniform(6.0, 60.0, out.sum())  # outliers
    x[rng.random((nchan, npix)) < 0.05] = np.nan                    # blank channels
    x[:, 3] = np.nan                  # a blank spectrum
    x[: nchan - 3, 4] = np.nan        # too few values
    x[5, 5] = np.inf                  # an infinite channel
    return x.astype(dtype)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("second_differences", [True, False])
def test_noise_kernel_equals_numpy_reference(dtype, second_differences):
    rng = np.random.default_rng(11)
    nchan, npix = 200, TILE + 22  # two tiles, the last partly filled
    data = _spectra(rng, nchan, npix, dtype)
    keep = np.ones(nchan, bool) if second_differences else rng.random(nchan) < 0.6
    factor = np.sqrt(6.0) if second_differences else 1.0
    corr = clip_correction(CLIP)
    sigma = np.empty(npix)
    nused = np.empty(npix, np.int64)
    nfinite = np.empty(npix, np.int64)
    noise_kernel(data, second_differences, keep, factor, CLIP, corr, sigma, nused, nfinite)
    ref = [_reference(data[:, p], second_differences, keep, factor, CLIP, corr)
           for p in range(npix)]
    ref_sigma = np.array([r[0] for r in ref])
    assert np.isfinite(ref_sigma).sum() > npix - 5   # the test exercises real estimates
    assert sum(r[1] < r[2] for r in ref) > npix // 2  # ... most of which clip outliers
    np.testing.assert_allclose(sigma, ref_sigma, rtol=1e-12)
    finite = np.isfinite(ref_sigma)
    assert np.array_equal(nused[finite], [r[1] for r, f in zip(ref, finite) if f])
    assert np.array_equal(nfinite, np.isfinite(data).sum(axis=0))
