"""Second-order structure function of a velocity field, from all pixel pairs via FFTs.

For a map v with weights w (1/sigma_v^2, 0 where there is no data) the weighted mean
squared difference at a lag vector l is

    SF2(l) = sum_x w(x) w(x+l) [v(x+l) - v(x)]^2 / sum_x w(x) w(x+l)

and expanding the square turns every sum into a cross-correlation of two maps, which
zero-padded FFTs give for all lag vectors at once (O(N log N) instead of the O(N^2) pair
count).  The noise of each pair adds sigma_i^2 + sigma_j^2 to the expected squared
difference, so the same weighted mean of that sum over the pairs is the noise bias
removed (2 sigma_v^2 when the errors are equal).  Lag vectors are binned by length on a
logarithmic grid; a bin's value is the pair-weighted mean over its lag vectors.

Errors come from a delete-one-block jackknife: the map is cut into ``blocks x blocks``
tiles, and each replicate drops the pairs whose first pixel lies in one tile.  Pixel
pairs are strongly correlated (one pixel enters millions of pairs), so counting pairs
would give errors far too small; the jackknife sees the spatial correlation.
"""
from __future__ import annotations

import numpy as np
from scipy import fft as sfft

from kinemap.errors import KinemapError

__all__ = ["lag_bins", "structure_function_arrays", "correlate", "fit_power_law"]


def lag_bins(shape, *, nlags: int = 12, min_lag: float = 1.0, max_fraction: float = 1 / 3):
    """Logarithmic lag-length bin edges (pixels): ``nlags`` bins whose geometric centres run
    from ``min_lag`` to ``max_fraction`` of the map's smaller side (edges half a bin out)."""
    hi = max(min(shape) * max_fraction, 2.0 * min_lag)
    n = max(int(nlags), 1)
    step = (hi / min_lag) ** (1.0 / max(n - 1, 1))
    return min_lag * step ** (np.arange(n + 1) - 0.5)


def _padded_shape(shape):
    return tuple(sfft.next_fast_len(2 * n - 1, real=True) for n in shape)


class _Correlator:
    """Cross-correlations C(a, b)(l) = sum_x a(x) b(x + l) of maps on one padded grid."""

    def __init__(self, shape):
        self.shape = shape
        self.pad = _padded_shape(shape)

    def spectrum(self, a):
        return sfft.rfft2(a, s=self.pad, workers=-1)

    def __call__(self, fa, fb):
        """Correlation from the spectra of a and b, cut to lags -(n-1)..(n-1) per axis,
        lag (0, 0) at the centre [ny-1, nx-1]."""
        c = sfft.irfft2(np.conj(fa) * fb, s=self.pad, workers=-1)
        ny, nx = self.shape
        c = np.roll(c, (ny - 1, nx - 1), axis=(0, 1))
        return c[: 2 * ny - 1, : 2 * nx - 1]


def correlate(a, b):
    """C(a, b)(l) = sum_x a(x) b(x + l) for every lag vector, shape (2ny-1, 2nx-1), lag
    (0, 0) at [ny-1, nx-1] (zero-padded FFTs; exact up to rounding)."""
    c = _Correlator(np.shape(a))
    return c(c.spectrum(np.asarray(a, float)), c.spectrum(np.asarray(b, float)))


def _lag_index(shape, edges):
    """Bin index (-1: outside) of every lag vector of the (2ny-1, 2nx-1) correlation grid."""
    ny, nx = shape
    dy = np.arange(-(ny - 1), ny)[:, None]
    dx = np.arange(-(nx - 1), nx)[None, :]
    length = np.hypot(dy, dx)
    idx = np.searchsorted(edges, length, side="right") - 1
    idx[(length < edges[0]) | (length >= edges[-1])] = -1
    return idx, length


def _sums(corr, spectra, fa):
    """Numerator, bias and denominator sums for pairs whose first pixel has spectra ``fa``
    (w, w v, w v^2, w s^2) and whose second pixel is anywhere (``spectra``)."""
    fw, fwv, fwv2, fws2 = spectra
    aw, awv, awv2, aws2 = fa
    num = corr(aw, fwv2) + corr(awv2, fw) - 2.0 * corr(awv, fwv)
    bias = corr(aw, fws2) + corr(aws2, fw)
    den = corr(aw, fw)
    return num, bias, den


def _binned(num, bias, den, idx, nbins):
    keep = idx >= 0
    i = idx[keep]
    n = np.bincount(i, num[keep], nbins)
    b = np.bincount(i, bias[keep], nbins)
    d = np.bincount(i, den[keep], nbins)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(d > 0, (n - b) / d, np.nan), np.where(d > 0, b / d, np.nan)


def structure_function_arrays(velocity, velocity_err=None, *, edges=None, nlags: int = 12,
                              weighting: str = "errors", blocks: int = 3):
    """Noise-corrected second-order structure function of a 2D velocity map (pixel lags).

    Parameters
    ----------
    velocity : ndarray (ny, nx)
        Velocities (km/s); NaN where there is no data.
    velocity_err : ndarray (ny, nx), optional
        1-sigma errors (km/s).  Without them nothing is weighted and no bias is removed.
    edges : ndarray, optional
        Lag-length bin edges in pixels (default :func:`lag_bins`).
    weighting : {'errors', 'uniform'}
        Pair weight w_i w_j with w = 1/sigma^2 ('errors') or 1 ('uniform').  The noise bias
        is removed either way when errors are given.
    blocks : int
        Jackknife tiles per side (``blocks**2`` replicates; 0 or 1: no errors).

    Returns
    -------
    dict
        ``lag`` (pair-weighted mean lag length per bin, pixels), ``edges``, ``sf2``
        (km^2/s^2, bias removed), ``sf2_err`` (jackknife, km^2/s^2), ``bias``
        (km^2/s^2), ``npairs`` (unordered pixel pairs), ``replicates`` (jackknife sf2,
        shape (n_replicates, n_bins)).
    """
    v = np.asarray(velocity, dtype=np.float64)
    if v.ndim != 2:
        raise KinemapError(f"the velocity field must be a 2D map, got shape {v.shape}")
    if weighting not in ("errors", "uniform"):
        raise KinemapError(f"'weighting' must be 'errors' or 'uniform', got {weighting!r}")
    err = None if velocity_err is None else np.asarray(velocity_err, dtype=np.float64)
    good = np.isfinite(v)
    if err is not None:
        good &= np.isfinite(err) & (err > 0)
    if good.sum() < 4:
        raise KinemapError("the velocity field has fewer than 4 valid pixels; lower the S/N "
                           "threshold or check the mask")
    s2 = np.where(good, err, 0.0) ** 2 if err is not None else np.zeros_like(v)
    w = good.astype(np.float64)
    if err is not None and weighting == "errors":
        w = np.where(good, 1.0 / np.where(good, s2, 1.0), 0.0)
    # subtracting the weighted mean leaves every difference alone but keeps the expanded
    # squares small, so the FFT rounding stays far below the structure function
    vc = np.where(good, v - np.sum(w * np.where(good, v, 0)) / w.sum(), 0.0)
    edges = lag_bins(v.shape, nlags=nlags) if edges is None else np.asarray(edges, float)
    nbins = len(edges) - 1
    idx, length = _lag_index(v.shape, edges)
    corr = _Correlator(v.shape)
    maps = (w, w * vc, w * vc ** 2, w * s2)
    spectra = tuple(corr.spectrum(m) for m in maps)
    num, bias, den = _sums(corr, spectra, spectra)
    sf2, bias_bin = _binned(num, bias, den, idx, nbins)
    keep = idx >= 0
    fg = corr.spectrum(good.astype(np.float64))
    pairs = np.bincount(idx[keep], corr(fg, fg)[keep], nbins) / 2.0  # each pair seen as +l and -l
    dsum = np.bincount(idx[keep], den[keep], nbins)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_lag = np.bincount(idx[keep], (den * length)[keep], nbins) / dsum
    reps = _jackknife(v.shape, maps, spectra, corr, idx, nbins, blocks, (num, bias, den))
    n = reps.shape[0]
    if n > 1:
        sf2_err = np.sqrt((n - 1) / n * np.nansum((reps - np.nanmean(reps, 0)) ** 2, axis=0))
    else:
        sf2_err = np.full(nbins, np.nan)
    return {"lag": mean_lag, "edges": edges, "sf2": sf2, "sf2_err": sf2_err, "bias": bias_bin,
            "npairs": np.rint(pairs).astype(np.int64), "replicates": reps}


def _jackknife(shape, maps, spectra, corr, idx, nbins, blocks, full):
    """SF2 with the pairs whose first pixel lies in one tile left out, per tile."""
    blocks = int(blocks)
    if blocks < 2:
        return np.empty((0, nbins))
    ny, nx = shape
    yb = np.linspace(0, ny, blocks + 1).astype(int)
    xb = np.linspace(0, nx, blocks + 1).astype(int)
    num, bias, den = full
    out = []
    for j in range(blocks):
        for i in range(blocks):
            part = []
            for m in maps:
                tile = np.zeros(shape)
                tile[yb[j]:yb[j + 1], xb[i]:xb[i + 1]] = m[yb[j]:yb[j + 1], xb[i]:xb[i + 1]]
                part.append(corr.spectrum(tile))
            if not np.any(maps[0][yb[j]:yb[j + 1], xb[i]:xb[i + 1]]):
                continue  # an empty tile changes nothing
            n_k, b_k, d_k = _sums(corr, spectra, part)
            sf2, _ = _binned(num - n_k, bias - b_k, den - d_k, idx, nbins)
            out.append(sf2)
    return np.array(out) if out else np.empty((0, nbins))


def fit_power_law(x, y, y_err=None, *, replicates=None):
    """Least-squares line in log-log: y = amplitude * x**slope.

    Parameters
    ----------
    x, y : ndarray
        Positive values (points with y <= 0 or NaN are left out).
    y_err : ndarray, optional
        1-sigma errors of y (weights 1/(y_err/y)^2 in log space); the formal errors are
        scaled by sqrt(reduced chi^2) when it exceeds 1.
    replicates : ndarray (n, len(y)), optional
        Jackknife replicates of y: the slope error is then the jackknife spread of the
        slopes refitted on each replicate (it sees the correlation between bins).

    Returns
    -------
    dict
        ``slope``, ``slope_err``, ``amplitude`` (y at x = 1), ``log_cov`` (covariance of
        (log10 amplitude, slope)), ``npoints``, ``pivot`` (x at which amplitude and slope
        decorrelate).
    """
    x, y = np.asarray(x, float), np.asarray(y, float)
    ok = np.isfinite(x) & np.isfinite(y) & (x > 0) & (y > 0)
    if y_err is not None:
        y_err = np.asarray(y_err, float)
        ok &= np.isfinite(y_err) & (y_err > 0)
    if ok.sum() < 2:
        return {"slope": np.nan, "slope_err": np.nan, "amplitude": np.nan,
                "log_cov": np.full((2, 2), np.nan), "npoints": int(ok.sum()), "pivot": np.nan}
    lx, ly = np.log10(x[ok]), np.log10(y[ok])
    w = np.ones_like(lx) if y_err is None else (y[ok] * np.log(10) / y_err[ok]) ** 2
    a = np.vstack([np.ones_like(lx), lx]).T
    cov = np.linalg.inv(a.T @ (w[:, None] * a))
    beta = cov @ (a.T @ (w * ly))
    dof = ok.sum() - 2
    if dof > 0:
        chi2 = float(np.sum(w * (ly - a @ beta) ** 2)) / dof
        cov = cov * (max(chi2, 1.0) if y_err is not None else chi2)
    slope_err = float(np.sqrt(cov[1, 1]))
    if replicates is not None and len(replicates) > 1:
        slopes = np.array([fit_power_law(x, r, y_err)["slope"] for r in replicates])
        slopes = slopes[np.isfinite(slopes)]
        n = len(slopes)
        if n > 1:
            slope_err = float(np.sqrt((n - 1) / n * np.sum((slopes - slopes.mean()) ** 2)))
    return {"slope": float(beta[1]), "slope_err": slope_err, "amplitude": float(10 ** beta[0]),
            "log_cov": cov, "npoints": int(ok.sum()),
            "pivot": float(10 ** (-cov[0, 1] / cov[1, 1])) if cov[1, 1] > 0 else np.nan}
