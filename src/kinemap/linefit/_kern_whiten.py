"""Correlated channel noise and the generic normal equations of the line fitter (private):
banded Cholesky factor of the channel correlation, whitening of the residual and the
Jacobian, and chi2, normal matrix and gradient from model + Jacobian arrays
(:func:`_residual_system`).
"""
from __future__ import annotations

import math

from numba import njit

from kinemap.linefit._kern_base import _FM

# ----------------------------------------------------------------------------- whitening
@njit(cache=True, _nrt=False)
def _band_chol(idx, m, rho1, rho2, floor, L0, L1, L2):
    """Banded Cholesky of the correlation matrix of the finite channels ``idx[:m]``.

    R[i, k] = rho(|idx[i] - idx[k]|) with rho(0)=1, rho(1)=rho1, rho(2)=rho2, 0 beyond;
    (1 - floor) R + floor I is factorised (see fit.py for why a small white floor is added).
    """
    for i in range(m):
        l2 = 0.0
        l1 = 0.0
        if i >= 2:
            d = idx[i] - idx[i - 2]
            r = rho1 if d == 1 else (rho2 if d == 2 else 0.0)
            l2 = (1.0 - floor) * r / L0[i - 2]
        if i >= 1:
            d = idx[i] - idx[i - 1]
            r = rho1 if d == 1 else (rho2 if d == 2 else 0.0)
            t = (1.0 - floor) * r
            if i >= 2:
                t -= l2 * L1[i - 1]
            l1 = t / L0[i - 1]
        dd = 1.0 - l1 * l1 - l2 * l2
        if not (dd > 0.0):
            return False
        L0[i] = math.sqrt(dd)
        L1[i] = l1
        L2[i] = l2
    return True


@njit(cache=True, _nrt=False)
def _band_inv_trace(m, L0, L1, L2, Z0, Z1, Z2):
    """Trace of (L L^T)^-1 for the banded factor of :func:`_band_chol`, in O(m).

    Selected inversion (Takahashi et al. 1973 recurrence): only the band of the inverse
    is needed, computed from the last row up.  Used for the effective number of data
    points of a correlated-noise fit, m_eff = tr(R'^-1 R)."""
    tr = 0.0
    for i in range(m - 1, -1, -1):
        l10 = L1[i + 1] if i + 1 < m else 0.0
        l20 = L2[i + 2] if i + 2 < m else 0.0
        z11 = Z0[i + 1] if i + 1 < m else 0.0
        z21 = Z1[i + 1] if i + 1 < m else 0.0
        z22 = Z0[i + 2] if i + 2 < m else 0.0
        Z2[i] = -(l10 * z21 + l20 * z22) / L0[i]
        Z1[i] = -(l10 * z11 + l20 * z21) / L0[i]
        Z0[i] = (1.0 / L0[i] - (l10 * Z1[i] + l20 * Z2[i])) / L0[i]
        tr += Z0[i]
    return tr


@njit(cache=True, _nrt=False, fastmath=_FM)
def _whiten(src, idx, q0, q1, c1, inv_noise, corr, L0, L1, L2, out):
    """out[q0:q1] = (L^-1 src[idx] / noise)[q0:q1] for a source that is zero outside
    channels [idx[q0], c1) (plain scaling when the channels are uncorrelated)."""
    if not corr:
        for i in range(q0, q1):
            out[i] = src[idx[i]] * inv_noise
    else:
        for i in range(q0, q1):
            t = src[idx[i]] * inv_noise if idx[i] < c1 else 0.0
            if i - 1 >= q0:
                t -= L1[i] * out[i - 1]
            if i - 2 >= q0:
                t -= L2[i] * out[i - 2]
            out[i] = t / L0[i]


@njit(cache=True, _nrt=False, fastmath=_FM, error_model="numpy")
def _whiten_rows(r, jac, idx, m, rhi, qlo, qhi, inv_noise, L0, L1, L2, rw, Jw):
    """Correlated channels: :func:`_whiten` of the residual and of every Jacobian row in one
    pass.  The recurrences are serial in the channel index, so whitening the rows one after
    the other is latency-bound; interleaved, the independent rows overlap (and the divisor
    is inverted once per channel).  Row k is whitened on [qlo[k], qhi[k]) as by _whiten."""
    npar = jac.shape[0]
    for i in range(m):
        ci = idx[i]
        il = 1.0 / L0[i]
        t = r[ci] * inv_noise
        if i >= 1:
            t -= L1[i] * rw[i - 1]
        if i >= 2:
            t -= L2[i] * rw[i - 2]
        rw[i] = t * il
        for k in range(npar):
            q0 = qlo[k]
            if i < q0 or i >= qhi[k]:
                continue
            t = jac[k, ci] * inv_noise if ci < rhi[k] else 0.0
            if i - 1 >= q0:
                t -= L1[i] * Jw[k, i - 1]
            if i - 2 >= q0:
                t -= L2[i] * Jw[k, i - 2]
            Jw[k, i] = t * il


@njit(cache=True, _nrt=False, fastmath=_FM)
def _dot(a, b, lo, hi):
    """sum(a[lo:hi] * b[lo:hi]); written over 0-based slices so LLVM can vectorise it."""
    if hi <= lo:
        return 0.0
    x = a[lo:hi]
    y = b[lo:hi]
    t = 0.0
    for i in range(x.shape[0]):
        t += x[i] * y[i]
    return t


@njit(cache=True, _nrt=False, fastmath=_FM)
def _residual_system(y, mod, jac, idx, pos, m, inv_noise, corr, L0, L1, L2, r, rw, Jw, A, g,
                     rlo, rhi, qlo, qhi, want_jac):
    """Whitened residual and (if asked) normal matrix A = Jw Jw^T and gradient g = Jw rw.

    Jacobian row k is non-zero on channels [rlo[k], rhi[k]) only; its whitened version on
    compressed (finite-channel) indices [qlo[k], qhi[k]) (to the end when correlated).
    Returns chi2 = |rw|^2."""
    nchan = mod.shape[0]
    if not corr and m == nchan:
        # common case (white noise, no NaN channel): work on the rows directly, no copies
        w2 = inv_noise * inv_noise
        chi2 = 0.0
        for c in range(nchan):
            t = y[c] - mod[c]
            r[c] = t
            chi2 += t * t
        if want_jac:
            npar = jac.shape[0]
            for k in range(npar):
                g[k] = _dot(jac[k], r, rlo[k], rhi[k]) * w2
                for l in range(k + 1):
                    t = _dot(jac[k], jac[l], max(rlo[k], rlo[l]), min(rhi[k], rhi[l])) * w2
                    A[k, l] = t
                    A[l, k] = t
        return chi2 * w2
    for c in range(nchan):
        r[c] = y[c] - mod[c]
    npar = jac.shape[0]
    if want_jac:
        for k in range(npar):
            qlo[k] = pos[rlo[k]]
            qhi[k] = m if corr else pos[rhi[k]]
            if rhi[k] <= rlo[k]:
                qhi[k] = qlo[k]
    if corr and want_jac:
        _whiten_rows(r, jac, idx, m, rhi, qlo, qhi, inv_noise, L0, L1, L2, rw, Jw)
    else:
        _whiten(r, idx, 0, m, nchan, inv_noise, corr, L0, L1, L2, rw)
        if want_jac:
            for k in range(npar):
                _whiten(jac[k], idx, qlo[k], qhi[k], rhi[k], inv_noise, corr, L0, L1, L2, Jw[k])
    chi2 = 0.0
    for i in range(m):
        chi2 += rw[i] * rw[i]
    if want_jac:
        for k in range(npar):
            t = 0.0
            for i in range(qlo[k], qhi[k]):
                t += Jw[k, i] * rw[i]
            g[k] = t
            for l in range(k + 1):
                t = 0.0
                for i in range(max(qlo[k], qlo[l]), min(qhi[k], qhi[l])):
                    t += Jw[k, i] * Jw[l, i]
                A[k, l] = t
                A[l, k] = t
    return chi2
