"""Levenberg-Marquardt driver of the line fitter (private): small dense Cholesky
algebra, the per-spectrum optimiser (:func:`_fit_one`) on either evaluation path, the
per-block work buffers and the parallel fit kernel.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from kinemap.linefit._kern_base import _AT_BOUND, _BLOCK, _FAILED, _NOT_CONVERGED, _OK, RESP_HANNING
from kinemap.linefit._kern_model import _eval_model
from kinemap.linefit._kern_whiten import _band_chol, _band_inv_trace, _residual_system
from kinemap.linefit._kern_single import _eval_single

_LAM0 = 1e-3
# Newton steps (full Hessian) once the Gauss-Newton decrement is below this (chi2 units, i.e.
# within ~1.7 error bars of the minimum): there they converge quadratically where
# Gauss-Newton converges linearly (rate ~ 1 / (S/N sqrt(n)), a few per cent), while farther
# out the Gauss-Newton step is the better one.  Measured on the benchmark cube: 3.46
# iterations per fit (Gauss-Newton only: 4.76, Newton throughout: 3.82).
_NEWTON_BELOW = 3.0
_LAM_MAX = 1e14


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
