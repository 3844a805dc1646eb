"""PNGs drawn on worker threads while FITS files are written: same files, warnings kept."""
import hashlib
import warnings

import numpy as np
import pytest

import kinemap
from conftest import gaussian_cube, make_header, write_cube
from kinemap.io.products import Product
from kinemap.io.writer import _map_png, _PngWriter


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


def test_threaded_pngs_equal_sequential_ones(tmp_path):
    meta, prods = _products(tmp_path)
    (tmp_path / "seq").mkdir()
    (tmp_path / "thr").mkdir()
    for p in prods:
        _map_png(np.asarray(p.data), meta, p, None, tmp_path / "seq" / f"{p.key}.png")
    with _PngWriter(True) as png:
        for p in prods:
            png.submit(_map_png, np.asarray(p.data), meta, p, None,
                       tmp_path / "thr" / f"{p.key}.png")
    for p in prods:
        assert _digest(tmp_path / "thr" / f"{p.key}.png") == _digest(tmp_path / "seq" / f"{p.key}.png")


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

