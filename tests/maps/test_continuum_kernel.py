"""The compiled continuum fit against a per-spectrum numpy.linalg.lstsq loop.

The reference follows the documented procedure spectrum by spectrum with numpy's
least-squares solver (numpy.linalg.lstsq, the reference library) and an explicit
inverse of the normal matrix for the covariance; the compiled kernel must agree to float
rounding, including which channels the clipping keeps.
"""
import numpy as np
import pytest

from kinemap.maps.continuum import MIN_EXTRA, _continuum_block, _design


def _reference(block, free, degree, clip, iterations, ref):
    nchan, rows, nx = block.shape
    a = _design(nchan, degree)
    ncoef = degree + 1
    out = {k: np.full((rows, nx), np.nan) for k in ("level", "level_err", "slope_snr")}
    out["nfree"] = np.zeros((rows, nx), int)
    out["coef"] = np.full((ncoef, rows, nx), np.nan)
    out["data"] = np.full(block.shape, np.nan)

    def fit(y, w):
        n = int(w.sum())
        if n < ncoef + MIN_EXTRA:
            return np.full(ncoef, np.nan), np.nan, n, np.full((ncoef, ncoef), np.nan)
        coef = np.linalg.lstsq(a[w], y[w], rcond=None)[0]
        s = np.sqrt(((y[w] - a[w] @ coef) ** 2).sum() / max(n - ncoef, 1))
        return coef, s, n, np.linalg.inv(a[w].T @ a[w]) * s ** 2

    for r in range(rows):
        for i in range(nx):
            y = block[:, r, i].astype(np.float64)
            base = free & np.isfinite(y)
            w = base
            for _ in range(iterations):
                coef, s, n, cov = fit(y, w)
                new = base & (np.abs(y - a @ coef) <= clip * s) if np.isfinite(s) else base
                if np.array_equal(new, w):
                    break
                w = new
            coef, s, n, cov = fit(y, w)
            out["coef"][:, r, i] = coef
            out["level"][r, i] = a[ref] @ coef
            out["level_err"][r, i] = np.sqrt(a[ref] @ cov @ a[ref])
            out["nfree"][r, i] = n
            if degree >= 1:
                out["slope_snr"][r, i] = abs(coef[1]) / np.sqrt(cov[1, 1])
            model = a @ coef if np.isfinite(s) else 0.0
            out["data"][:, r, i] = y - model
    return out


def _block(seed, nchan=90, rows=7, nx=9, dtype=np.float32):
    rng = np.random.default_rng(seed)
    ch = np.arange(nchan)[:, None, None]
    level = rng.normal(3.0, 1.0, (rows, nx))
    slope = rng.normal(0.0, 0.02, (rows, nx))
    curve = rng.normal(0.0, 2e-4, (rows, nx))
    line = 5.0 * np.exp(-0.5 * ((ch - 45 - rng.normal(0, 4, (rows, nx))) / 3.0) ** 2)
    cube = level + slope * ch + curve * (ch - 45) ** 2 + line + rng.normal(0, 0.1, (nchan, rows, nx))
    cube[rng.random(cube.shape) < 0.03] = np.nan      # scattered blank channels
    cube[:, 0, 0] = np.nan                            # a blank spectrum
    cube[:88, 1, 1] = np.nan                          # too few channels to fit
    cube[10, 2, 2] += 40.0                            # an outlier the clipping must drop
    return cube.astype(dtype)


@pytest.mark.parametrize("degree", [0, 1, 2, 5])
def test_kernel_matches_lstsq_reference(degree):
    block = _block(degree)
    free = np.ones(block.shape[0], bool)
    free[30:60] = False  # the line's window
    kw = dict(free=free, degree=degree, clip=3.0, iterations=10, ref=45)
    got = _continuum_block(block, subtract=True, **kw)
    want = _reference(block, **kw)
    np.testing.assert_array_equal(got["nfree"], want["nfree"])
    for key in ("coef", "level", "level_err") + (("slope_snr",) if degree else ()):
        np.testing.assert_allclose(got[key], want[key], rtol=1e-9, atol=1e-12, equal_nan=True,
                                   err_msg=key)
    np.testing.assert_allclose(got["data"], want["data"].astype(np.float32), rtol=1e-6,
                               atol=1e-6, equal_nan=True)
    assert got["data"].dtype == np.float32
    assert np.isnan(got["level"][0, 0]) and np.isnan(got["level"][1, 1])
    usable = int((free & np.isfinite(block[:, 2, 2])).sum())
    assert got["nfree"][2, 2] < usable  # at least the outlier was clipped
    assert np.isfinite(got["level"]).sum() == block.shape[1] * block.shape[2] - 2


def test_big_endian_block_gives_the_same_fit():
    block = _block(11, dtype=np.float32)
    free = np.ones(block.shape[0], bool)
    free[30:60] = False
    kw = dict(free=free, degree=1, clip=3.0, iterations=10, ref=45, subtract=True)
    native = _continuum_block(block, **kw)
    swapped = _continuum_block(block.astype(">f4"), **kw)
    for key in native:
        np.testing.assert_array_equal(native[key], swapped[key])
