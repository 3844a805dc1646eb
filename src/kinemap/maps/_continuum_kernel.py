"""Compiled continuum fit: a sigma-clipped least-squares polynomial per spectrum.

The numpy version formed the normal equations of every spectrum of a block with
three-operand ``einsum`` and solved them with ``np.linalg.solve`` and ``inv`` on the
stack, and kept iterating the clipping of the whole block until its last spectrum
settled; most of a moments run went there.  Here each row of spectra is copied once to
contiguous float64 (reading along x), then each spectrum is fitted and clipped on its
own until its channels stop changing (at most ``iterations`` times: the same sequence of
fits as before, as a spectrum's clipping never depends on its neighbours), with a
Cholesky solve of the small normal matrix (degree <= 5, x scaled to [-1, 1], so it is
well conditioned).  Accumulation is float64, as before; results agree with a numpy
least-squares loop to float rounding (``tests/maps/test_continuum_kernel.py``).
"""
from __future__ import annotations

import numba
import numpy as np

__all__ = ["continuum_kernel"]


@numba.njit(cache=True, nogil=True)
def _fit(a, x, w, min_n, m, rhs, coef, inv):
    """Least squares of x on the columns of ``a`` over the channels ``w``.

    Fills ``coef`` and ``inv`` (the inverse normal matrix) and returns (residual sigma,
    channels used); NaN coefficients, inverse and sigma when fewer than ``min_n``
    channels are used.
    """
    nchan, ncoef = a.shape
    for k in range(ncoef):
        rhs[k] = 0.0
        for j in range(ncoef):
            m[k, j] = 0.0
    n = 0
    for c in range(nchan):
        if w[c]:
            n += 1
            for k in range(ncoef):
                ak = a[c, k]
                rhs[k] += ak * x[c]
                for j in range(k + 1):
                    m[k, j] += ak * a[c, j]
    if n < min_n:
        for k in range(ncoef):
            coef[k] = np.nan
            for j in range(ncoef):
                inv[k, j] = np.nan
        return np.nan, n
    # Cholesky factor L (lower triangle of m, in place): m = L L^T
    for k in range(ncoef):
        d = m[k, k]
        for j in range(k):
            d -= m[k, j] * m[k, j]
        d = np.sqrt(d)
        m[k, k] = d
        for i in range(k + 1, ncoef):
            t = m[i, k]
            for j in range(k):
                t -= m[i, j] * m[k, j]
            m[i, k] = t / d
    _cho_solve(m, rhs, coef)
    for col in range(ncoef):  # inverse, one unit vector at a time
        for k in range(ncoef):
            rhs[k] = 1.0 if k == col else 0.0
        _cho_solve(m, rhs, inv[:, col])
    r2 = 0.0
    for c in range(nchan):
        if w[c]:
            model = 0.0
            for k in range(ncoef):
                model += a[c, k] * coef[k]
            r = x[c] - model
            r2 += r * r
    dof = max(n - ncoef, 1)
    return np.sqrt(r2 / dof), n


@numba.njit(cache=True, nogil=True)
def _cho_solve(lower, b, out):
    """Solve L L^T out = b for the Cholesky factor in the lower triangle of ``lower``."""
    ncoef = b.shape[0]
    for i in range(ncoef):  # forward: L z = b
        t = b[i]
        for j in range(i):
            t -= lower[i, j] * out[j]
        out[i] = t / lower[i, i]
    for i in range(ncoef - 1, -1, -1):  # back: L^T out = z
        t = out[i]
        for j in range(i + 1, ncoef):
            t -= lower[j, i] * out[j]
        out[i] = t / lower[i, i]


@numba.njit(cache=True, nogil=True)
def _fit_clipped(x, base, a, clip, iterations, min_n, w, m, rhs, coef, inv):
    """Fit, clip the base channels beyond ``clip`` sigma of the fit, refit, until the
    kept channels stop changing or ``iterations`` clippings; the final fit's (sigma, n)."""
    nchan, ncoef = a.shape
    for c in range(nchan):
        w[c] = base[c]
    for _ in range(iterations):
        s, n = _fit(a, x, w, min_n, m, rhs, coef, inv)
        changed = False
        for c in range(nchan):
            keep = base[c]
            if keep and np.isfinite(s):
                model = 0.0
                for k in range(ncoef):
                    model += a[c, k] * coef[k]
                keep = abs(x[c] - model) <= clip * s
            if keep != w[c]:
                changed = True
            w[c] = keep
        if not changed:
            break
    return _fit(a, x, w, min_n, m, rhs, coef, inv)


@numba.njit(parallel=True, cache=True, nogil=True)
def continuum_kernel(block, free, a, ref, clip, iterations, min_n, subtract,
                     coef_out, level, level_err, nfree, slope_snr, data_out):
    """Continuum of every spectrum of ``block`` (nchan, rows, nx), any float type.

    ``free`` (nchan,) bool: the line-free channels; ``a`` (nchan, ncoef): the design
    matrix; ``ref``: the channel where ``level`` is evaluated.  Writes the coefficients
    (ncoef, rows, nx), the level and its error, the channels used, the slope's
    signal-to-noise (when ncoef >= 2) and, with ``subtract``, the spectrum minus its
    continuum into ``data_out`` (nchan, rows, nx) float32 (unchanged where the fit
    failed, NaN where the data are).
    """
    nchan, rows, nx = block.shape
    ncoef = a.shape[1]
    for r in numba.prange(rows):
        # the row's spectra as contiguous float64 rows, read along x (unit stride)
        spectra = np.empty((nx, nchan))
        for c in range(nchan):
            for i in range(nx):
                spectra[i, c] = block[c, r, i]
        base = np.empty(nchan, np.bool_)
        w = np.empty(nchan, np.bool_)
        m = np.empty((ncoef, ncoef))
        rhs = np.empty(ncoef)
        coef = np.empty(ncoef)
        inv = np.empty((ncoef, ncoef))
        for i in range(nx):
            x = spectra[i]
            for c in range(nchan):
                base[c] = free[c] and np.isfinite(x[c])
            s, n = _fit_clipped(x, base, a, clip, iterations, min_n, w, m, rhs, coef, inv)
            s2 = s * s
            lev = 0.0
            var = 0.0
            for k in range(ncoef):
                coef_out[k, r, i] = coef[k]
                lev += a[ref, k] * coef[k]
                for j in range(ncoef):
                    var += a[ref, k] * inv[k, j] * s2 * a[ref, j]
            level[r, i] = lev
            level_err[r, i] = np.sqrt(var)
            nfree[r, i] = n
            if ncoef >= 2:
                slope_snr[r, i] = abs(coef[1]) / np.sqrt(inv[1, 1] * s2)
            if subtract:
                ok = np.isfinite(s)
                for c in range(nchan):
                    model = 0.0
                    if ok:
                        for k in range(ncoef):
                            model += a[c, k] * coef[k]
                    data_out[c, r, i] = np.float32(x[c] - model)
