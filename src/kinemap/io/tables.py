"""Reading tables kinemap wrote, for a later command (the rings' geometry for stacking)."""
from __future__ import annotations

import os

import numpy as np

from kinemap.errors import KinemapError

__all__ = ["read_ring_table", "read_ring_geometry"]

_NEEDED = ("radius", "x_center", "y_center", "position_angle", "inclination")


def read_ring_table(path):
    """A ``rotation_curve.ecsv`` written by ``kinemap rings``, as an astropy Table; a
    missing or unreadable file is one line naming it."""
    from astropy.table import Table

    path = os.fspath(path)
    if not os.path.exists(path):
        raise KinemapError(f"ring table not found: {path}; give the rotation_curve.ecsv "
                           "written by 'kinemap rings'")
    try:
        return Table.read(path, format="ascii.ecsv")
    except Exception as exc:  # noqa: BLE001 - astropy raises many kinds on a bad file
        raise KinemapError(f"{path} is not an ECSV table ({type(exc).__name__}); give the "
                           "rotation_curve.ecsv written by 'kinemap rings'") from None


def read_ring_geometry(path) -> dict:
    """The disk geometry of a ``rotation_curve.ecsv`` written by ``kinemap rings``.

    Returns ``{'center': (x, y) 0-based pixels, 'position_angle': deg, 'inclination': deg,
    'edges': ring edges in arcsec}``: the median geometry of the rings fitted (status 0
    or 2) and the rings' edges (radius -+ half the ring width), so the stacks are the
    rings.  The centre is in pixels of the cube the rings were fitted on.
    """
    t = read_ring_table(path)
    missing = [c for c in _NEEDED if c not in t.colnames]
    if missing:
        raise KinemapError(f"{path} has no column {', '.join(missing)}; give the "
                           "rotation_curve.ecsv written by 'kinemap rings'")
    status = np.asarray(t["status"]) if "status" in t.colnames else np.zeros(len(t), int)
    ok = np.isin(status, (0, 2))

    def col(name):
        return np.asarray(getattr(t[name], "value", t[name]), dtype=float)

    radius = col("radius")
    ok &= np.isfinite(radius)
    if not ok.any():
        raise KinemapError(f"{path} has no fitted ring (status 0 or 2); fit the rings again")
    width = float(t.meta.get("ring_width") or np.median(np.diff(np.sort(radius[ok]))))
    r = np.sort(radius[ok])
    edges = np.concatenate([[max(0.0, r[0] - width / 2)], r + width / 2])
    return {"center": (float(np.nanmedian(col("x_center")[ok])),
                       float(np.nanmedian(col("y_center")[ok]))),
            "position_angle": float(np.nanmedian(col("position_angle")[ok])),
            "inclination": float(np.nanmedian(col("inclination")[ok])),
            "edges": edges}
