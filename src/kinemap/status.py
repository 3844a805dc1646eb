"""Integer status codes for per-pixel results: the one place they are defined.

Every per-pixel product that can fail (line fits, width budgets) carries a status map
with these codes.  A pixel whose status is not ``OK`` has NaN values in the value maps.

====  ===============  ==========================================================
code  name             meaning
====  ===============  ==========================================================
0     OK               fit converged, all parameters inside their bounds
1     NOT_CONVERGED    the optimiser stopped at its iteration limit
2     AT_BOUND         converged, but a parameter sits on a bound (values kept,
                       treat with care)
3     TOO_FAINT        peak signal-to-noise below the threshold; not fitted
4     MASKED           excluded by the signal mask or the user's region
5     NO_DATA          spectrum is all NaN (or has too few finite channels)
6     UNPHYSICAL       observed width below what instrument + thermal motions
                       already explain (line-width budget)
7     FAILED           numerical failure (singular matrix, non-finite model)
====  ===============  ==========================================================
"""
from enum import IntEnum

__all__ = ["Status", "STATUS_DESCRIPTIONS"]


class Status(IntEnum):
    OK = 0
    NOT_CONVERGED = 1
    AT_BOUND = 2
    TOO_FAINT = 3
    MASKED = 4
    NO_DATA = 5
    UNPHYSICAL = 6
    FAILED = 7


STATUS_DESCRIPTIONS = {
    Status.OK: "fit converged, parameters inside bounds",
    Status.NOT_CONVERGED: "iteration limit reached",
    Status.AT_BOUND: "converged with a parameter on a bound",
    Status.TOO_FAINT: "peak S/N below threshold, not fitted",
    Status.MASKED: "excluded by mask or region",
    Status.NO_DATA: "no finite data",
    Status.UNPHYSICAL: "width below instrumental + thermal",
    Status.FAILED: "numerical failure",
}
