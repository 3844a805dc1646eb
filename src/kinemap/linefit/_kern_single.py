"""Fused one-component path of the line fitter (private): chi2, normal equations and the
Newton correction of one Gaussian with white noise and top-hat or sampled channels in one
pass, without model or Jacobian arrays (:func:`_eval_single`).
"""
from __future__ import annotations

import math

from numba import njit

from kinemap.linefit._kern_base import _FM, RESP_NONE, _window, _ZCUT
from kinemap.linefit._kern_special import _INV_SQRT2PI, _vexp, _vndtr

# The fused single-component path is written as short branch-free loops over plain arrays
# so that LLVM vectorises them (error_model='numpy' drops the zero-division checks that
# would otherwise block vectorisation; every division here has a non-zero divisor).


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
