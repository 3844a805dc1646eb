"""Shared pieces of the line-fit kernels (private): status codes and channel-response codes
as compile-time constants, the fastmath flags, the line cut-off and the search for the
channels a line reaches.

See :mod:`kinemap.linefit._kernels` for how the kernel modules fit together and why they
are compiled as they are.
"""
from __future__ import annotations

from numba import njit

from kinemap.status import Status

# status codes as compile-time constants (taken from the one place they are defined)
_OK = int(Status.OK)
_NOT_CONVERGED = int(Status.NOT_CONVERGED)
_AT_BOUND = int(Status.AT_BOUND)
_FAILED = int(Status.FAILED)

RESP_NONE, RESP_TOPHAT, RESP_HANNING = 0, 1, 2

# fastmath flags that cannot change NaN/Inf semantics (see the ``_kernels`` docstring)
_FM = {"nsz", "arcp", "contract", "reassoc"}
# beyond |z| = 8 the normal CDF differs from 0 or 1 by < 6.3e-16 and the density is below
# 1.3e-14 of its peak: below double-precision resolution of the line, so those channels are
# skipped (this saves most erfc/exp calls for narrow lines)
_ZCUT = 8.0
_BLOCK = 64  # spectra per parallel work item (work arrays are allocated once per block)


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
