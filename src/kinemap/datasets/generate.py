"""Seeded generator of the two invented demo cubes, with their known truth.

Four invented scenarios (no real objects):

* :func:`make_disk_galaxy` -- an HI (21 cm) cube of a "demo disk galaxy" on a frequency
  axis, built from a thin rotating disk (tilted-ring geometry, Begeman 1989, A&A 223, 47),
  integrated over the line of sight with sub-pixel sampling, integrated over each channel
  (top-hat), smoothed by an elliptical Gaussian beam and given seeded noise.
* :func:`make_turbulent_cloud` -- a 13CO cube of a "demo turbulent cloud" on a velocity
  axis whose centroid field is a power-law Gaussian random field plus a linear gradient,
  smoothed by a beam (:mod:`kinemap.datasets.cloud`).
* :func:`make_dwarf` -- an HI cube of a "demo dwarf": a small, poorly resolved exponential
  disk partly held up by its velocity dispersion (rotation below the circular speed by the
  asymmetric drift), for the 3D ring fit (:mod:`kinemap.datasets.dwarf`).
* :func:`make_nebula` -- an optical cube of a "demo nebula" on an air-wavelength axis
  around H-alpha and the [N II] 6548/6583 doublet, with smooth fields of electron
  temperature, non-thermal dispersion, velocity and [N II]/H-alpha ratio, a Gaussian
  instrumental profile of resolving power R, and seeded noise.

:func:`write_demo_cubes` writes both cubes as FITS files with a JSON file of the truth.
The scenarios live in :mod:`kinemap.datasets.galaxy` and :mod:`kinemap.datasets.nebula`
(shared checks and header helpers in ``_common``); this module is their public face.

Conventions (see DESIGN.md): arrays are (spectral, y, x); velocities in km/s, positive
receding; dispersion is the Gaussian sigma; position angle in degrees east of north to
the receding half of the major axis; inclination 0 face-on, 90 edge-on; north is +y
(CDELT2 > 0) and east is -x (CDELT1 < 0).  Every truth key states its unit in its name
(``_kms``, ``_deg``, ``_arcsec``, ``_hz``, ``_k``, ...).

Randomness comes only from ``numpy.random.default_rng(seed)``; the same arguments give
the same cube, bit for bit.
"""
from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from kinemap.errors import KinemapError
from kinemap.datasets._common import DemoCube, seed_value
from kinemap.datasets.galaxy import make_disk_galaxy
from kinemap.datasets.nebula import make_nebula
from kinemap.datasets.cloud import make_turbulent_cloud
from kinemap.datasets.dwarf import make_dwarf

__all__ = [
    "DemoCube",
    "make_disk_galaxy",
    "make_nebula",
    "make_turbulent_cloud",
    "make_dwarf",
    "write_demo_cubes",
    "truth_to_json",
]

# Names of the files write_demo_cubes produces, keyed by cube name.
_FILE_STEMS = {"galaxy_hi": "demo_galaxy_hi", "nebula_halpha": "demo_nebula_halpha",
               "cloud_13co": "demo_cloud_13co", "dwarf_hi": "demo_dwarf_hi"}

# ----------------------------------------------------------------------------------
# writing
# ----------------------------------------------------------------------------------
def _json_value(value, full_arrays: bool):
    """Plain JSON value: NaN -> None, 1D arrays listed, 2D maps listed or summarised."""
    if isinstance(value, np.ndarray):
        if value.ndim <= 1 or full_arrays:
            return _nan_to_none(value.tolist())
        finite = value[np.isfinite(value)]
        if finite.size == 0:
            return {"shape": list(value.shape), "n_finite": 0}
        return {
            "shape": list(value.shape),
            "n_finite": int(finite.size),
            "min": float(finite.min()),
            "max": float(finite.max()),
            "mean": float(finite.mean()),
            "median": float(np.median(finite)),
        }
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    return value


def _nan_to_none(obj):
    if isinstance(obj, list):
        return [_nan_to_none(item) for item in obj]
    return obj if math.isfinite(obj) else None


def truth_to_json(truth: dict[str, Any], *, full_arrays: bool = False) -> dict[str, Any]:
    """JSON-ready copy of a truth dict.

    1D arrays are listed; 2D maps are summarised (shape, finite count, min, max, mean,
    median) unless ``full_arrays``, which lists them row by row (y, then x).  NaN
    becomes null.
    """
    out = {key: _json_value(value, full_arrays) for key, value in truth.items()}
    out["arrays_note"] = ("2D maps are listed row by row (y, x)" if full_arrays else
                          "2D maps are summarised; regenerate with kinemap.datasets.generate "
                          "and the same seed for the full arrays")
    return out


def write_demo_cubes(
    directory,
    *,
    seed: int | None = None,
    overwrite: bool = False,
    full_arrays: bool = False,
) -> dict[str, Path]:
    """Write the four demo cubes and their truth to ``directory``.

    Parameters
    ----------
    directory : str or path-like
        Output folder (created if missing).
    seed : int, optional
        If given, the galaxy uses ``seed``, the nebula ``seed + 1``, the cloud ``seed + 2``
        and the dwarf ``seed + 3``; otherwise each generator's default.
    overwrite : bool
        Replace existing files; otherwise an existing file is an error.
    full_arrays : bool
        List 2D truth maps in full in the JSON instead of summarising them.

    Returns
    -------
    dict[str, pathlib.Path]
        ``'galaxy_hi'`` -> demo_galaxy_hi.fits, ``'nebula_halpha'`` ->
        demo_nebula_halpha.fits, ``'truth_galaxy_hi'`` -> truth_galaxy_hi.json and
        ``'truth_nebula_halpha'`` -> truth_nebula_halpha.json, and the same pair for
        ``'cloud_13co'`` and ``'dwarf_hi'``.
    """
    try:
        out_dir = Path(directory)
    except TypeError:
        raise KinemapError(f"'directory' must be a path, got {directory!r}") from None
    if out_dir.exists() and not out_dir.is_dir():
        raise KinemapError(f"'directory' {str(out_dir)!r} is a file; give a folder path")
    kwargs_g: dict[str, Any] = {}
    kwargs_n: dict[str, Any] = {}
    kwargs_c: dict[str, Any] = {}
    kwargs_d: dict[str, Any] = {}
    if seed is not None:
        kwargs_g["seed"] = seed_value(seed)
        kwargs_n["seed"] = seed_value(seed) + 1
        kwargs_c["seed"] = seed_value(seed) + 2
        kwargs_d["seed"] = seed_value(seed) + 3
    targets = {}
    for name, stem in _FILE_STEMS.items():
        targets[name] = out_dir / f"{stem}.fits"
        targets[f"truth_{name}"] = out_dir / f"truth_{name}.json"
    if not overwrite:
        existing = [str(p) for p in targets.values() if p.exists()]
        if existing:
            raise KinemapError(f"'directory' already holds {existing[0]}; pass "
                               f"overwrite=True (--overwrite) or choose another folder")
    out_dir.mkdir(parents=True, exist_ok=True)
    for cube in (make_disk_galaxy(**kwargs_g), make_nebula(**kwargs_n),
                 make_turbulent_cloud(**kwargs_c), make_dwarf(**kwargs_d)):
        cube.hdu.writeto(targets[cube.name], overwrite=True)
        with open(targets[f"truth_{cube.name}"], "w", encoding="utf-8") as fh:
            json.dump(truth_to_json(cube.truth, full_arrays=full_arrays), fh, indent=1)
            fh.write("\n")
    return targets
