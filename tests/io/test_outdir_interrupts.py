"""Real signals at several moments of a `kinemap maps` run: the output folder is absent or
complete, nothing is left beside it, and what the command says is true.

The moments are found by watching the staging folder the run writes into (it appears
before the cube is read): as soon as it appears (computation), at its first product
(writing), halfway through the products, and when its manifest appears (publishing).
"""
from __future__ import annotations

import signal

import pytest

from _outdir_cases import assert_complete, leftovers, small_cube, staging, start, wait_for

# (name, number of files in the staging folder to wait for; "manifest": its manifest.json)
MOMENTS = [("computing", 0), ("first-product", 1), ("half-written", 8),
           ("publishing", "manifest")]


def _empty(folder) -> bool:
    try:
        return not any(folder.iterdir())
    except FileNotFoundError:  # removed (interrupted) or published meanwhile
        return False


def _reached(out, moment):
    def check():
        s = staging(out)
        if s is None:
            return False
        try:
            names = [p.name for p in s.iterdir()]
        except FileNotFoundError:  # published or removed meanwhile
            return True
        if moment == "manifest":
            return "manifest.json" in names
        return len(names) >= moment
    return check


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
@pytest.mark.parametrize("name,moment", MOMENTS, ids=[m[0] for m in MOMENTS])
def test_signal_leaves_whole_folder_or_none(tmp_path, sig, name, moment):
    cube = small_cube(tmp_path)
    out = tmp_path / "out"
    proc = start("maps", cube, "--out", str(out), "--no-progress")
    wait_for(lambda: staging(out) is not None or out.exists(), proc)
    wait_for(_reached(out, moment), proc)
    before_writing = False
    if proc.poll() is None:
        proc.send_signal(sig)
        # the signal is delivered at once; Python acts on it at its next step, which can
        # only be before publishing if no product was staged yet
        s = staging(out)
        before_writing = s is not None and not out.exists() and _empty(s)
    _, err = proc.communicate(timeout=300)
    assert proc.returncode in (0, 130), err
    assert "Traceback" not in err
    if out.exists():
        assert_complete(out)
        if proc.returncode == 130:
            assert "interrupted after the products were written" in err, err
    else:
        assert proc.returncode == 130 and "interrupted; nothing was written" in err, err
    if before_writing:  # a signal while the cube was being read or measured (a small cube
        # may be done before the signal is sent: then only the rules above apply)
        assert proc.returncode == 130 and not out.exists(), err
    assert leftovers(out) == []


def test_sigkill_leaves_a_staging_folder_the_next_run_removes(tmp_path):
    cube = small_cube(tmp_path)
    out = tmp_path / "out"
    proc = start("maps", cube, "--out", str(out), "--no-progress")
    wait_for(lambda: staging(out) is not None, proc)
    wait_for(_reached(out, 1), proc)
    proc.kill()
    proc.communicate(timeout=60)
    left = staging(out)
    if out.exists():  # it finished before the kill landed
        assert_complete(out)
        return
    assert left is not None  # at most a staging folder (and the unlocked lock file)
    assert set(leftovers(out)) <= {left.name, ".out.kinemap-lock"}
    again = start("maps", cube, "--out", str(out), "--no-progress")
    _, err = again.communicate(timeout=300)
    assert again.returncode == 0, err
    assert f"removed {left}" in err and "interrupted run" in err
    assert_complete(out)
    assert leftovers(out) == []


def test_worker_processes_end_with_the_run(tmp_path):
    psutil = pytest.importorskip("psutil")  # comes with dask.distributed
    cube = small_cube(tmp_path)
    out = tmp_path / "out"
    proc = start("maps", cube, "--out", str(out), "--no-progress", "--workers", "1")
    me = psutil.Process(proc.pid)
    wait_for(lambda: len(me.children(recursive=True)) >= 1, proc)
    children = me.children(recursive=True)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=300)
    assert proc.returncode in (0, 130), err
    gone, alive = psutil.wait_procs(children, timeout=30)
    assert alive == [], [p.cmdline() for p in alive]
    if not out.exists():
        assert "interrupted; nothing was written" in err
    assert leftovers(out) == []
