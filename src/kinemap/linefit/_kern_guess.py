"""First guess of the line fitter (private): baseline, peaks, windowed moments and
log-parabolas of every spectrum, in parallel over blocks of spectra.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from kinemap.linefit._kern_base import _BLOCK, _window, _ZCUT
from kinemap.linefit._kern_special import _INV_SQRT2, _INV_SQRT2PI

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
