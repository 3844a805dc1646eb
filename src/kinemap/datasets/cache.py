"""The invented demo cubes, generated once into a cache folder.

``demo_cube("galaxy_hi")`` is the path of an HI disk on a frequency axis (radio
convention, a beam, 20 Mpc away); ``demo_cube("nebula_halpha")`` an H-alpha + [N II]
nebula on an air-wavelength axis.  Both are our own invented scenarios with known truth
(:func:`load_truth`); see :mod:`kinemap.datasets.galaxy` and :mod:`kinemap.datasets.nebula`.
"""
from __future__ import annotations

import os
import tempfile
from pathlib import Path

import numpy as np

from kinemap.errors import KinemapError

__all__ = ["demo_cube", "demo_cubes", "demo_cube_dir", "load_truth"]

# modules of this package that do not generate cubes (they do not key the cache)
_NOT_GENERATORS = {"__init__.py", "cache.py", "demo.py"}


def demo_cube_dir() -> Path:
    """Where the generated demo cubes are cached (``KINEMAP_CACHE`` or ~/.cache/kinemap),
    one folder per version of the generator's code."""
    import hashlib

    base = os.environ.get("KINEMAP_CACHE") or os.path.join(
        os.environ.get("XDG_CACHE_HOME") or os.path.join(Path.home(), ".cache"), "kinemap")
    # keyed on the source of every generator module of this package (the generator is
    # split over several, and a scenario added later lands here too), so a changed
    # generator never reuses stale cubes
    digest = hashlib.sha256()
    for source in sorted(Path(__file__).parent.glob("*.py")):
        if source.name not in _NOT_GENERATORS:
            digest.update(source.name.encode() + b"\0" + source.read_bytes())
    key = digest.hexdigest()[:12]
    path = Path(base) / f"demo-cubes-{key}"
    try:
        path.mkdir(parents=True, exist_ok=True)
        probe = path / ".write-test"
        probe.touch()
        probe.unlink()
    except OSError:
        path = Path(tempfile.mkdtemp(prefix="kinemap-demo-cubes-"))
    return path


def demo_cubes() -> dict:
    """Paths of the invented demo cubes, ``{'galaxy_hi': ..., 'nebula_halpha': ...}``,
    generated (seeded, so always the same) into :func:`demo_cube_dir` on first use."""
    from kinemap.datasets.generate import write_demo_cubes

    folder = demo_cube_dir()
    names = {"galaxy_hi": folder / "demo_galaxy_hi.fits",
             "nebula_halpha": folder / "demo_nebula_halpha.fits",
             "cloud_13co": folder / "demo_cloud_13co.fits",
             "dwarf_hi": folder / "demo_dwarf_hi.fits"}
    if not all(p.exists() for p in names.values()):
        write_demo_cubes(folder, overwrite=True, full_arrays=True)
    return {k: str(v) for k, v in names.items()}


def load_truth(cube_path) -> dict:
    """The truth written next to a demo cube (JSON; lists become arrays, null becomes NaN)."""
    import json

    p = Path(cube_path)
    name = p.stem.replace("demo_", "")
    raw = json.loads((p.parent / f"truth_{name}.json").read_text())
    out = {}
    for k, v in raw.items():
        if isinstance(v, list):
            out[k] = np.array(v, dtype=float)  # None -> nan
        else:
            out[k] = v
    return out


def demo_cube(name: str) -> str:
    """Path of one demo cube: 'galaxy_hi' or 'nebula_halpha' (generated on first use)."""
    cubes = demo_cubes()
    if name not in cubes:
        raise KinemapError(f"no demo cube {name!r}; choose one of {', '.join(cubes)}")
    return cubes[name]


