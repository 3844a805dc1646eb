"""Special functions of the line-fit kernels (private): the normal CDF from a shared
exponential, scalar (:func:`_ndtr_e`) and branch-free vectorisable (:func:`_vndtr`), and a
vectorisable exp (:func:`_vexp`).
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

from kinemap.linefit._kern_base import _FM

_INV_SQRT2PI = 1.0 / math.sqrt(2.0 * math.pi)
_INV_SQRT2 = 1.0 / math.sqrt(2.0)


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


# The array functions below (for the fused one-component path) are written as short
# branch-free loops over plain arrays so that LLVM vectorises them (error_model='numpy' drops the zero-division checks
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
