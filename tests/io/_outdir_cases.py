"""Helpers of the output-folder tests: a small cube, the command in a subprocess, and the
checks that a folder is complete and that nothing was left beside it."""
from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from pathlib import Path

from conftest import gaussian_cube, make_header, write_cube

KINEMAP = os.path.join(os.path.dirname(sys.executable), "kinemap")


def small_cube(folder: Path, name: str = "cube.fits") -> str:
    """A 40 x 12 x 10 cube on a radio velocity axis (no rest value needed)."""
    h = make_header("VRAD", crval=-100.0, cdelt=5.0, cunit="km/s")
    data = gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3, noise=0.05, seed=3)
    return write_cube(folder / name, data, h)


def start(*args, **kwargs) -> subprocess.Popen:
    """``kinemap ARGS`` in a subprocess with its output captured."""
    return subprocess.Popen([KINEMAP, *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, **kwargs)


def wait_for(predicate, proc=None, limit=300.0) -> bool:
    """Poll ``predicate`` until it holds; False when ``proc`` ended first.  ``limit`` only
    guards against a hang (it is not a timing check)."""
    end = time.monotonic() + limit
    while time.monotonic() < end:
        if predicate():
            return True
        if proc is not None and proc.poll() is not None:
            return predicate()
        time.sleep(0.002)
    raise AssertionError("waited too long")


def leftovers(out: Path) -> list[str]:
    """Staging, replaced or lock entries of ``out`` beside it."""
    return sorted(p.name for p in out.parent.iterdir() if p.name.startswith(f".{out.name}."))


def staging(out: Path) -> Path | None:
    found = [p for p in out.parent.iterdir() if p.name.startswith(f".{out.name}.staging-")]
    return found[0] if found else None


def files_in(folder: Path) -> set[str]:
    return {str(p.relative_to(folder)) for p in folder.rglob("*") if p.is_file()}


def assert_complete(out: Path) -> dict:
    """``out`` holds exactly the files its manifest lists, every product among them."""
    manifest = json.loads((out / "manifest.json").read_text())
    assert set(manifest["files"]) == files_in(out)
    for entry in manifest["products"].values():
        assert (out / entry["path"]).is_file()
    return manifest
