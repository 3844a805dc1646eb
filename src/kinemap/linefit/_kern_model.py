"""Generic model evaluator of the line fitter (private): model spectrum and analytic
Jacobian of any number of (tied) Gaussian components with any channel response and
baseline (:func:`_eval_model`), and the parallel model kernel built on it.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from kinemap.linefit._kern_base import _BLOCK, _FM, RESP_HANNING, RESP_NONE, _window, _ZCUT
from kinemap.linefit._kern_special import _INV_SQRT2PI, _ndtr_e

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
