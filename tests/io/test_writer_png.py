"""PNGs drawn in worker processes or on a thread while FITS files are written: the same
files, warnings kept."""
import hashlib
import os
import sys
import warnings

import numpy as np
import pytest

import kinemap
from conftest import gaussian_cube, make_header, write_cube
from kinemap.io.products import Product
from kinemap.io import writer
from kinemap.io.writer import _PngWriter
from kinemap.plotting.maps import save_map


def _products(tmp_path):
    cube = gaussian_cube(16, 40, 36, centre_chan=8.0, sigma_chan=2.0, noise=0.01)
    path = write_cube(tmp_path / "c.fits", cube, make_header("VRAD", nchan=16, ny=40, nx=36,
                                                             crval=0.0, cdelt=2000.0,
                                                             cunit="m/s"))
    meta = kinemap.read_cube(path).meta
    rng = np.random.default_rng(7)
    kinds = ["velocity", "intensity", "error", "dispersion", "count", "velocity"]
    prods = [Product(key=f"map{i}", data=rng.normal(i, 1.0 + i, (40, 36)), unit="km/s",
                     description=f"map number {i}", kind=k) for i, k in enumerate(kinds)]
    return meta, prods


def _digest(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _draw_all(folder, meta, prods, processes):
    folder.mkdir()
    with writer.drawing_processes(processes), _PngWriter(True) as png:
        if processes and os.cpu_count() > 1 and sys.platform.startswith("linux"):
            assert writer._DRAWING is not None
        writer.prepare_maps(meta, (40, 36))  # a map laid out ahead: changes no file
        for p in prods:
            png.submit_map(np.asarray(p.data), meta, p, None, folder / f"{p.key}.png")
    assert writer._DRAWING is None  # the processes end with their block


def test_pngs_are_the_same_wherever_and_in_whatever_order_drawn(tmp_path):
    """Maps sent to the drawing processes, drawn on the writer's thread, and drawn one at
    a time in this process last first: the same files (a map's layout does not depend on
    the maps drawn before it, nor on the process)."""
    meta, prods = _products(tmp_path)
    _draw_all(tmp_path / "procs", meta, prods, True)
    _draw_all(tmp_path / "thread", meta, prods, False)
    (tmp_path / "seq").mkdir()
    for p in reversed(prods):
        save_map(tmp_path / "seq" / f"{p.key}.png", np.asarray(p.data), meta,
                 title=p.description, unit=p.unit, kind=p.kind)
    for p in prods:
        want = _digest(tmp_path / "seq" / f"{p.key}.png")
        assert _digest(tmp_path / "procs" / f"{p.key}.png") == want, p.key
        assert _digest(tmp_path / "thread" / f"{p.key}.png") == want, p.key


def test_errors_of_a_png_job_reach_the_caller():
    def broken():
        raise RuntimeError("no canvas")

    with pytest.raises(RuntimeError, match="no canvas"):
        with _PngWriter(True) as png:
            png.submit(broken)


def test_other_warnings_are_issued_again_plotting_ones_are_not():
    with pytest.warns(UserWarning, match="header card") as record:
        with _PngWriter(True):
            warnings.warn("header card too long")  # as a FITS write would
            warnings.warn_explicit("tick labels overlap", UserWarning,
                                   "/x/site-packages/matplotlib/axis.py", 10)
    assert [str(w.message) for w in record] == ["header card too long"]



_TEST_PROCESS, _DRAW = os.getpid(), writer._map_png


def _dies_in_a_drawing_process(*args):
    if os.getpid() != _TEST_PROCESS:
        os._exit(1)
    _DRAW(*args)


@pytest.mark.skipif(not (sys.platform.startswith("linux") and (os.cpu_count() or 1) > 1),
                    reason="drawing processes are forked on Linux with more than one core")
def test_maps_of_a_dead_drawing_process_are_drawn_on_the_thread(tmp_path, monkeypatch):
    """A drawing process that dies (killed, out of memory) loses no PNG: its maps are
    drawn again on the writer's thread, the same files."""
    meta, prods = _products(tmp_path)
    monkeypatch.setattr(writer, "_map_png", _dies_in_a_drawing_process)  # forked with it
    _draw_all(tmp_path / "procs", meta, prods, True)
    (tmp_path / "seq").mkdir()
    for p in prods:
        save_map(tmp_path / "seq" / f"{p.key}.png", np.asarray(p.data), meta,
                 title=p.description, unit=p.unit, kind=p.kind)
        assert (_digest(tmp_path / "procs" / f"{p.key}.png")
                == _digest(tmp_path / "seq" / f"{p.key}.png")), p.key
