"""Compiled (numba) kernels: model + analytic Jacobian, initial guesses, Levenberg-Marquardt.

Everything here works on plain float64 arrays in km/s; validation happens in ``fit.py``.
The parallel loops run over blocks of spectra, so no Python code executes per spectrum.

Two evaluation paths share one optimiser (:func:`_fit_one`):

* the common case -- one Gaussian component, white noise, top-hat or sampled channels --
  goes through :func:`_eval_single`, which computes chi2, the normal equations and the
  second-derivative (Newton) correction in one vectorised pass without storing the model
  or the Jacobian, with the normal CDF and exp evaluated by branch-free vectorisable code
  (:func:`_vndtr`, :func:`_vexp`); the optimiser then takes Newton steps near the minimum;
* everything else (several or tied components, Hanning response, correlated noise) builds
  the model and Jacobian arrays (:func:`_eval_model`) and solves Gauss-Newton normal
  equations (:func:`_residual_system`).

Both paths truncate each line at +-_ZCUT (8) observed dispersions, where it is below
1.3e-14 of its peak, and agree with each other and with untruncated reference models to
rounding (see the tests).

Compilation notes.  Helpers that do not allocate are compiled with ``_nrt=False``: numba
otherwise wraps every array passed to a call in atomic reference-count updates, which cost
more than a model evaluation in these small per-spectrum calls.  ``error_model='numpy'``
drops the zero-division checks (which block vectorisation) where every divisor is known
to be non-zero.  fastmath: only flags that cannot change NaN/Inf semantics are used (no
'nnan'/'ninf', no approximate functions 'afn'), and only in the model evaluation and the
normal-equation sums, which contain no NaN tests (NaN channels are zero-weighted before);
the optimiser logic runs IEEE-exact.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from kinemap.status import Status

# status codes as compile-time constants (taken from the one place they are defined)
_OK = int(Status.OK)
_NOT_CONVERGED = int(Status.NOT_CONVERGED)
_AT_BOUND = int(Status.AT_BOUND)
_FAILED = int(Status.FAILED)

RESP_NONE, RESP_TOPHAT, RESP_HANNING = 0, 1, 2

_FM = {"nsz", "arcp", "contract", "reassoc"}
_SQRT2PI = math.sqrt(2.0 * math.pi)
_INV_SQRT2PI = 1.0 / math.sqrt(2.0 * math.pi)
_INV_SQRT2 = 1.0 / math.sqrt(2.0)
# beyond |z| = 8 the normal CDF differs from 0 or 1 by < 6.3e-16 and the density is below
# 1.3e-14 of its peak: below double-precision resolution of the line, so those channels are
# skipped (this saves most erfc/exp calls for narrow lines)
_ZCUT = 8.0
# Normal CDF from the exp(-z^2/2) the Jacobian needs anyway: the rational approximations of
# the Cephes Math Library (S. L. Moshier, ndtr.c, as shipped in scipy.special; from memory of
# that source) -- erf(t) = t T(t^2)/U(t^2) for |t| < 1 and erfc(x) = exp(-x^2) P(x)/Q(x) for
# 1 <= x < 8, t = x = |z|/sqrt(2).  Relative accuracy ~1e-14 (tests compare with math.erfc
# and scipy.special.ndtr); sharing the exponential makes Phi + phi ~2x cheaper than erfc + exp.
_SQRTH = math.sqrt(0.5)
_EP0, _EP1, _EP2, _EP3, _EP4, _EP5, _EP6, _EP7, _EP8 = (
    2.46196981473530512524e-10, 5.64189564831068821977e-1, 7.46321056442269912687e0,
    4.86371970985681366614e1, 1.96520832956077098242e2, 5.26445194995477358631e2,
    9.34528527171957607540e2, 1.02755188689515710272e3, 5.57535335369399327526e2)
_EQ0, _EQ1, _EQ2, _EQ3, _EQ4, _EQ5, _EQ6, _EQ7 = (
    1.32281951154744992508e1, 8.67072140885989742329e1, 3.54937778887819891062e2,
    9.75708501743205489753e2, 1.82390916687909736289e3, 2.24633760818710981792e3,
    1.65666309194161350182e3, 5.57535340817727675546e2)
_ET0, _ET1, _ET2, _ET3, _ET4 = (
    9.60497373987051638749e0, 9.00260197203842689217e1, 2.23200534594684319226e3,
    7.00332514112805075473e3, 5.55923013010394962768e4)
_EU0, _EU1, _EU2, _EU3, _EU4 = (
    3.35617141647503099647e1, 5.21357949780152679795e2, 4.59432382970980127987e3,
    2.26290000613890934246e4, 4.92673942608635921086e4)
_LAM0 = 1e-3
# Newton steps (full Hessian) once the Gauss-Newton decrement is below this (chi2 units, i.e.
# within ~1.7 error bars of the minimum): there they converge quadratically where
# Gauss-Newton converges linearly (rate ~ 1 / (S/N sqrt(n)), a few per cent), while farther
# out the Gauss-Newton step is the better one.  Measured on the benchmark cube: 3.46
# iterations per fit (Gauss-Newton only: 4.76, Newton throughout: 3.82).
_NEWTON_BELOW = 3.0
_LAM_MAX = 1e14
_BLOCK = 64  # spectra per parallel work item (work arrays are allocated once per block)


# ----------------------------------------------------------------------------- model
@njit(cache=True, inline="always", _nrt=False)
def _ndtr_e(z, e):
    """Normal CDF Phi(z) given ``e = exp(-z^2/2)`` (see the constants above for the source)."""
    x = abs(z) * _SQRTH
    if x < 1.0:
        t = z * _SQRTH
        w = t * t
        num = (((_ET0 * w + _ET1) * w + _ET2) * w + _ET3) * w + _ET4
        den = ((((w + _EU0) * w + _EU1) * w + _EU2) * w + _EU3) * w + _EU4
        return 0.5 + 0.5 * t * num / den
    num = (((((((_EP0 * x + _EP1) * x + _EP2) * x + _EP3) * x + _EP4) * x + _EP5) * x + _EP6) * x + _EP7) * x + _EP8
    den = (((((((x + _EQ0) * x + _EQ1) * x + _EQ2) * x + _EQ3) * x + _EQ4) * x + _EQ5) * x + _EQ6) * x + _EQ7
    y = 0.5 * e * num / den
    return y if z < 0.0 else 1.0 - y


@njit(cache=True, _nrt=False)
def _first(row, lo, hi, thr, mode):
    """Smallest k in [lo, hi) where the (monotone false -> true) predicate holds, else hi.

    mode 0: row[k] >= thr, 1: row[k] > thr, 2: row[k] <= thr, 3: row[k] < thr."""
    while lo < hi:
        mid = (lo + hi) // 2
        x = row[mid]
        if mode == 0:
            ok = x >= thr
        elif mode == 1:
            ok = x > thr
        elif mode == 2:
            ok = x <= thr
        else:
            ok = x < thr
        if ok:
            hi = mid
        else:
            lo = mid + 1
    return lo


@njit(cache=True, _nrt=False)
def _window(row, lo, hi, v0, half):
    """Index range [k0, k1] of the monotonic ``row[lo:hi]`` inside v0 +- half (k0 > k1: none)."""
    if row[hi - 1] >= row[lo]:
        k0 = _first(row, lo, hi, v0 - half, 0)
        k1 = _first(row, lo, hi, v0 + half, 1) - 1
    else:
        k0 = _first(row, lo, hi, v0 + half, 2)
        k1 = _first(row, lo, hi, v0 - half, 3) - 1
    return k0, k1


@njit(cache=True, _nrt=False, fastmath=_FM)
def _eval_model(p, cen, edg, cw, cax, cia, csc, civ, cis, nline, bkind, s_instr2, resp,
                mod, jac, mext, jext, Phi, phi, zb, want_jac, crng, rlo, rhi):
    """Model (nchan) and Jacobian rows (npar, nchan) at parameters ``p``.

    Only channels where a component differs from zero in double precision (|z| <= 9) are
    computed.  On return row k of ``jac`` is valid on channels [rlo[k], rhi[k]) and zero
    elsewhere by definition (entries outside are not written and must not be read).
    Work arrays use extended channel indices i = c + 1 (channels -1 .. nchan)."""
    nchan = mod.shape[0]
    ncomp = cax.shape[0]
    if resp == RESP_HANNING:
        e0, e1 = 0, nchan + 2  # extended channels -1 .. nchan
    else:
        e0, e1 = 1, nchan + 1
    # pass 1: channel range of every component, row hulls
    for k in range(nline):
        rlo[k] = e1
        rhi[k] = e0
    for j in range(ncomp):
        a = cax[j]
        s = math.sqrt(p[cis[j]] ** 2 + s_instr2)
        half = _ZCUT * s
        if resp == RESP_NONE:
            k0, k1 = _window(cen[a], 0, nchan, p[civ[j]], half)
            i0 = k0 + 1
            i1 = k1 + 2
        else:
            k0, k1 = _window(edg[a], e0, e1 + 1, p[civ[j]], half)
            # channel i spans edges i, i+1: channels k0-1 .. k1 touch an edge in the window
            # (a line narrower than a channel gives k0 = k1 + 1: just that channel)
            i0 = max(k0 - 1, e0)
            i1 = min(k1 + 1, e1)
        if i1 < i0:
            i1 = i0
        crng[j, 0] = i0
        crng[j, 1] = i1
        if i1 > i0:
            for k in (cia[j], civ[j], cis[j]):
                if i0 < rlo[k]:
                    rlo[k] = i0
                if i1 > rhi[k]:
                    rhi[k] = i1
    # without Hanning the components are accumulated straight into mod/jac (offset 1)
    hann = resp == RESP_HANNING
    MT = mext if hann else mod
    JT = jext if hann else jac
    off = 0 if hann else 1
    nt = MT.shape[0]
    for i in range(nt):
        MT[i] = 0.0
    if want_jac:
        for k in range(nline):
            if rhi[k] > rlo[k]:
                # two spare channels each side so the Hanning sums read zeros there
                for i in range(max(rlo[k] - 2 - off, 0), min(rhi[k] + 2 - off, nt)):
                    JT[k, i] = 0.0
    # pass 2: accumulate the components
    for j in range(ncomp):
        i0 = crng[j, 0]
        i1 = crng[j, 1]
        if i1 <= i0:
            continue
        a = cax[j]
        ka = cia[j]
        kv = civ[j]
        ks = cis[j]
        sc = csc[j]
        amp = sc * p[ka]
        v0 = p[kv]
        sig = p[ks]
        s = math.sqrt(sig * sig + s_instr2)
        dsds = sig / s  # d s_obs / d sigma
        inv_s = 1.0 / s
        if resp == RESP_NONE:
            for i in range(i0, i1):
                z = (cen[a, i - 1] - v0) * inv_s
                e = math.exp(-0.5 * z * z)
                MT[i - off] += amp * e
                if want_jac:
                    JT[ka, i - off] += sc * e
                    JT[kv, i - off] += amp * e * z * inv_s
                    JT[ks, i - off] += amp * e * z * z * inv_s * dsds
        else:
            for k in range(i0, i1 + 1):
                z = (edg[a, k] - v0) * inv_s
                zb[k] = z
                if z < -_ZCUT:
                    Phi[k] = 0.0
                    phi[k] = 0.0
                elif z > _ZCUT:
                    Phi[k] = 1.0
                    phi[k] = 0.0
                else:
                    e = math.exp(-0.5 * z * z)
                    Phi[k] = _ndtr_e(z, e)
                    phi[k] = _INV_SQRT2PI * e
            for i in range(i0, i1):
                dP = Phi[i + 1] - Phi[i]
                c0 = cw[a, i]  # sqrt(2 pi) / signed channel width (the sign cancels)
                fa = c0 * s * dP
                MT[i - off] += amp * fa
                if want_jac:
                    JT[ka, i - off] += sc * fa
                    JT[kv, i - off] -= amp * c0 * (phi[i + 1] - phi[i])
                    JT[ks, i - off] += amp * c0 * (dP - (zb[i + 1] * phi[i + 1] - zb[i] * phi[i])) * dsds
    # channel response, then the baseline (unchanged by a normalised symmetric kernel)
    if resp == RESP_HANNING:
        for c in range(nchan):
            mod[c] = 0.25 * mext[c] + 0.5 * mext[c + 1] + 0.25 * mext[c + 2]
        if want_jac:
            for k in range(nline):
                c0_ = max(rlo[k] - 2, 0)
                c1_ = min(rhi[k], nchan)
                if rhi[k] <= rlo[k]:
                    c1_ = c0_
                for c in range(c0_, c1_):
                    jac[k, c] = 0.25 * jext[k, c] + 0.5 * jext[k, c + 1] + 0.25 * jext[k, c + 2]
                rlo[k] = c0_
                rhi[k] = max(c1_, c0_)
    elif want_jac:
        for k in range(nline):
            c0_ = rlo[k] - 1
            c1_ = rhi[k] - 1
            if c1_ < c0_:
                c1_ = c0_
            rlo[k] = c0_
            rhi[k] = c1_
    if bkind >= 1:
        b0 = p[nline]
        for c in range(nchan):
            mod[c] += b0
        if want_jac:
            for c in range(nchan):
                jac[nline, c] = 1.0
            rlo[nline] = 0
            rhi[nline] = nchan
    if bkind == 2:
        b1 = p[nline + 1]
        mid = 0.5 * (nchan - 1)
        for c in range(nchan):
            mod[c] += b1 * (c - mid)
        if want_jac:
            for c in range(nchan):
                jac[nline + 1, c] = c - mid
            rlo[nline + 1] = 0
            rhi[nline + 1] = nchan


@njit(cache=True, _nrt=False)
def _model_range(s0, s1, params, cen, edg, cw, cax, cia, csc, civ, cis, nline, bkind, s_instr2, resp, out,
                 mod, jac, mext, jext, Phi, phi, zb, p, crng, rlo, rhi):
    """Model spectra s0 .. s1-1 of :func:`model_kernel` with the caller's work arrays."""
    nchan = out.shape[1]
    npar = params.shape[1]
    for s in range(s0, s1):
        ok = True
        for k in range(npar):
            p[k] = params[s, k]
            if not np.isfinite(p[k]):
                ok = False
        if not ok:
            for c in range(nchan):
                out[s, c] = np.nan
            continue
        _eval_model(p, cen, edg, cw, cax, cia, csc, civ, cis, nline, bkind, s_instr2, resp,
                    mod, jac, mext, jext, Phi, phi, zb, False, crng, rlo, rhi)
        for c in range(nchan):
            out[s, c] = mod[c]


@njit(parallel=True, cache=True)
def model_kernel(params, cen, edg, cw, cax, cia, csc, civ, cis, nline, bkind, s_instr2, resp, out):
    """Model spectra (nspec, nchan) for parameters (nspec, npar); NaN parameters give NaN."""
    nspec, nchan = out.shape
    npar = params.shape[1]
    nblk = (nspec + _BLOCK - 1) // _BLOCK
    for b in prange(nblk):
        _model_range(b * _BLOCK, min(nspec, (b + 1) * _BLOCK), params, cen, edg, cw, cax, cia, csc, civ, cis,
                     nline, bkind, s_instr2, resp, out, np.empty(nchan), np.empty((npar, nchan)),
                     np.empty(nchan + 2), np.empty((npar, nchan + 2)), np.empty(nchan + 3), np.empty(nchan + 3),
                     np.empty(nchan + 3), np.empty(npar), np.empty((cax.shape[0], 2), dtype=np.int64),
                     np.empty(npar, dtype=np.int64), np.empty(npar, dtype=np.int64))


# ----------------------------------------------------------------------------- linear algebra
@njit(cache=True, _nrt=False, error_model="numpy")
def _chol(M, n):
    """In-place lower Cholesky factor of M[:n, :n]; False if not positive definite.

    (error_model='numpy' here and below: every divisor is a checked positive pivot, so the
    zero-division tests numba would add are dead weight in these small, hot loops.)"""
    for j in range(n):
        d = M[j, j]
        for k in range(j):
            d -= M[j, k] * M[j, k]
        if not (d > 0.0) or not np.isfinite(d):
            return False
        d = math.sqrt(d)
        M[j, j] = d
        inv_d = 1.0 / d
        for i in range(j + 1, n):
            t = M[i, j]
            for k in range(j):
                t -= M[i, k] * M[j, k]
            M[i, j] = t * inv_d
    return True


@njit(cache=True, _nrt=False, error_model="numpy")
def _chol_solve(M, n, x):
    """Solve (L L^T) x = b in place (x holds b on entry), L from :func:`_chol`."""
    for i in range(n):
        t = x[i]
        for k in range(i):
            t -= M[i, k] * x[k]
        x[i] = t / M[i, i]
    for i in range(n - 1, -1, -1):
        t = x[i]
        for k in range(i + 1, n):
            t -= M[k, i] * x[k]
        x[i] = t / M[i, i]


@njit(cache=True, _nrt=False, error_model="numpy")
def _invert_subset(A, sel, nsel, W, x, cov):
    """cov[sel, sel] = inverse of A[sel, sel] (others NaN); False if singular.

    A = L L^T (Cholesky), L^-1 formed in place column by column, A^-1 = L^-T L^-1."""
    npar = A.shape[0]
    for i in range(npar):
        for k in range(npar):
            cov[i, k] = np.nan
    for i in range(nsel):
        for k in range(nsel):
            W[i, k] = A[sel[i], sel[k]]
    if not _chol(W, nsel):
        return False
    # column j of L^-1 overwrites column j of L: row i needs L[i, j..i] (not yet
    # overwritten) and the entries of column j above it (already inverted)
    for j in range(nsel):
        W[j, j] = 1.0 / W[j, j]
        for i in range(j + 1, nsel):
            t = W[i, j] * W[j, j]
            for k in range(j + 1, i):
                t += W[i, k] * W[k, j]
            W[i, j] = -t / W[i, i]
    for a in range(nsel):
        for b in range(a + 1):
            t = 0.0
            for k in range(a, nsel):
                t += W[k, a] * W[k, b]
            cov[sel[a], sel[b]] = t
            cov[sel[b], sel[a]] = t
    return True


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


# ----------------------------------------------------------------------------- one component, white noise
# The fused single-component path below is written as short branch-free loops over plain
# arrays so that LLVM vectorises them (error_model='numpy' drops the zero-division checks
# that would otherwise block vectorisation; every division here has a non-zero divisor).
_LOG2E = 1.4426950408889634
_LN2_HI = 6.93147180369123816490e-01  # ln 2 split in two parts (Cody & Waite 1980; fdlibm constants)
_LN2_LO = 1.90821492927058770002e-10
_X0, _X1, _X2, _X3, _X4, _X5, _X6, _X7, _X8, _X9, _X10, _X11, _X12, _X13 = (
    1.0 / math.factorial(_i) for _i in range(14))


@njit(cache=True, _nrt=False, fastmath={"nsz", "arcp", "contract"}, error_model="numpy")
def _vexp(x, bits, n):
    """x[:n] = exp(x[:n]) in place, vectorisable; arguments below -700 give exp(-700) ~ 1e-304
    (only edges beyond the cut get there, and those are set to 0 afterwards).

    exp(x) = 2^k exp(r), k = round(x / ln 2), r = x - k ln 2 (two-part ln 2), |r| <= 0.347,
    exp(r) by its Taylor polynomial of degree 13 (truncation < 5e-18 relative); 2^k is
    assembled from its IEEE-754 exponent bits.  Error a few ulp (tests compare with numpy).
    No 'reassoc' flag: it could undo the two-part reduction."""
    fb = bits.view(np.float64)
    for i in range(n):
        xi = max(x[i], -700.0)
        kf = math.floor(xi * _LOG2E + 0.5)
        r = (xi - kf * _LN2_HI) - kf * _LN2_LO
        x[i] = ((((((((((((_X13 * r + _X12) * r + _X11) * r + _X10) * r + _X9) * r + _X8) * r + _X7) * r
                       + _X6) * r + _X5) * r + _X4) * r + _X3) * r + _X2) * r + _X1) * r + _X0
        bits[i] = (np.int64(kf) + 1023) << 52
    for i in range(n):
        x[i] *= fb[i]


@njit(cache=True, _nrt=False, fastmath=_FM, error_model="numpy")
def _vndtr(z, e, out, n):
    """out[:n] = Phi(z[:n]) given e = exp(-z^2/2): :func:`_ndtr_e` written branch-free (both
    rational approximations evaluated, one division) so that the loop vectorises."""
    for i in range(n):
        zi = z[i]
        x = abs(zi) * _SQRTH
        w = x * x
        ns = (((_ET0 * w + _ET1) * w + _ET2) * w + _ET3) * w + _ET4
        ds = ((((w + _EU0) * w + _EU1) * w + _EU2) * w + _EU3) * w + _EU4
        nl = (((((((_EP0 * x + _EP1) * x + _EP2) * x + _EP3) * x + _EP4) * x + _EP5) * x + _EP6) * x + _EP7) * x + _EP8
        dl = (((((((x + _EQ0) * x + _EQ1) * x + _EQ2) * x + _EQ3) * x + _EQ4) * x + _EQ5) * x + _EQ6) * x + _EQ7
        small = x < 1.0
        q = 0.5 * (x * ns if small else e[i] * nl) / (ds if small else dl)  # erf(x) / 2 or erfc(x) / 2
        neg = zi < 0.0
        out[i] = (0.5 - q if neg else 0.5 + q) if small else (q if neg else 1.0 - q)


@njit(cache=True, _nrt=False, fastmath=_FM, error_model="numpy")
def _single_points(xs, npt, v0, inv_s, tophat, Z, E, P, bits):
    """z = (x - v0) / s, exp(-z^2/2) and (top-hat) Phi(z) at the npt points ``xs`` (channel
    edges for top-hat, centres for 'none'); the outer two edges are set to exactly 0 / 1
    beyond the cut, as in :func:`_eval_model`."""
    for i in range(npt):
        z = (xs[i] - v0) * inv_s
        Z[i] = z
        E[i] = -0.5 * z * z
    _vexp(E, bits, npt)
    if tophat:
        _vndtr(Z, E, P, npt)
        for i in (0, npt - 1):
            if Z[i] < -_ZCUT:
                P[i] = 0.0
                E[i] = 0.0
            elif Z[i] > _ZCUT:
                P[i] = 1.0
                E[i] = 0.0


@njit(cache=True, _nrt=False, fastmath=_FM, error_model="numpy")
def _eval_single(p, y, w, wsum, edg, cen, cw, ka, kv, ks, sc, nline, bkind, s_instr2, resp, inv_noise2,
                 A, g, S, Z, E, P, bits):
    """Model, normal equations and Newton correction of a one-component model with white noise,
    fused (no model or Jacobian arrays): the cheap path of the common case.

    ``y`` holds the data with NaN channels set to 0 and ``w`` their weights (1 finite, 0 NaN);
    ``wsum`` = (sum w, sum w t, sum w t^2) with t = c - (nchan - 1) / 2.  Fills ``A = J^T W J``,
    ``g = J^T W r`` and ``S = sum_c w_c r_c d2m_c / dp dp`` (the Hessian of chi2 / 2 is
    ``A - S``), in the model's parameter order; returns chi2.  The line is exactly 0 on
    channels more than _ZCUT observed dispersions from its centre (as in :func:`_eval_model`).
    Derivatives of F = s [Phi(z1) - Phi(z0)] (top-hat), z = (v - v0) / s, [f] = f(z1) - f(z0):
    F_v = -[phi], F_s = [Phi] - [z phi], F_vv = -[z phi] / s, F_vs = -[z^2 phi] / s,
    F_ss = -[z^3 phi] / s; for 'none' F = exp(-z^2/2), F_v = F z / s, F_s = F z^2 / s,
    F_vv = F (z^2 - 1) / s^2, F_vs = F z (z^2 - 2) / s^2, F_ss = F z^2 (z^2 - 3) / s^2.
    (With instrument s = sqrt(sigma^2 + s_instr^2): ds/dsigma = sigma / s and
    d2s/dsigma2 = s_instr^2 / s^3.)  ``Z``, ``E``, ``P`` (float) and ``bits`` (int64), at least
    nchan + 3 long, are work arrays."""
    nchan = y.shape[0]
    npar = p.shape[0]
    amp = sc * p[ka]
    v0 = p[kv]
    sig = p[ks]
    s = math.sqrt(sig * sig + s_instr2)
    inv_s = 1.0 / s
    dsds = sig * inv_s  # d s_obs / d sigma
    d2s = s_instr2 * inv_s * inv_s * inv_s  # d2 s_obs / d sigma2
    b0 = p[nline] if bkind >= 1 else 0.0
    b1 = p[nline + 1] if bkind == 2 else 0.0
    mid = 0.5 * (nchan - 1)
    half = _ZCUT * s
    if resp == RESP_NONE:
        k0, k1 = _window(cen, 0, nchan, v0, half)
        c0 = k0
        c1 = k1 + 1
    else:
        # real edges are edg[1 .. nchan+1]; channel c spans edg[c+1], edg[c+2], so channels
        # k0-2 .. k1-1 touch an edge inside the window (one channel if the line is narrower)
        k0, k1 = _window(edg, 1, nchan + 2, v0, half)
        c0 = max(k0 - 2, 0)
        c1 = min(k1, nchan)
    if c1 < c0:
        c1 = c0
    nw = c1 - c0
    c2 = 0.0
    gb0 = 0.0
    gb1 = 0.0
    # baseline-only channels (the line is exactly zero there)
    for c in range(0, c0):
        t = c - mid
        r = w[c] * (y[c] - b0 - b1 * t)
        c2 += r * r
        gb0 += r
        gb1 += t * r
    yw = y[c1:]
    ww = w[c1:]
    for i in range(nchan - c1):
        t = c1 + i - mid
        r = ww[i] * (yw[i] - b0 - b1 * t)
        c2 += r * r
        gb0 += r
        gb1 += t * r
    gA = gv = gs = 0.0
    aAA = aAv = aAs = avv = avs = ass = 0.0
    aAb0 = aAb1 = avb0 = avb1 = asb0 = asb1 = 0.0
    svv = svs = sss = 0.0
    if nw > 0:
        tophat = resp != RESP_NONE
        if tophat:
            # channel c0 + i spans edges edg[c0 + 1 + i], edg[c0 + 2 + i]
            _single_points(edg[c0 + 1:], nw + 1, v0, inv_s, True, Z, E, P, bits)
        else:
            _single_points(cen[c0:], nw, v0, inv_s, False, Z, E, P, bits)
        # loops index from 0 (views start at the window) so that LLVM sees unit-stride access
        # (an offset index could be negative for all it knows, and wraparound blocks vectorising)
        ws = cw[c0 + 1:]
        yw = y[c0:]
        ww = w[c0:]
        is2 = inv_s * inv_s
        for i in range(nw):
            # unit-amplitude F and its derivatives (times sqrt(2 pi) / width for top-hat)
            za = Z[i]
            if tophat:
                zb = Z[i + 1]
                qa1 = _INV_SQRT2PI * E[i]
                qb1 = _INV_SQRT2PI * E[i + 1]
                qa2 = za * qa1
                qb2 = zb * qb1
                qa3 = za * qa2
                qb3 = zb * qb2
                cc = ws[i]  # sqrt(2 pi) / signed channel width (the sign cancels)
                ccs = cc * inv_s
                dP = P[i + 1] - P[i]
                dq2 = qb2 - qa2
                f0 = cc * s * dP
                fv = -cc * (qb1 - qa1)
                fs = cc * (dP - dq2)
                fvv = -ccs * dq2
                fvs = -ccs * (qb3 - qa3)
                fss = -ccs * (zb * qb3 - za * qa3)
            else:
                e = E[i]
                zz = za * za
                ei2 = e * is2
                f0 = e
                fv = e * za * inv_s
                fs = fv * za
                fvv = ei2 * (zz - 1.0)
                fvs = ei2 * za * (zz - 2.0)
                fss = ei2 * zz * (zz - 3.0)
            t = c0 + i - mid
            wc = ww[i]
            r = wc * (yw[i] - amp * f0 - b0 - b1 * t)
            c2 += r * r
            gb0 += r
            gb1 += t * r
            gA += f0 * r
            gv += fv * r
            gs += fs * r
            wf0 = wc * f0
            wfv = wc * fv
            wfs = wc * fs
            aAA += wf0 * f0
            aAv += wf0 * fv
            aAs += wf0 * fs
            avv += wfv * fv
            avs += wfv * fs
            ass += wfs * fs
            aAb0 += wf0
            aAb1 += wf0 * t
            avb0 += wfv
            avb1 += wfv * t
            asb0 += wfs
            asb1 += wfs * t
            svv += fvv * r
            svs += fvs * r
            sss += fss * r
    # scale to parameters and noise, scatter into the model's parameter order
    ad = amp * dsds
    for k in range(npar):
        for l in range(npar):
            A[k, l] = 0.0
            S[k, l] = 0.0
    g[ka] = sc * gA * inv_noise2
    g[kv] = amp * gv * inv_noise2
    g[ks] = ad * gs * inv_noise2
    A[ka, ka] = sc * sc * aAA * inv_noise2
    A[kv, kv] = amp * amp * avv * inv_noise2
    A[ks, ks] = ad * ad * ass * inv_noise2
    A[ka, kv] = A[kv, ka] = sc * amp * aAv * inv_noise2
    A[ka, ks] = A[ks, ka] = sc * ad * aAs * inv_noise2
    A[kv, ks] = A[ks, kv] = amp * ad * avs * inv_noise2
    S[ka, kv] = S[kv, ka] = sc * gv * inv_noise2
    S[ka, ks] = S[ks, ka] = sc * dsds * gs * inv_noise2
    S[kv, kv] = amp * svv * inv_noise2
    S[kv, ks] = S[ks, kv] = ad * svs * inv_noise2
    S[ks, ks] = amp * (dsds * dsds * sss + d2s * gs) * inv_noise2
    if bkind >= 1:
        kb = nline
        g[kb] = gb0 * inv_noise2
        A[kb, kb] = wsum[0] * inv_noise2
        A[ka, kb] = A[kb, ka] = sc * aAb0 * inv_noise2
        A[kv, kb] = A[kb, kv] = amp * avb0 * inv_noise2
        A[ks, kb] = A[kb, ks] = ad * asb0 * inv_noise2
    if bkind == 2:
        kb = nline
        kt = nline + 1
        g[kt] = gb1 * inv_noise2
        A[kt, kt] = wsum[2] * inv_noise2
        A[kb, kt] = A[kt, kb] = wsum[1] * inv_noise2
        A[ka, kt] = A[kt, ka] = sc * aAb1 * inv_noise2
        A[kv, kt] = A[kt, kv] = amp * avb1 * inv_noise2
        A[ks, kt] = A[kt, ks] = ad * asb1 * inv_noise2
    return c2 * inv_noise2


# ----------------------------------------------------------------------------- optimiser
@njit(cache=True, _nrt=False, error_model="numpy")
def _evaluate(p, y, idx, pos, m, inv_noise, corr, L0, L1, L2, cen, edg, cw, cax, cia, csc, civ, cis,
              nline, bkind, s_instr2, resp, mod, jac, mext, jext, Phi, phi, zb, r, rw, Jw, A, g,
              crng, rlo, rhi, qlo, qhi):
    """Generic path: model + Jacobian arrays, then chi2, normal matrix A and gradient g."""
    _eval_model(p, cen, edg, cw, cax, cia, csc, civ, cis, nline, bkind, s_instr2, resp,
                mod, jac, mext, jext, Phi, phi, zb, True, crng, rlo, rhi)
    return _residual_system(y, mod, jac, idx, pos, m, inv_noise, corr, L0, L1, L2, r, rw, Jw, A, g,
                            rlo, rhi, qlo, qhi, True)


@njit(cache=True, _nrt=False, error_model="numpy")
def _decrement(A, g, sel, nf, M, x):
    """Gauss-Newton decrement g^T A^-1 g over the free parameters (NaN if A is singular)."""
    for i in range(nf):
        for l in range(nf):
            M[i, l] = A[sel[i], sel[l]]
        x[i] = g[sel[i]]
    if not _chol(M, nf):
        return np.nan
    _chol_solve(M, nf, x)
    dec = 0.0
    for i in range(nf):
        dec += g[sel[i]] * x[i]
    return dec


@njit(cache=True, _nrt=False, error_model="numpy")
def _fit_one(single, y, yz, wts, wsum, m, neff, idx, pos, noise, p, lo, hi, cen, edg, cw, cax, cia, csc, civ,
             cis, nline, bkind, s_instr2, resp, corr, L0, L1, L2, max_iter, tol, cov,
             mod, jac, mext, jext, Phi, phi, zb, r, rw, Jw, A, g, S,
             pt, modt, jact, rwt, Jwt, At, gt, St, D, M, x, dl, sel,
             crng, rlo, rhi, rlot, rhit, qlo, qhi, W, bits):
    """Levenberg-Marquardt with box bounds for one spectrum.

    Bounds are handled by projection: trial points are clipped onto the box, and a parameter
    sitting on a bound whose gradient points outward is frozen for that iteration (a simple
    active set), so the remaining parameters still take Gauss-Newton-like steps.
    With ``single`` (one component, white noise; evaluated by :func:`_eval_single`) the step
    uses the full Hessian of chi2, ``A - S``, once the Gauss-Newton decrement is below
    _NEWTON_BELOW (Newton: quadratic instead of linear convergence near the minimum) and
    while that matrix plus the damping is positive definite, else the Gauss-Newton matrix
    ``A``; the generic path (:func:`_evaluate`) always uses ``A`` (S = 0).
    Convergence: the Gauss-Newton decrement g^T A^-1 g (the chi2 the next full step would
    gain, i.e. the squared distance to the minimum in units of the error ellipse) falls
    below ``tol * max(1, chi2_reduced)``.  The covariance is (J^T W J)^-1 = A^-1 at the final
    point in both cases.

    Returns (status, n_iter, chi2); ``p`` is updated in place, ``cov`` filled.
    """
    npar = p.shape[0]
    inv_noise = 1.0 / noise
    for k in range(npar):
        for l in range(npar):
            S[k, l] = 0.0
            St[k, l] = 0.0
    # single path: its arguments once (calls with few arguments are cheaper)
    a0 = cax[0]
    erow = edg[a0]
    crow = cen[a0]
    wrow = cw[a0]
    ka = cia[0]
    kv = civ[0]
    ks = cis[0]
    sc0 = csc[0]
    inv_noise2 = inv_noise * inv_noise
    Z = W[0]
    E = W[1]
    P = W[2]
    if single:
        chi2 = _eval_single(p, yz, wts, wsum, erow, crow, wrow, ka, kv, ks, sc0, nline, bkind, s_instr2, resp,
                            inv_noise2, A, g, S, Z, E, P, bits)
    else:
        chi2 = _evaluate(p, y, idx, pos, m, inv_noise, corr, L0, L1, L2, cen, edg, cw, cax, cia, csc, civ, cis,
                         nline, bkind, s_instr2, resp, mod, jac, mext, jext, Phi, phi, zb, r, rw, Jw, A, g,
                         crng, rlo, rhi, qlo, qhi)
    if not np.isfinite(chi2):
        return _FAILED, 0, chi2
    dof = max(neff - npar, 1.0)
    for k in range(npar):
        D[k] = A[k, k]
    lam = _LAM0
    nu = 2.0
    status = _NOT_CONVERGED
    it = 0
    while it < max_iter:
        it += 1
        # active set: freeze parameters on a bound that want to leave the box
        nf = 0
        for k in range(npar):
            out = (p[k] <= lo[k] and g[k] < 0.0) or (p[k] >= hi[k] and g[k] > 0.0)
            if not out:
                sel[nf] = k
                nf += 1
            if A[k, k] > D[k]:
                D[k] = A[k, k]
        if nf == 0:
            status = _OK
            break
        # Gauss-Newton decrement for the convergence test
        dec = _decrement(A, g, sel, nf, M, x)
        if dec < tol * max(1.0, chi2 / dof):
            status = _OK
            break
        # damped steps until chi2 decreases
        accepted = False
        while lam < _LAM_MAX:
            # Newton matrix A - S close to the minimum (S = 0 on the generic path), else, or if
            # not positive definite, Gauss-Newton
            newton = single and dec < _NEWTON_BELOW
            while True:
                for i in range(nf):
                    for l in range(nf):
                        M[i, l] = A[sel[i], sel[l]] - (S[sel[i], sel[l]] if newton else 0.0)
                    M[i, i] += lam * max(D[sel[i]], 1e-300)
                    x[i] = g[sel[i]]
                factored = _chol(M, nf)
                if factored or not newton:
                    break
                newton = False
            if not factored:
                lam *= nu
                nu *= 2.0
                continue
            _chol_solve(M, nf, x)
            for k in range(npar):
                dl[k] = 0.0
            for i in range(nf):
                dl[sel[i]] = x[i]
            for k in range(npar):
                t = p[k] + dl[k]
                if t < lo[k]:
                    t = lo[k]
                elif t > hi[k]:
                    t = hi[k]
                pt[k] = t
            if single:
                chi2t = _eval_single(pt, yz, wts, wsum, erow, crow, wrow, ka, kv, ks, sc0, nline, bkind, s_instr2,
                                     resp, inv_noise2, At, gt, St, Z, E, P, bits)
            else:
                chi2t = _evaluate(pt, y, idx, pos, m, inv_noise, corr, L0, L1, L2, cen, edg, cw, cax, cia, csc,
                                  civ, cis, nline, bkind, s_instr2, resp, modt, jact, mext, jext, Phi, phi, zb, r,
                                  rwt, Jwt, At, gt, crng, rlot, rhit, qlo, qhi)
            if np.isfinite(chi2t) and chi2t < chi2:
                # gain ratio: actual / predicted (quadratic-model) decrease of the step taken
                pred = 0.0
                for k in range(npar):
                    dk = pt[k] - p[k]
                    t = 2.0 * g[k]
                    for l in range(npar):
                        t -= (A[k, l] - (S[k, l] if newton else 0.0)) * (pt[l] - p[l])
                    pred += dk * t
                rho = (chi2 - chi2t) / pred if pred > 0 else 1.0
                # Nielsen (1999) damping update: shrink lambda after good steps, grow it
                # after poor ones (this stops Gauss-Newton zigzagging on large residuals)
                lam = lam * max(1.0 / 3.0, 1.0 - (2.0 * rho - 1.0) ** 3)
                if lam < 1e-12:
                    lam = 1e-12
                nu = 2.0
                accepted = True
                chi2 = chi2t
                for k in range(npar):
                    p[k] = pt[k]
                mod, modt = modt, mod
                jac, jact = jact, jac
                rw, rwt = rwt, rw
                Jw, Jwt = Jwt, Jw
                A, At = At, A
                g, gt = gt, g
                S, St = St, S
                rlo, rlot = rlot, rlo
                rhi, rhit = rhit, rhi
                break
            lam *= nu
            nu *= 2.0
        if not accepted:
            # no decrease possible at any damping: we sit at the minimum to rounding
            # precision if the Gauss-Newton decrement is tiny anyway, otherwise give up
            status = _NOT_CONVERGED
            dec = _decrement(A, g, sel, nf, M, x)
            if dec < 1e3 * tol * max(1.0, chi2 / dof):
                status = _OK
            break
    if status == _OK:
        for k in range(npar):
            if p[k] <= lo[k] or p[k] >= hi[k]:
                status = _AT_BOUND
    # covariance (J^T W J)^-1 at the final point; parameters on a bound are dropped from the
    # inversion only if the full matrix is singular
    for k in range(npar):
        sel[k] = k
    if not _invert_subset(A, sel, npar, M, x, cov):
        ns = 0
        for k in range(npar):
            if not (p[k] <= lo[k] or p[k] >= hi[k]):
                sel[ns] = k
                ns += 1
        ok = ns > 0 and ns < npar and _invert_subset(A, sel, ns, M, x, cov)
        if not ok and status == _OK:
            status = _FAILED
    return status, it, chi2


@njit(cache=True, _nrt=False, error_model="numpy")
def _load_spectrum(row, y, yz, wts, wsum, mid):
    """Copy one spectrum; yz = data with NaN channels set to 0, wts = 1 (finite) or 0 (NaN),
    wsum = (sum w, sum w t, sum w t^2), t = c - mid.  Returns the number of finite channels.

    Branch-free and IEEE-exact (no fastmath next to the NaN test).  With every channel
    finite the sums are the closed forms n, 0, n (n^2 - 1) / 12 -- exactly what summing the
    (half-)integers t would give, since all partial sums are exact in double precision."""
    n = row.shape[0]
    m = 0
    for c in range(n):
        yc = row[c]
        y[c] = yc
        fin = np.isfinite(yc)
        yz[c] = yc if fin else 0.0
        wts[c] = 1.0 if fin else 0.0
        m += 1 if fin else 0
    if m == n:
        wsum[0] = n
        wsum[1] = 0.0
        wsum[2] = n * (n * n - 1) / 12.0
    else:
        s1 = 0.0
        s2 = 0.0
        for c in range(n):
            t = (c - mid) * wts[c]
            s1 += t
            s2 += t * t
        wsum[0] = m
        wsum[1] = s1
        wsum[2] = s2
    return m


@njit(cache=True, _nrt=False)
def _work_size(nchan, npar, ncomp):
    """Sizes (float, int64) of the work buffers one block of fits carves its arrays from
    (layout in :func:`_fit_range`)."""
    nf = (17 * nchan + (nchan + 2) + 6 * (nchan + 3) + 4 * npar * nchan + npar * (nchan + 2) + 6 * npar * npar
          + 7 * npar + 3)
    ni = 2 * nchan + 1 + (nchan + 3) + 2 * ncomp + 7 * npar
    return nf, ni


@njit(cache=True, _nrt=False, error_model="numpy")
def _fit_range(s0, s1, single, data, noise, p0, lo, hi, prestat, cen, edg, cw, cax, cia, csc, civ, cis, nline,
               bkind, s_instr2, resp, corr, rho1, rho2, floor, max_iter, tol,
               params, cov, chi2, nfit, neff, status, niter, wf, wi):
    """Fit spectra s0 .. s1-1; the work arrays are views of the caller's buffers ``wf`` /
    ``wi`` (sizes from :func:`_work_size`), carved once per block."""
    nchan = data.shape[1]
    npar = p0.shape[1]
    ncomp = cax.shape[0]
    mid = 0.5 * (nchan - 1)
    n1 = nchan + 3
    nj = npar * nchan
    n2 = npar * npar
    vecs = wf[:17 * nchan].reshape((17, nchan))
    y, yz, wts, L0, L1, L2, Z0, Z1, Z2 = vecs[0], vecs[1], vecs[2], vecs[3], vecs[4], vecs[5], vecs[6], vecs[7], vecs[8]
    mod, modt, r, rw, rwt = vecs[9], vecs[10], vecs[11], vecs[12], vecs[13]
    o = 17 * nchan
    mext = wf[o:o + nchan + 2]
    o += nchan + 2
    edges = wf[o:o + 6 * n1].reshape((6, n1))
    Phi, phi, zb = edges[0], edges[1], edges[2]
    W = edges[3:6]
    o += 6 * n1
    jacs = wf[o:o + 4 * nj].reshape((4, npar, nchan))
    jac, jact, Jw, Jwt = jacs[0], jacs[1], jacs[2], jacs[3]
    o += 4 * nj
    jext = wf[o:o + npar * (nchan + 2)].reshape((npar, nchan + 2))
    o += npar * (nchan + 2)
    mats = wf[o:o + 6 * n2].reshape((6, npar, npar))
    A, At, S, St, M, cv = mats[0], mats[1], mats[2], mats[3], mats[4], mats[5]
    o += 6 * n2
    pv = wf[o:o + 7 * npar].reshape((7, npar))
    g, gt, pt, D, x, dl, p = pv[0], pv[1], pv[2], pv[3], pv[4], pv[5], pv[6]
    o += 7 * npar
    wsum = wf[o:o + 3]
    o += 3
    idx = wi[0:nchan]
    pos = wi[nchan:2 * nchan + 1]
    q = 2 * nchan + 1
    bits = wi[q:q + n1]
    q += n1
    crng = wi[q:q + 2 * ncomp].reshape((ncomp, 2))
    q += 2 * ncomp
    iv = wi[q:q + 7 * npar].reshape((7, npar))
    sel, rlo, rhi, rlot, rhit, qlo, qhi = iv[0], iv[1], iv[2], iv[3], iv[4], iv[5], iv[6]
    q += 7 * npar
    if o > wf.shape[0] or q > wi.shape[0]:
        raise ValueError("linefit internal error: work buffers too small")
    for s in range(s0, s1):
        for k in range(npar):
            params[s, k] = np.nan
            for l in range(npar):
                cov[s, k, l] = np.nan
        chi2[s] = np.nan
        niter[s] = 0
        m = _load_spectrum(data[s], y, yz, wts, wsum, mid)
        if not single:
            # compressed (finite-channel) indices for the generic path
            m = 0
            for c in range(nchan):
                pos[c] = m  # compressed index of the first finite channel >= c
                idx[m] = c
                m += 1 if wts[c] > 0.0 else 0
            pos[nchan] = m
        nfit[s] = m
        neff[s] = m
        if prestat[s] != 0:
            status[s] = prestat[s]
            continue
        okp = True
        for k in range(npar):
            p[k] = min(max(p0[s, k], lo[s, k]), hi[s, k])
            if not np.isfinite(p[k]):
                okp = False
        if not okp:
            status[s] = _FAILED
            continue
        if corr:
            if not _band_chol(idx, m, rho1, rho2, floor, L0, L1, L2):
                status[s] = _FAILED
                continue
            # E[chi2] of pure noise under the floored correlation model is
            # tr(R'^-1 R) = (m - floor tr(R'^-1)) / (1 - floor), slightly below m
            if floor > 0.0:
                neff[s] = (m - floor * _band_inv_trace(m, L0, L1, L2, Z0, Z1, Z2)) / (1.0 - floor)
        st, it, c2 = _fit_one(single, y, yz, wts, wsum, m, neff[s], idx, pos, noise[s], p, lo[s], hi[s],
                              cen, edg, cw, cax, cia, csc, civ, cis, nline, bkind, s_instr2, resp, corr,
                              L0, L1, L2, max_iter, tol, cv,
                              mod, jac, mext, jext, Phi, phi, zb, r, rw, Jw, A, g, S,
                              pt, modt, jact, rwt, Jwt, At, gt, St, D, M, x, dl, sel,
                              crng, rlo, rhi, rlot, rhit, qlo, qhi, W, bits)
        status[s] = st
        niter[s] = it
        chi2[s] = c2
        for k in range(npar):
            params[s, k] = p[k]
            for l in range(npar):
                cov[s, k, l] = cv[k, l]



@njit(parallel=True, cache=True)
def fit_kernel(data, noise, p0, lo, hi, prestat, cen, edg, cw, cax, cia, csc, civ, cis, nline, bkind,
               s_instr2, resp, rho1, rho2, floor, max_iter, tol,
               params, cov, chi2, nfit, neff, status, niter):
    """Fit every spectrum whose ``prestat`` is 0; others keep ``prestat`` and NaN outputs.

    The parallel loop runs over blocks of _BLOCK spectra; each block allocates two zeroed
    work buffers and hands them to :func:`_fit_range`, which carves its arrays from them and
    is compiled without reference counting (the atomic increments numba otherwise emits
    around every array passed to a call cost more than a model evaluation)."""
    nspec, nchan = data.shape
    npar = p0.shape[1]
    corr = rho1 != 0.0 or rho2 != 0.0
    # one component with white noise and top-hat or sampled channels: fused evaluation +
    # Newton steps (_eval_single); everything else takes the generic path
    single = cax.shape[0] == 1 and not corr and resp != RESP_HANNING
    nblk = (nspec + _BLOCK - 1) // _BLOCK
    nf, ni = _work_size(nchan, npar, cax.shape[0])
    for b in prange(nblk):
        _fit_range(b * _BLOCK, min(nspec, (b + 1) * _BLOCK), single, data, noise, p0, lo, hi, prestat,
                   cen, edg, cw, cax, cia, csc, civ, cis, nline, bkind, s_instr2, resp, corr, rho1, rho2, floor,
                   max_iter, tol, params, cov, chi2, nfit, neff, status, niter,
                   np.zeros(nf), np.zeros(ni, dtype=np.int64))


# ----------------------------------------------------------------------------- initial guesses
@njit(cache=True, _nrt=False)
def _nearest_channel(row, v):
    """Index of the channel centre nearest to v on a monotonic axis; -1 if outside the band."""
    n = row.shape[0]
    inc = row[n - 1] > row[0]
    lo_v = row[0] if inc else row[n - 1]
    hi_v = row[n - 1] if inc else row[0]
    half0 = 0.5 * abs(row[1] - row[0])
    half1 = 0.5 * abs(row[n - 1] - row[n - 2])
    if v < lo_v - (half0 if inc else half1) or v > hi_v + (half1 if inc else half0):
        return -1
    a, b = 0, n - 1
    while b - a > 1:
        mid = (a + b) // 2
        if (row[mid] <= v) == inc:
            a = mid
        else:
            b = mid
    return a if abs(row[a] - v) <= abs(row[b] - v) else b


@njit(cache=True, _nrt=False)
def _window_sigma(res, row, c0, thr, peak):
    """Truncation-corrected second moment (km/s^2) of the contiguous run of channels around
    c0 above ``thr``; NaN channels are stepped over.  Returns -1 if fewer than 2 channels."""
    n = res.shape[0]
    a = c0
    while a - 1 >= 0 and (res[a - 1] > thr or not np.isfinite(res[a - 1])):
        a -= 1
    b = c0
    while b + 1 < n and (res[b + 1] > thr or not np.isfinite(res[b + 1])):
        b += 1
    s0 = 0.0
    s1 = 0.0
    cnt = 0
    for c in range(a, b + 1):
        if np.isfinite(res[c]) and res[c] > 0:
            s0 += res[c]
            s1 += res[c] * row[c]
            cnt += 1
    if cnt < 2 or s0 <= 0:
        return -1.0, row[c0]
    m1 = s1 / s0
    s2 = 0.0
    for c in range(a, b + 1):
        if np.isfinite(res[c]) and res[c] > 0:
            s2 += res[c] * (row[c] - m1) ** 2
    m2 = s2 / s0
    # a Gaussian cut at +-t sigma keeps the fraction f = 1 - 2 t phi(t) / erf(t/sqrt2) of its
    # variance; t follows from the cut level thr/peak
    if peak > thr and thr > 0:
        t = math.sqrt(2.0 * math.log(peak / thr))
        f = 1.0 - 2.0 * t * _INV_SQRT2PI * math.exp(-0.5 * t * t) / math.erf(t * _INV_SQRT2)
        f = max(f, 0.2)
        m2 = m2 / f
    return m2, m1


@njit(cache=True, _nrt=False, fastmath={"nsz", "contract"}, error_model="numpy")
def _count_below(a, n, t):
    """Number of a[:n] below t (a vectorised loop)."""
    c = 0
    for i in range(n):
        c += 1 if a[i] < t else 0
    return c


@njit(cache=True, _nrt=False, fastmath={"nsz", "contract"}, error_model="numpy")
def _median(a, n, buf):
    """Exact median of the finite values a[:n] (``a`` is not modified; ``buf`` is scratch, >= n).

    Bisection on the value: [lo, hi] is narrowed, with branch-free counts of the values below
    the midpoint, until it holds at most 8 values but still both middle ranks; those are
    then sorted.  About 3x faster than a selection algorithm for ~100 values, whose
    data-dependent branches mispredict."""
    klo = (n - 1) // 2
    khi = n // 2
    lo = a[0]
    hi = a[0]
    for i in range(n):
        lo = min(lo, a[i])
        hi = max(hi, a[i])
    nlo = 0  # values below lo
    nin = n  # values in [lo, hi]
    for _ in range(80):
        if nin <= 8:
            break
        t = 0.5 * (lo + hi)
        if not (lo < t and t < hi):
            break  # lo and hi are neighbouring doubles
        c = _count_below(a, n, t)
        if c > khi:
            nin = c - nlo
            hi = np.nextafter(t, -np.inf)  # [lo, hi] = [lo, t)
        elif c <= klo:
            nin -= c - nlo
            nlo = c
            lo = t
        else:
            break  # t separates the two middle ranks: both are in [lo, hi]
    m = 0
    for i in range(n):
        x = a[i]
        buf[m] = x
        m += 1 if (x >= lo and x <= hi) else 0
    for i in range(1, m):
        x = buf[i]
        j = i - 1
        while j >= 0 and buf[j] > x:
            buf[j + 1] = buf[j]
            j -= 1
        buf[j + 1] = x
    return 0.5 * (buf[klo - nlo] + buf[khi - nlo])


@njit(cache=True, _nrt=False)
def _log_parabola(res, row, c0, thr):
    """Gaussian through the contiguous run of channels around c0 above ``thr`` by a weighted
    least-squares parabola fitted to ln(data), weights data^2 (Guo 2011, IEEE Signal
    Processing Magazine 28, 134; from memory).  Returns (ok, peak, centre, variance)."""
    n = res.shape[0]
    a = c0
    while a - 1 >= 0 and (res[a - 1] > thr or not np.isfinite(res[a - 1])):
        a -= 1
    b = c0
    while b + 1 < n and (res[b + 1] > thr or not np.isfinite(res[b + 1])):
        b += 1
    x0 = row[c0]
    sc = abs(row[min(c0 + 1, n - 1)] - row[max(c0 - 1, 0)])  # conditioning: x in ~channel units
    if sc <= 0:
        return False, 0.0, 0.0, 0.0
    s00 = s01 = s02 = s03 = s04 = 0.0
    t0 = t1 = t2 = 0.0
    cnt = 0
    for c in range(a, b + 1):
        yv = res[c]
        if not np.isfinite(yv) or yv <= 0:
            continue
        x = (row[c] - x0) / sc
        w = yv * yv
        ly = math.log(yv)
        s00 += w
        s01 += w * x
        s02 += w * x * x
        s03 += w * x * x * x
        s04 += w * x * x * x * x
        t0 += w * ly
        t1 += w * x * ly
        t2 += w * x * x * ly
        cnt += 1
    if cnt < 3:
        return False, 0.0, 0.0, 0.0
    # solve the symmetric 3x3 system by Cramer's rule
    det = s00 * (s02 * s04 - s03 * s03) - s01 * (s01 * s04 - s03 * s02) + s02 * (s01 * s03 - s02 * s02)
    if not (abs(det) > 0):
        return False, 0.0, 0.0, 0.0
    ca = (t0 * (s02 * s04 - s03 * s03) - s01 * (t1 * s04 - s03 * t2) + s02 * (t1 * s03 - s02 * t2)) / det
    cb = (s00 * (t1 * s04 - t2 * s03) - t0 * (s01 * s04 - s03 * s02) + s02 * (s01 * t2 - t1 * s02)) / det
    cc = (s00 * (s02 * t2 - s03 * t1) - s01 * (s01 * t2 - s02 * t1) + t0 * (s01 * s03 - s02 * s02)) / det
    if not (cc < 0):
        return False, 0.0, 0.0, 0.0
    xc = -cb / (2.0 * cc)
    lo_x = (min(row[a], row[b]) - x0) / sc
    hi_x = (max(row[a], row[b]) - x0) / sc
    if not (lo_x <= xc <= hi_x):
        return False, 0.0, 0.0, 0.0
    var = -1.0 / (2.0 * cc) * sc * sc
    peak = math.exp(ca - cb * cb / (4.0 * cc))
    return np.isfinite(peak) and np.isfinite(var), peak, x0 + xc * sc, var


@njit(cache=True, _nrt=False)
def _smooth3(x, out):
    """[1/4, 1/2, 1/4] smoothing that skips NaN channels (weights renormalised).

    Written with selects instead of branches (same sums in the same order) so that the
    interior loop vectorises."""
    n = x.shape[0]
    for c in (0, n - 1):
        s = 0.0
        w = 0.0
        if np.isfinite(x[c]):
            s = 0.5 * x[c]
            w = 0.5
        if c > 0 and np.isfinite(x[c - 1]):
            s += 0.25 * x[c - 1]
            w += 0.25
        if c + 1 < n and np.isfinite(x[c + 1]):
            s += 0.25 * x[c + 1]
            w += 0.25
        out[c] = s / w if w > 0 else np.nan
    xl = x[:n - 2]
    xc = x[1:n - 1]
    xr = x[2:]
    oc = out[1:n - 1]
    for i in range(n - 2):
        a = xl[i]
        b = xc[i]
        d = xr[i]
        fa = np.isfinite(a)
        fb = np.isfinite(b)
        fd = np.isfinite(d)
        s = (0.5 * b if fb else 0.0) + (0.25 * a if fa else 0.0) + (0.25 * d if fd else 0.0)
        w = (0.5 if fb else 0.0) + (0.25 if fa else 0.0) + (0.25 if fd else 0.0)
        oc[i] = s / w if w > 0 else np.nan


@njit(cache=True, _nrt=False)
def _count_groups(civ):
    """Number of distinct velocity parameters (a function, so that numba types the count as
    int64 rather than compiling the guess code a second time for a literal 0)."""
    n = 0
    for j in range(civ.shape[0]):
        first = True
        for jj in range(j):
            if civ[jj] == civ[j]:
                first = False
        if first:
            n += 1
    return n


@njit(parallel=True, cache=True)
def guess_kernel(data, noise, cen, cwidth, cax, cia, csc, civ, cis, roles, nline, bkind,
                 s_instr2, resp_var, lo, hi, split_below, p0, peak_snr, nfinite):
    """Initial parameters from peaks and windowed moments (see ``initial_guess``)."""
    nspec, nchan = data.shape
    npar = p0.shape[1]
    ngroups = _count_groups(civ)
    nblk = (nspec + _BLOCK - 1) // _BLOCK
    for b in prange(nblk):
        # work arrays once per block; the per-spectrum loop runs without reference counting
        _guess_range(b * _BLOCK, min(nspec, (b + 1) * _BLOCK), data, noise, cen, cwidth, cax, cia, csc, civ,
                     cis, roles, nline, bkind, s_instr2, resp_var, lo, hi, split_below, p0, peak_snr, nfinite,
                     ngroups, np.empty(nchan), np.empty(nchan), np.empty(nchan), np.empty(nchan),
                     np.empty(nchan), np.zeros(npar, dtype=np.bool_), np.zeros(npar), np.zeros(npar))


@njit(cache=True, _nrt=False)
def _guess_range(s0, s1, data, noise, cen, cwidth, cax, cia, csc, civ, cis, roles, nline, bkind, s_instr2,
                 resp_var, lo, hi, split_below, p0, peak_snr, nfinite, ngroups,
                 y, res, sm, fin, tfin, done_v, amp_scale, sig_src):
    """Initial guesses of spectra s0 .. s1-1 (``amp_scale``: scale of the component that set
    each amplitude guess; ``sig_src``: brightness of the component that set each sigma guess)."""
    for s in range(s0, s1):
        _guess_one(s, data, noise, cen, cwidth, cax, cia, csc, civ, cis, roles, nline, bkind, s_instr2,
                   resp_var, lo, hi, split_below, p0, peak_snr, nfinite, ngroups,
                   y, res, sm, fin, tfin, done_v, amp_scale, sig_src)


@njit(cache=True, _nrt=False)
def _guess_one(s, data, noise, cen, cwidth, cax, cia, csc, civ, cis, roles, nline, bkind, s_instr2,
               resp_var, lo, hi, split_below, p0, peak_snr, nfinite, ngroups,
               y, res, sm, fin, tfin, done_v, amp_scale, sig_src):
    """Initial guess of one spectrum (see ``initial_guess`` for the recipe)."""
    nchan = data.shape[1]
    npar = p0.shape[1]
    ncomp = cax.shape[0]
    for k in range(npar):
        done_v[k] = False
        amp_scale[k] = 0.0
        sig_src[k] = 0.0
    m = 0
    for c in range(nchan):  # branch-free compaction of the finite channels
        yc = data[s, c]
        y[c] = yc
        fin[m] = yc
        tfin[m] = c - 0.5 * (nchan - 1)
        m += 1 if np.isfinite(yc) else 0
    nfinite[s] = m
    for k in range(npar):
        p0[s, k] = np.nan
    if m == 0 or not (noise[s] > 0) or not np.isfinite(noise[s]):
        peak_snr[s] = np.nan
        return
    nz = noise[s]
    # baseline guess
    b0 = 0.0
    b1 = 0.0
    if bkind == 1:
        b0 = _median(fin, m, res)  # res is filled only after the baseline
    elif bkind == 2:
        q = max(1, m // 4)
        tl = 0.5 * (tfin[0] + tfin[q - 1])
        tr = 0.5 * (tfin[m - q] + tfin[m - 1])
        right = _median(fin[m - q:m], q, res)
        left = _median(fin[:q], q, res)
        if tr > tl:
            b1 = (right - left) / (tr - tl)
        b0 = left - b1 * tl
    if bkind >= 1:
        p0[s, nline] = b0
    if bkind == 2:
        p0[s, nline + 1] = b1
    pk = -np.inf
    for c in range(nchan):
        rc = y[c] - b0 - b1 * (c - 0.5 * (nchan - 1))
        res[c] = rc
        pk = max(pk, rc if np.isfinite(rc) else -np.inf)
    peak_snr[s] = pk / nz
    first_v = -1
    group = 0
    for j in range(ncomp):
        kv = civ[j]
        if done_v[kv]:
            continue
        done_v[kv] = True
        group += 1
        a = cax[j]
        row = cen[a]
        # the scan runs on the residual smoothed by [1/4, 1/2, 1/4] (NaN-aware), so a
        # single-channel noise spike does not outbid a faint line a few channels wide
        _smooth3(res, sm)
        # matched scan: the velocity at which the lines sharing this velocity parameter
        # have the largest summed residual (for one line simply its peak channel)
        best = -np.inf
        cbest = nchan // 2
        nshare = 0
        for jj in range(ncomp):
            nshare += 1 if civ[jj] == kv else 0
        if nshare == 1:
            for c in range(nchan):
                sc = sm[c] if np.isfinite(sm[c]) else 0.0
                if sc > best:
                    best = sc
                    cbest = c
        for c in range(nchan if nshare > 1 else 0):
            v = row[c]
            sc = 0.0
            for jj in range(ncomp):
                if civ[jj] != kv:
                    continue
                if jj == j:
                    cc = c
                else:
                    cc = _nearest_channel(cen[cax[jj]], v)
                if cc >= 0 and np.isfinite(sm[cc]):
                    sc += sm[cc]
            if sc > best:
                best = sc
                cbest = c
        split = first_v >= 0 and (not np.isfinite(sm[cbest]) or sm[cbest] < split_below * nz)
        if split:
            # nothing left in the residual: split the first component around its centre
            vf = p0[s, first_v]
            sf = 0.0
            for jj in range(ncomp):
                if civ[jj] == first_v:
                    sf = p0[s, cis[jj]]
                    break
            sgn = 1.0 if (kv % 2 == 1) else -1.0
            vk = vf + sgn * 0.5 * sf
            p0[s, kv] = vk
            for jj in range(ncomp):
                if civ[jj] != kv:
                    continue
                ka = cia[jj]
                if amp_scale[ka] == 0.0:
                    amp_scale[ka] = csc[jj]
                    ref_amp = 0.0
                    for j2 in range(ncomp):
                        if civ[j2] == first_v:
                            ref_amp = p0[s, cia[j2]] * csc[j2]
                            break
                    p0[s, ka] = 0.5 * ref_amp / csc[jj]
                ks = cis[jj]
                if sig_src[ks] == 0.0:
                    sig_src[ks] = 1.0
                    p0[s, ks] = 0.5 * sf
            continue
        if first_v < 0:
            first_v = kv
        pv = sm[cbest]
        thr = max(nz, 0.2 * pv)
        m2, m1 = _window_sigma(res, row, cbest, thr, pv)
        vk = m1 if m2 > 0 else row[cbest]
        # with one velocity group, a log-parabola through the peak lands closer to the optimum
        # than moments (fewer iterations); with several groups the peak may be a blend, and
        # the moment guesses followed by residual peaks separate blends more reliably
        lp_ok = False
        lp_peak = lp_v = lp_var = 0.0
        if ngroups == 1:
            lp_ok, lp_peak, lp_v, lp_var = _log_parabola(res, row, cbest, max(2.0 * nz, 0.2 * pv))
        if lp_ok and lp_var > resp_var[a]:
            vk = lp_v
        else:
            lp_ok = False
        p0[s, kv] = vk
        ref_sig = -1.0
        for jj in range(ncomp):
            if civ[jj] != kv:
                continue
            ra = cen[cax[jj]]
            cc = cbest if jj == j else _nearest_channel(ra, vk)
            val = sm[cc] if cc >= 0 else np.nan
            if not np.isfinite(val):
                val = 0.0
            ka = cia[jj]
            ks = cis[jj]
            if jj == j and lp_ok:
                # channel averaging lowers the peak by sqrt((var - resp_var) / var)
                obs2 = lp_var - resp_var[a]
                if csc[jj] > amp_scale[ka]:
                    amp_scale[ka] = csc[jj]
                    p0[s, ka] = lp_peak * math.sqrt(lp_var / obs2) / csc[jj]
                sig_src[ks] = max(val, 1e-300)
                p0[s, ks] = math.sqrt(max(obs2 - s_instr2, 0.0))
                ref_sig = p0[s, ks]
                continue
            if csc[jj] > amp_scale[ka]:
                amp_scale[ka] = csc[jj]
                p0[s, ka] = val / csc[jj]
            if cc >= 0 and val > sig_src[ks] and (jj == j or val > 3.0 * nz):
                w2, _ = _window_sigma(res, ra, cc, max(nz, 0.2 * val), val)
                if w2 > 0:
                    sig_src[ks] = val
                    p0[s, ks] = math.sqrt(max(w2 - resp_var[cax[jj]] - s_instr2, 0.0))
                    if jj == j:
                        ref_sig = p0[s, ks]
        for jj in range(ncomp):
            if civ[jj] != kv:
                continue
            ks = cis[jj]
            if sig_src[ks] == 0.0:
                p0[s, ks] = ref_sig if ref_sig > 0 else 2.0 * cwidth[cax[jj]]
                sig_src[ks] = 1e-300
        # subtract this group's guess from the residual before the next group
        if group == ngroups:
            continue
        for jj in range(ncomp):
            if civ[jj] != kv:
                continue
            ra = cen[cax[jj]]
            amp = csc[jj] * p0[s, cia[jj]]
            sg = p0[s, cis[jj]]
            so2 = sg * sg + s_instr2 + resp_var[cax[jj]]
            if not (so2 > 0) or not np.isfinite(amp):
                continue
            k0, k1 = _window(ra, 0, nchan, vk, _ZCUT * math.sqrt(so2))
            for c in range(k0, k1 + 1):
                res[c] -= amp * math.exp(-0.5 * (ra[c] - vk) ** 2 / so2)
    # anything still unset (parameters no component reaches) and the bounds
    for k in range(npar):
        v = p0[s, k]
        if not np.isfinite(v):
            if roles[k] == 0:
                v = nz
            elif roles[k] == 2:
                v = 2.0 * cwidth[0]
            else:
                v = 0.0
        if roles[k] == 0 and v <= 0.0:
            v = max(nz, lo[s, k])
        if roles[k] == 2 and v <= 0.0:
            v = 2.0 * cwidth[0]
        p0[s, k] = min(max(v, lo[s, k]), hi[s, k])
