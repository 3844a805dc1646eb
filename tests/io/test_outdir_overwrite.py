"""--overwrite replaces the earlier run's products as a whole, keeps (and names) the
user's own files, never replaces an input, and never replaces the folder the user is in."""
from __future__ import annotations

import json
import os
import shutil

import pytest

from _outdir_cases import assert_complete, files_in, leftovers, small_cube, start
from conftest import run_cli
from kinemap.cli import main
from kinemap.errors import OutputWarning


def _one_error_line(err):
    lines = [ln for ln in err.strip().splitlines() if not ln.startswith("kinemap: warning")]
    assert len(lines) == 1 and lines[0].startswith("kinemap: error: "), err
    return lines[0]


def test_overwrite_replaces_the_earlier_run_and_keeps_user_files(tmp_path):
    cube = small_cube(tmp_path)
    out = tmp_path / "out"
    assert main(["maps", cube, "--out", str(out), "--no-progress"]) == 0  # with PNGs
    first = assert_complete(out)
    assert any(f.endswith(".png") for f in first["files"])
    (out / "notes.txt").write_text("mine")
    (out / "extra").mkdir()
    (out / "extra" / "a.fits").write_bytes(b"user data")
    inode = (out / "notes.txt").stat().st_ino
    with pytest.warns(OutputWarning, match="kept 2 file") as record:
        assert main(["maps", cube, "--out", str(out), "--no-progress", "--no-plots",
                     "--overwrite"]) == 0
    err = " ".join(str(w.message) for w in record if w.category is OutputWarning)
    second = json.loads((out / "manifest.json").read_text())
    # the earlier run's PNGs went with it; the user's files stayed, the same files
    assert not any(f.endswith(".png") for f in files_in(out))
    assert files_in(out) == set(second["files"]) | {"notes.txt", "extra/a.fits"}
    assert (out / "notes.txt").read_text() == "mine" and (out / "notes.txt").stat().st_ino == inode
    assert (out / "extra" / "a.fits").read_bytes() == b"user data"
    assert "notes.txt" in err and "extra/a.fits" in err
    assert "notes.txt" not in second["files"]
    assert leftovers(out) == []


def test_user_file_under_a_product_name_is_never_replaced(tmp_path):
    cube = small_cube(tmp_path)
    out = tmp_path / "mine"
    out.mkdir()
    (out / "moment0.fits").write_bytes(b"the user's own map")  # no manifest: not kinemap's
    code, _, err = run_cli("maps", cube, "--out", str(out), "--no-plots", "--overwrite")
    assert code == 2
    line = _one_error_line(err)
    assert "moment0.fits" in line and "did not write" in line
    assert (out / "moment0.fits").read_bytes() == b"the user's own map"
    assert files_in(out) == {"moment0.fits"}
    assert leftovers(out) == []


def test_an_input_in_the_output_folder_is_refused_before_reading(tmp_path):
    cube = small_cube(tmp_path)
    out = tmp_path / "out"
    assert main(["maps", cube, "--out", str(out), "--no-progress", "--no-plots"]) == 0
    # the case: a product of the earlier run given as the input, --out . --overwrite
    before = (out / "moment0.fits").read_bytes()
    p = start("maps", "moment0.fits", "--out", ".", "--overwrite", cwd=out)
    _, err = p.communicate(timeout=300)
    assert p.returncode == 2
    line = _one_error_line(err)
    # the reader would have refused a 2D map ("no spectral axis"): this came first
    assert "moment0.fits lies in the output folder" in line and "spectral" not in err
    assert (out / "moment0.fits").read_bytes() == before
    assert_complete(out)
    # the same from outside the folder
    code, _, err = run_cli("maps", str(out / "moment0.fits"), "--out", str(out), "--overwrite")
    assert code == 2 and "lies in the output folder" in _one_error_line(err)
    assert (out / "moment0.fits").read_bytes() == before


def test_the_current_folder_is_not_an_output_folder(tmp_path):
    cube = small_cube(tmp_path)
    here = tmp_path / "here"
    here.mkdir()
    p = start("maps", cube, "--out", ".", "--no-plots", cwd=here)
    _, err = p.communicate(timeout=300)
    assert p.returncode == 2 and "is the current folder" in _one_error_line(err)
    assert os.listdir(here) == []


def test_a_folder_renamed_away_by_a_killed_run_is_restored(tmp_path):
    """A run killed between its two renames leaves the earlier folder under its
    .replaced- name and no folder at all: the next run puts it back before anything."""
    cube = small_cube(tmp_path)
    out = tmp_path / "out"
    assert main(["maps", cube, "--out", str(out), "--no-progress", "--no-plots"]) == 0
    kept = files_in(out)
    dead = 2 ** 22 + 12345  # above the usual pid_max of 4194304: no such process
    shutil.move(out, tmp_path / f".out.replaced-{dead}-abcd1234")
    code, _, err = run_cli("maps", cube, "--out", str(out), "--no-plots")
    assert code == 2 and "not empty" in _one_error_line(err)
    assert "restored" in err
    assert files_in(out) == kept
    assert leftovers(out) == []


def test_symlinked_output_folder_keeps_its_link(tmp_path):
    cube = small_cube(tmp_path)
    real = tmp_path / "real"
    link = tmp_path / "link"
    assert main(["maps", cube, "--out", str(real), "--no-progress", "--no-plots"]) == 0
    link.symlink_to(real)
    assert main(["maps", cube, "--out", str(link), "--no-progress", "--no-plots",
                 "--overwrite"]) == 0
    assert link.is_symlink() and os.path.samefile(link, real)
    assert_complete(real)
