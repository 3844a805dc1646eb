"""Two runs into one folder: the second stops at once with the first one's pid; a lock
left by a killed run is taken over."""
from __future__ import annotations

from _outdir_cases import assert_complete, leftovers, small_cube, staging, start, wait_for
from conftest import run_cli


def test_second_run_into_the_same_folder_is_refused(tmp_path):
    cube = small_cube(tmp_path)
    out = tmp_path / "out"
    first = start("maps", cube, "--out", str(out), "--no-progress")  # PNGs: it takes a while
    wait_for(lambda: staging(out) is not None, first)
    if first.poll() is None:
        code, _, err = run_cli("maps", cube, "--out", str(out), "--no-plots")
        assert code == 2
        if first.poll() is None or "another kinemap run" in err:
            assert f"another kinemap run (pid {first.pid}) is writing to {out}" in err, err
        else:  # the first finished in between: the folder is then simply not empty
            assert "not empty" in err, err
    _, err = first.communicate(timeout=300)
    assert first.returncode == 0, err
    manifest = assert_complete(out)
    assert manifest["command_line"].startswith("kinemap maps")
    assert leftovers(out) == []


def test_lock_of_a_dead_run_is_taken_over(tmp_path):
    cube = small_cube(tmp_path)
    out = tmp_path / "out"
    # a killed run leaves its lock file (the kernel released the lock itself)
    (tmp_path / ".out.kinemap-lock").write_text(f"{2 ** 22 + 12345}\n")
    code, _, err = run_cli("maps", cube, "--out", str(out), "--no-plots")
    assert code == 0, err
    assert_complete(out)
    assert leftovers(out) == []
