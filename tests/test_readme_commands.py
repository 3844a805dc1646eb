"""The README's example commands run as written (copied literally, in order, in one
folder), on the invented demo galaxy saved as ``cube.fits`` (its centre is the README's
210.5,34.25) and on region files of the names the README uses."""
from __future__ import annotations

import os
import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

README = Path(__file__).resolve().parents[1] / "README.md"
KINEMAP = os.path.join(os.path.dirname(sys.executable), "kinemap")

# commands that cannot run as written on a test machine, and why
NOT_HERE = {"--scheduler": "needs a running dask scheduler at the README's example host"}


def _commands(section: str) -> list[str]:
    """The indented ``kinemap ...`` lines of one README section (continuations joined)."""
    text = README.read_text()
    start = text.index(section)
    end = text.find("\n## ", start + len(section))
    body = text[start:end if end > 0 else None].replace("\\\n", " ")
    lines = [m.group(1) for m in re.finditer(r"^    (kinemap [a-z]+ [^\n]*)$", body, re.M)]
    return [line.split("  #")[0].strip() for line in lines]


def _regions(folder: Path) -> None:
    """disk.reg: a circle on the galaxy's centre; cut.reg: a line along its major axis
    (written by the regions package, in DS9 format)."""
    from astropy.coordinates import SkyCoord
    import astropy.units as u
    from regions import CircleSkyRegion, LineSkyRegion, Regions

    centre = SkyCoord(210.5, 34.25, unit="deg")
    Regions([CircleSkyRegion(centre, 60 * u.arcsec)]).write(folder / "disk.reg", format="ds9")
    a = centre.directional_offset_by(140 * u.deg, 120 * u.arcsec)
    b = centre.directional_offset_by(320 * u.deg, 120 * u.arcsec)
    Regions([LineSkyRegion(a, b)]).write(folder / "cut.reg", format="ds9")


@pytest.mark.parametrize("section", ["## Spectra and position-velocity diagrams",
                                     "## Running on a cluster"])
def test_readme_commands_run_as_written(tmp_path, section):
    from kinemap.datasets import demo_cube

    commands = _commands(section)
    assert commands, f"no example commands in README section {section!r}"
    shutil.copy(demo_cube("galaxy_hi"), tmp_path / "cube.fits")
    shutil.copy(demo_cube("galaxy_hi"), tmp_path / "big.fits")
    _regions(tmp_path)
    ran = 0
    for command in commands:
        if any(flag in command for flag in NOT_HERE):
            continue
        args = shlex.split(command)
        assert args[0] == "kinemap"
        p = subprocess.run([KINEMAP, *args[1:], "--no-progress"], cwd=tmp_path,
                           capture_output=True, text=True, timeout=900)
        assert p.returncode == 0, f"{command}\n{p.stderr}"
        out = args[args.index("--out") + 1] if "--out" in args else "kinemap-out"  # default
        assert (tmp_path / out / "manifest.json").exists(), command
        ran += 1
    assert ran >= 1
