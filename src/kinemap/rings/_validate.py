"""Boundary checks for the ring fitter: one-line KinemapError messages (private)."""
from __future__ import annotations

import astropy.units as u
import numpy as np

from kinemap.units import KMS, to_value
from kinemap.errors import KinemapError

FIXABLE = ("x_center", "y_center", "position_angle", "inclination", "v_sys", "v_exp")
WEIGHTINGS = ("uniform", "cos", "cos2")
FINAL_GEOMETRY = ("polynomial", "median", "rings", "global")

MIN_VALID_PIXELS = 50


def velocity_map(velocity, name: str = "velocity") -> np.ndarray:
    """2-D float64 km/s copy of a velocity field (Quantity or plain km/s)."""
    if velocity is None:
        raise KinemapError(f"'{name}' is required: pass a 2-D velocity field in km/s")
    arr = to_value(velocity, KMS, name=name, equivalencies=None)
    arr = np.array(arr, dtype=float, copy=True)
    if arr.ndim != 2:
        raise KinemapError(f"'{name}' must be a 2-D (y, x) map, got an array of shape {arr.shape}")
    arr[~np.isfinite(arr)] = np.nan
    return arr


def same_shape(arr, shape, name: str, unit=None) -> np.ndarray | None:
    if arr is None:
        return None
    if unit is None:
        vals = arr.value if isinstance(arr, u.Quantity) else arr
        out = np.array(vals, dtype=float, copy=True)
    else:
        out = np.array(to_value(arr, unit, name=name), dtype=float, copy=True)
    if out.shape != tuple(shape):
        raise KinemapError(f"'{name}' must have the same shape as 'velocity' {tuple(shape)}, got {out.shape}")
    out[~np.isfinite(out)] = np.nan
    return out


def error_map(err, shape) -> np.ndarray | None:
    out = same_shape(err, shape, "velocity_err", KMS)
    if out is None:
        return None
    if np.any(out[np.isfinite(out)] < 0):
        raise KinemapError("'velocity_err' must be >= 0 km/s (1-sigma errors); NaN marks missing values")
    return out


# An error below this fraction of the map's median error is a round-off zero of an error
# propagation (e.g. a moment-1 error from one channel, where the formula gives exactly 0
# up to float noise), not a measurement: such pixels are skipped like pixels with error 0.
ROUNDOFF_ERROR_FRACTION = 1e-6


def drop_roundoff_errors(error, velocity):
    """Set round-off-zero errors to 0 (so they are skipped); return (map, number unusable).

    ``error`` is the validated copy from :func:`error_map` (modified in place and
    returned).  The count is of pixels with a finite velocity whose error is 0 or below
    ``ROUNDOFF_ERROR_FRACTION`` times the median positive error.
    """
    if error is None:
        return None, 0
    fin = np.isfinite(error)
    pos = fin & (error > 0)
    if pos.any():
        tiny = pos & (error < ROUNDOFF_ERROR_FRACTION * np.median(error[pos]))
        error[tiny] = 0.0
    n_bad = int(np.sum(np.isfinite(velocity) & fin & (error == 0)))
    return error, n_bad


def enough_pixels(velocity, error, minimum=MIN_VALID_PIXELS):
    valid = np.isfinite(velocity)
    if error is not None:
        valid &= np.isfinite(error) & (error > 0)
    nvalid = int(valid.sum())
    if nvalid < minimum:
        raise KinemapError(
            f"'velocity' has only {nvalid} usable (finite) pixels; a tilted-ring fit needs at least {minimum}"
        )
    return valid


def optional_scalar(value, unit, name):
    if value is None:
        return None
    out = to_value(value, unit, name=name)
    if np.ndim(out) != 0:
        raise KinemapError(f"'{name}' must be a single value, got an array of shape {np.shape(out)}")
    out = float(out)
    if not np.isfinite(out):
        raise KinemapError(f"'{name}' must be finite, got {value!r}")
    return out


def positive_scalar(value, unit, name):
    out = optional_scalar(value, unit, name)
    if out is not None and out <= 0:
        raise KinemapError(f"'{name}' must be positive, got {value!r}")
    return out


def geometry_value(value, unit, name, shape):
    """Scalar or per-ring array of a geometry parameter, validated; None passes through."""
    if value is None:
        return None
    out = to_value(value, unit, name=name)
    arr = np.atleast_1d(np.asarray(out, dtype=float))
    if arr.ndim != 1 or not np.all(np.isfinite(arr)):
        raise KinemapError(f"'{name}' must be a finite number or a 1-D array of per-ring values, got {value!r}")
    unit_s = "deg" if name in ("position_angle", "inclination") else ("km/s" if name in ("v_sys", "v_exp") else "pix")
    if name == "inclination":
        bad = arr[(arr <= 0) | (arr >= 90)]
        if bad.size:
            raise KinemapError(
                f"'inclination' must be between 0 and 90 deg (exclusive: face-on has no rotation "
                f"signal, edge-on no ring geometry), got {bad[0]:g} deg"
            )
    if name in ("x_center", "y_center"):
        ny, nx = shape
        hi = (nx if name == "x_center" else ny) - 1
        bad = arr[(arr < 0) | (arr > hi)]
        if bad.size:
            raise KinemapError(
                f"'{name}' must lie inside the map (0 to {hi} pixels, 0-based), got {bad[0]:g} {unit_s}"
            )
    if name == "position_angle":
        arr = arr % 360.0
    return arr if arr.size > 1 else float(arr[0])


def fix_names(fix) -> tuple[str, ...]:
    if fix is None:
        return ()
    if isinstance(fix, str):
        fix = (fix,)
    out = []
    for name in fix:
        if name == "center":
            out += ["x_center", "y_center"]
        elif name in FIXABLE:
            out.append(name)
        else:
            raise KinemapError(
                f"'fix' entries must be among {', '.join(FIXABLE)} (or 'center'), got {name!r}"
            )
    return tuple(dict.fromkeys(out))


def ring_free_names(ring_free, fixed) -> tuple[str, ...]:
    names = fix_names(ring_free)
    if "v_exp" in names:
        raise KinemapError(
            "'ring_free' lists geometry parameters only; to fit v_exp during stages 1-2 set expansion_in_geometry=True"
        )
    return tuple(n for n in names if n not in fixed)


def choice(value, options, name):
    if value not in options:
        raise KinemapError(f"'{name}' must be one of {', '.join(repr(o) for o in options)}, got {value!r}")
    return value


def stages(value) -> tuple[int, ...]:
    try:
        st = tuple(sorted(set(int(s) for s in value)))
    except (TypeError, ValueError):
        raise KinemapError(f"'stages' must be a collection of stage numbers from 1, 2, 3, got {value!r}") from None
    if not st or st[0] != 1 or st[-1] > 3:
        raise KinemapError(f"'stages' must contain 1 (global geometry) and optionally 2 and 3, got {value!r}")
    return st


def radii_and_width(radii, ring_width):
    """Return (radii [arcsec] or None, ring width [arcsec] or None), validated."""
    w = positive_scalar(ring_width, u.arcsec, "ring_width")
    if radii is None:
        return None, w
    r = np.atleast_1d(np.asarray(to_value(radii, u.arcsec, name="radii"), dtype=float))
    if r.ndim != 1 or r.size == 0 or not np.all(np.isfinite(r)) or np.any(r <= 0):
        raise KinemapError("'radii' must be a 1-D array of positive ring radii (arcsec), e.g. np.arange(1, 20) * 5 * u.arcsec")
    if np.any(np.diff(r) <= 0):
        raise KinemapError("'radii' must increase strictly from the centre outwards")
    if w is None:
        if r.size == 1:
            raise KinemapError("'ring_width' is needed when only one ring radius is given")
        w = float(np.min(np.diff(r)))
    if r.size > 1 and np.min(np.diff(r)) < w * (1 - 1e-9):
        raise KinemapError(
            f"'ring_width' ({w:g} arcsec) is larger than the ring spacing ({np.min(np.diff(r)):g} arcsec); rings must not overlap"
        )
    if r[0] - w / 2 < -1e-9:
        raise KinemapError(f"the first ring (radius {r[0]:g} arcsec) must be at least half a ring width ({w / 2:g} arcsec) from the centre")
    return r, w
