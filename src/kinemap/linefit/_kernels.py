"""Compiled (numba) kernels: model + analytic Jacobian, initial guesses, Levenberg-Marquardt.

Everything here works on plain float64 arrays in km/s; validation happens in ``fit.py``.
The parallel loops run over spectra, so no Python code executes per spectrum.

fastmath: only the flags that cannot change NaN/Inf semantics are used
(no 'nnan'/'ninf', no approximate functions 'afn'), and only in the model evaluation and
the normal-equation sums, which contain no NaN tests; the optimiser logic runs IEEE-exact.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from ..status import Status

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
_LAM0 = 1e-3
_LAM_MAX = 1e14
_BLOCK = 16  # spectra per parallel work item (work arrays are allocated once per block)


# ----------------------------------------------------------------------------- model
@njit(cache=True)
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


@njit(cache=True)
def _window(row, lo, hi, v0, half):
    """Index range [k0, k1] of the monotonic ``row[lo:hi]`` inside v0 +- half (k0 > k1: none)."""
    if row[hi - 1] >= row[lo]:
        k0 = _first(row, lo, hi, v0 - half, 0)
        k1 = _first(row, lo, hi, v0 + half, 1) - 1
    else:
        k0 = _first(row, lo, hi, v0 + half, 2)
        k1 = _first(row, lo, hi, v0 - half, 3) - 1
    return k0, k1


@njit(cache=True, fastmath=_FM)
def _eval_model(p, cen, edg, cw, cax, cia, csc, civ, cis, nline, bkind, s_instr2, resp,
                mod, jac, mext, jext, Phi, phi, zb, want_jac, crng, rlo, rhi):
    """Model (nchan) and Jacobian rows (npar, nchan) at parameters ``p``.

    Only channels where a component differs from zero in double precision (|z| <= 9) are
    computed.  On return row k of ``jac`` is valid on channels [rlo[k], rhi[k]) and zero
    elsewhere by definition (entries outside are not written and must not be read).
    Work arrays use extended channel indices i = c + 1 (channels -1 .. nchan)."""
    nchan = mod.shape[0]
    npar = p.shape[0]
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
                    Phi[k] = 0.5 * math.erfc(-z * _INV_SQRT2)
                    phi[k] = _INV_SQRT2PI * math.exp(-0.5 * z * z)
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


@njit(parallel=True, cache=True)
def model_kernel(params, cen, edg, cw, cax, cia, csc, civ, cis, nline, bkind, s_instr2, resp, out):
    """Model spectra (nspec, nchan) for parameters (nspec, npar); NaN parameters give NaN."""
    nspec, nchan = out.shape
    npar = params.shape[1]
    nblk = (nspec + _BLOCK - 1) // _BLOCK
    for b in prange(nblk):
        mod = np.empty(nchan)
        jac = np.empty((npar, nchan))
        mext = np.empty(nchan + 2)
        jext = np.empty((npar, nchan + 2))
        Phi = np.empty(nchan + 3)
        phi = np.empty(nchan + 3)
        zb = np.empty(nchan + 3)
        p = np.empty(npar)
        crng = np.empty((cax.shape[0], 2), dtype=np.int64)
        rlo = np.empty(npar, dtype=np.int64)
        rhi = np.empty(npar, dtype=np.int64)
        for s in range(b * _BLOCK, min(nspec, (b + 1) * _BLOCK)):
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


# ----------------------------------------------------------------------------- linear algebra
@njit(cache=True)
def _chol(M, n):
    """In-place lower Cholesky factor of M[:n, :n]; False if not positive definite."""
    for j in range(n):
        d = M[j, j]
        for k in range(j):
            d -= M[j, k] * M[j, k]
        if not (d > 0.0) or not np.isfinite(d):
            return False
        d = math.sqrt(d)
        M[j, j] = d
        for i in range(j + 1, n):
            t = M[i, j]
            for k in range(j):
                t -= M[i, k] * M[j, k]
            M[i, j] = t / d
    return True


@njit(cache=True)
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


@njit(cache=True)
def _invert_subset(A, sel, nsel, W, x, cov):
    """cov[sel, sel] = inverse of A[sel, sel] (others NaN); False if singular."""
    npar = A.shape[0]
    for i in range(npar):
        for k in range(npar):
            cov[i, k] = np.nan
    for i in range(nsel):
        for k in range(nsel):
            W[i, k] = A[sel[i], sel[k]]
    if not _chol(W, nsel):
        return False
    for col in range(nsel):
        for i in range(nsel):
            x[i] = 0.0
        x[col] = 1.0
        _chol_solve(W, nsel, x)
        for i in range(nsel):
            cov[sel[i], sel[col]] = x[i]
    return True


# ----------------------------------------------------------------------------- whitening
@njit(cache=True)
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


@njit(cache=True)
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


@njit(cache=True, fastmath=_FM)
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


@njit(cache=True, fastmath=_FM)
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


@njit(cache=True, fastmath=_FM)
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
    _whiten(r, idx, 0, m, nchan, inv_noise, corr, L0, L1, L2, rw)
    chi2 = 0.0
    for i in range(m):
        chi2 += rw[i] * rw[i]
    if want_jac:
        npar = jac.shape[0]
        for k in range(npar):
            qlo[k] = pos[rlo[k]]
            qhi[k] = m if corr else pos[rhi[k]]
            if rhi[k] <= rlo[k]:
                qhi[k] = qlo[k]
            _whiten(jac[k], idx, qlo[k], qhi[k], rhi[k], inv_noise, corr, L0, L1, L2, Jw[k])
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


# ----------------------------------------------------------------------------- optimiser
@njit(cache=True)
def _fit_one(y, m, neff, idx, pos, noise, p, lo, hi, cen, edg, cw, cax, cia, csc, civ, cis, nline, bkind,
             s_instr2, resp, corr, L0, L1, L2, max_iter, tol, cov,
             mod, jac, mext, jext, Phi, phi, zb, r, rw, Jw, A, g,
             pt, modt, jact, rwt, Jwt, At, gt, D, M, x, dl, sel,
             crng, rlo, rhi, rlot, rhit, qlo, qhi):
    """Levenberg-Marquardt with box bounds for one spectrum.

    Bounds are handled by projection: trial points are clipped onto the box, and a parameter
    sitting on a bound whose gradient points outward is frozen for that iteration (a simple
    active set), so the remaining parameters still take Gauss-Newton-like steps.
    Convergence: the Gauss-Newton decrement g^T A^-1 g (the chi2 the next full step would
    gain, i.e. the squared distance to the minimum in units of the error ellipse) falls
    below ``tol * max(1, chi2_reduced)``.

    Returns (status, n_iter, chi2); ``p`` is updated in place, ``cov`` filled.
    """
    npar = p.shape[0]
    inv_noise = 1.0 / noise
    _eval_model(p, cen, edg, cw, cax, cia, csc, civ, cis, nline, bkind, s_instr2, resp,
                mod, jac, mext, jext, Phi, phi, zb, True, crng, rlo, rhi)
    chi2 = _residual_system(y, mod, jac, idx, pos, m, inv_noise, corr, L0, L1, L2, r, rw, Jw, A, g,
                            rlo, rhi, qlo, qhi, True)
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
        for i in range(nf):
            for l in range(nf):
                M[i, l] = A[sel[i], sel[l]]
            x[i] = g[sel[i]]
        dec = np.nan
        if _chol(M, nf):
            _chol_solve(M, nf, x)
            dec = 0.0
            for i in range(nf):
                dec += g[sel[i]] * x[i]
            if dec < tol * max(1.0, chi2 / dof):
                status = _OK
                break
        # damped steps until chi2 decreases
        accepted = False
        while lam < _LAM_MAX:
            for i in range(nf):
                for l in range(nf):
                    M[i, l] = A[sel[i], sel[l]]
                M[i, i] += lam * max(D[sel[i]], 1e-300)
                x[i] = g[sel[i]]
            if not _chol(M, nf):
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
            _eval_model(pt, cen, edg, cw, cax, cia, csc, civ, cis, nline, bkind, s_instr2, resp,
                        modt, jact, mext, jext, Phi, phi, zb, True, crng, rlot, rhit)
            chi2t = _residual_system(y, modt, jact, idx, pos, m, inv_noise, corr, L0, L1, L2,
                                     r, rwt, Jwt, At, gt, rlot, rhit, qlo, qhi, True)
            if np.isfinite(chi2t) and chi2t < chi2:
                # gain ratio: actual / predicted (quadratic-model) decrease of the step taken
                pred = 0.0
                for k in range(npar):
                    dk = pt[k] - p[k]
                    t = 2.0 * g[k]
                    for l in range(npar):
                        t -= A[k, l] * (pt[l] - p[l])
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
                rlo, rlot = rlot, rlo
                rhi, rhit = rhit, rhi
                break
            lam *= nu
            nu *= 2.0
        if not accepted:
            # no decrease possible at any damping: we sit at the minimum to rounding
            # precision if the Gauss-Newton decrement is tiny anyway, otherwise give up
            status = _NOT_CONVERGED
            for i in range(nf):
                for l in range(nf):
                    M[i, l] = A[sel[i], sel[l]]
                x[i] = g[sel[i]]
            if _chol(M, nf):
                _chol_solve(M, nf, x)
                dec = 0.0
                for i in range(nf):
                    dec += g[sel[i]] * x[i]
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


@njit(parallel=True, cache=True)
def fit_kernel(data, noise, p0, lo, hi, prestat, cen, edg, cw, cax, cia, csc, civ, cis, nline, bkind,
               s_instr2, resp, rho1, rho2, floor, max_iter, tol,
               params, cov, chi2, nfit, neff, status, niter):
    """Fit every spectrum whose ``prestat`` is 0; others keep ``prestat`` and NaN outputs."""
    nspec, nchan = data.shape
    npar = p0.shape[1]
    corr = rho1 != 0.0 or rho2 != 0.0
    nblk = (nspec + _BLOCK - 1) // _BLOCK
    for b in prange(nblk):
        y = np.empty(nchan)
        idx = np.empty(nchan, dtype=np.int64)
        L0 = np.empty(nchan)
        L1 = np.empty(nchan)
        L2 = np.empty(nchan)
        mod = np.empty(nchan)
        modt = np.empty(nchan)
        jac = np.zeros((npar, nchan))
        jact = np.zeros((npar, nchan))
        mext = np.empty(nchan + 2)
        jext = np.empty((npar, nchan + 2))
        Phi = np.empty(nchan + 3)
        phi = np.empty(nchan + 3)
        zb = np.empty(nchan + 3)
        r = np.empty(nchan)
        rw = np.empty(nchan)
        rwt = np.empty(nchan)
        Jw = np.empty((npar, nchan))
        Jwt = np.empty((npar, nchan))
        A = np.empty((npar, npar))
        At = np.empty((npar, npar))
        g = np.empty(npar)
        gt = np.empty(npar)
        p = np.empty(npar)
        pt = np.empty(npar)
        D = np.empty(npar)
        M = np.empty((npar, npar))
        x = np.empty(npar)
        dl = np.empty(npar)
        sel = np.empty(npar, dtype=np.int64)
        cv = np.empty((npar, npar))
        Z0 = np.empty(nchan)
        Z1 = np.empty(nchan)
        Z2 = np.empty(nchan)
        pos = np.empty(nchan + 1, dtype=np.int64)
        crng = np.empty((cax.shape[0], 2), dtype=np.int64)
        rlo = np.empty(npar, dtype=np.int64)
        rhi = np.empty(npar, dtype=np.int64)
        rlot = np.empty(npar, dtype=np.int64)
        rhit = np.empty(npar, dtype=np.int64)
        qlo = np.empty(npar, dtype=np.int64)
        qhi = np.empty(npar, dtype=np.int64)
        for s in range(b * _BLOCK, min(nspec, (b + 1) * _BLOCK)):
            for k in range(npar):
                params[s, k] = np.nan
                for l in range(npar):
                    cov[s, k, l] = np.nan
            chi2[s] = np.nan
            niter[s] = 0
            m = 0
            for c in range(nchan):
                y[c] = data[s, c]
                pos[c] = m  # compressed index of the first finite channel >= c
                if np.isfinite(y[c]):
                    idx[m] = c
                    m += 1
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
            st, it, c2 = _fit_one(y, m, neff[s], idx, pos, noise[s], p, lo[s], hi[s], cen, edg, cw, cax, cia, csc,
                                  civ, cis, nline, bkind, s_instr2, resp, corr, L0, L1, L2, max_iter, tol, cv,
                                  mod, jac, mext, jext, Phi, phi, zb, r, rw, Jw, A, g,
                                  pt, modt, jact, rwt, Jwt, At, gt, D, M, x, dl, sel,
                                  crng, rlo, rhi, rlot, rhit, qlo, qhi)
            status[s] = st
            niter[s] = it
            chi2[s] = c2
            for k in range(npar):
                params[s, k] = p[k]
                for l in range(npar):
                    cov[s, k, l] = cv[k, l]


# ----------------------------------------------------------------------------- initial guesses
@njit(cache=True)
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


@njit(cache=True)
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


@njit(cache=True)
def _median_inplace(a, n):
    """Median of a[:n], reordering a[:n] (Wirth's selection algorithm; O(n) on average)."""
    k = n // 2
    lo = 0
    hi = n - 1
    while lo < hi:
        x = a[k]
        i = lo
        j = hi
        while True:
            while a[i] < x:
                i += 1
            while x < a[j]:
                j -= 1
            if i <= j:
                a[i], a[j] = a[j], a[i]
                i += 1
                j -= 1
            if i > j:
                break
        if j < k:
            lo = i
        if k < i:
            hi = j
    med = a[k]
    if n % 2 == 0:
        # the lower middle value is the largest of the elements left of k
        lower = a[0]
        for t in range(1, k):
            if a[t] > lower:
                lower = a[t]
        med = 0.5 * (med + lower)
    return med


@njit(cache=True)
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


@njit(cache=True)
def _smooth3(x, out):
    """[1/4, 1/2, 1/4] smoothing that skips NaN channels (weights renormalised)."""
    n = x.shape[0]
    for c in range(n):
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


@njit(parallel=True, cache=True)
def guess_kernel(data, noise, cen, cwidth, cax, cia, csc, civ, cis, roles, nline, bkind,
                 s_instr2, resp_var, lo, hi, split_below, p0, peak_snr, nfinite):
    """Initial parameters from peaks and windowed moments (see ``initial_guess``)."""
    nspec, nchan = data.shape
    npar = p0.shape[1]
    ncomp = cax.shape[0]
    ngroups = 0  # number of distinct velocity parameters
    for j in range(ncomp):
        first = True
        for jj in range(j):
            if civ[jj] == civ[j]:
                first = False
        if first:
            ngroups += 1
    nblk = (nspec + _BLOCK - 1) // _BLOCK
    for b in prange(nblk):
        y = np.empty(nchan)
        res = np.empty(nchan)
        sm = np.empty(nchan)
        fin = np.empty(nchan)
        tfin = np.empty(nchan)
        done_v = np.zeros(npar, dtype=np.bool_)
        amp_scale = np.zeros(npar)  # scale of the component that set each amplitude guess
        sig_src = np.zeros(npar)  # brightness of the component that set each sigma guess
        for s in range(b * _BLOCK, min(nspec, (b + 1) * _BLOCK)):
            _guess_one(s, data, noise, cen, cwidth, cax, cia, csc, civ, cis, roles, nline, bkind, s_instr2,
                       resp_var, lo, hi, split_below, p0, peak_snr, nfinite, ngroups,
                       y, res, sm, fin, tfin, done_v, amp_scale, sig_src)


@njit(cache=True)
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
    for c in range(nchan):
        y[c] = data[s, c]
        if np.isfinite(y[c]):
            fin[m] = y[c]
            tfin[m] = c - 0.5 * (nchan - 1)
            m += 1
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
        b0 = _median_inplace(fin, m)  # fin is scratch: reordering it is fine
    elif bkind == 2:
        q = max(1, m // 4)
        tl = 0.5 * (tfin[0] + tfin[q - 1])
        tr = 0.5 * (tfin[m - q] + tfin[m - 1])
        right = _median_inplace(fin[m - q:m], q)
        left = _median_inplace(fin[:q], q)
        if tr > tl:
            b1 = (right - left) / (tr - tl)
        b0 = left - b1 * tl
    if bkind >= 1:
        p0[s, nline] = b0
    if bkind == 2:
        p0[s, nline + 1] = b1
    pk = -np.inf
    for c in range(nchan):
        res[c] = y[c] - b0 - b1 * (c - 0.5 * (nchan - 1))
        if np.isfinite(res[c]) and res[c] > pk:
            pk = res[c]
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
        for c in range(nchan):
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
