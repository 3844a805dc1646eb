"""Folders that cannot be written and files that cannot be finished: one line, exit 2,
nothing left, and (where it can be known) before the cube is read.

The cube given to the early checks is a text file: had the run read it, the error would
have been the reader's ("not a readable FITS file"), so the output's error proves the
order."""
from __future__ import annotations

import os
import resource
import subprocess

import pytest

from _outdir_cases import KINEMAP, leftovers, small_cube
from conftest import run_cli


def _one_error_line(err):
    lines = [ln for ln in err.strip().splitlines() if not ln.startswith("kinemap: warning")]
    assert len(lines) == 1 and lines[0].startswith("kinemap: error: "), err
    assert "Traceback" not in err and "internal error" not in err
    return lines[0]


@pytest.fixture
def unread(tmp_path):
    path = tmp_path / "broken.fits"
    path.write_text("not a FITS file")
    return str(path)


def test_out_below_an_existing_file(tmp_path, unread):
    (tmp_path / "afile").write_text("x")
    code, _, err = run_cli("maps", unread, "--out", str(tmp_path / "afile" / "sub"))
    assert code == 2
    assert "is a file, not a folder" in _one_error_line(err)
    assert (tmp_path / "afile").read_text() == "x"


def test_out_is_a_file(tmp_path, unread):
    (tmp_path / "afile").write_text("x")
    code, _, err = run_cli("maps", unread, "--out", str(tmp_path / "afile"), "--overwrite")
    assert code == 2 and "not a folder" in _one_error_line(err)
    assert (tmp_path / "afile").read_text() == "x"


def test_unwritable_parent(tmp_path, unread):
    if os.geteuid() == 0:  # root writes through permission bits; sysfs refuses even root
        if not os.path.isdir("/sys/kernel"):
            pytest.skip("running as root and there is no /sys to refuse a folder")
        out = "/sys/kinemap-test-out/sub"
    else:
        ro = tmp_path / "ro"
        ro.mkdir()
        ro.chmod(0o555)
        out = str(ro / "sub")
    code, _, err = run_cli("maps", unread, "--out", out)
    assert code == 2
    line = _one_error_line(err)
    assert "permission denied" in line and "--out" in line
    assert not os.path.exists(out)


def test_file_size_limit_is_one_line_and_leaves_nothing(tmp_path):
    """RLIMIT_FSIZE below one FITS map (2880-byte header + data): the write fails with
    EFBIG (SIGXFSZ is ignored, or the process would be killed)."""
    cube = small_cube(tmp_path)
    out = tmp_path / "out"

    def limit():
        resource.setrlimit(resource.RLIMIT_FSIZE, (4000, 4000))

    p = subprocess.run([KINEMAP, "maps", cube, "--out", str(out), "--no-plots"],
                       capture_output=True, text=True, preexec_fn=limit, timeout=300)
    assert p.returncode == 2, p.stderr
    line = _one_error_line(p.stderr)
    assert "file-size limit" in line and "nothing was written" in line
    assert not out.exists()
    assert leftovers(out) == []
