"""Stacked widths on an invented disk of known dispersion (tests/stacking/_disk.py).

The disk has no beam and white noise, so every stack is an exact Gaussian of the input
dispersion plus noise of known size: the fitted width in each radial bin must equal the
input within its error (pulls), and a stack of spectra too faint to fit one by one must
still give it."""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

from kinemap.io.reader import read_cube
from kinemap.stacking.bins import radial_bins
from kinemap.stacking.stage import stack_spectra

sys.path.insert(0, str(Path(__file__).parent))
from _disk import disk_cube  # noqa: E402


def _stack(tmp_path, seed, **disk):
    path = tmp_path / f"disk{seed}.fits"
    vel, truth = disk_cube(path, seed=seed, **disk)
    cube = read_cube(str(path))
    bins = radial_bins(cube.meta.wcs, cube.shape[1:], center=(truth["x0"], truth["y0"]),
                       position_angle=truth["position_angle"],
                       inclination=truth["inclination"], edges=np.arange(0.0, 181.0, 20.0))
    noise = np.full(cube.shape[1:], truth["noise"])
    return stack_spectra(cube, vel, bins, noise=noise, components=1), truth


def test_stacked_width_equals_the_input_dispersion_within_its_error(tmp_path):
    pulls = []
    for seed in (1, 2, 3):
        result, truth = _stack(tmp_path, seed)
        f = result.fits
        d = np.asarray(f["dispersion"].value)
        e = np.asarray(f["dispersion_err"].value)
        ok = np.isfinite(d)
        assert ok.sum() >= 7  # 0-140 arcsec at least
        pulls.extend((d[ok] - truth["dispersion"]) / e[ok])
    pulls = np.asarray(pulls)
    # pulls of a correct fit with correct errors: mean 0, width 1 (common practice)
    assert np.all(np.abs(pulls) < 4.0), pulls
    assert abs(pulls.mean()) < 3.0 / np.sqrt(pulls.size), pulls
    assert 0.6 < pulls.std() < 1.5, pulls


def test_stacking_recovers_a_line_too_faint_in_any_one_spectrum(tmp_path):
    # peak S/N 0.8 per spectrum at the centre (0.3 at 120 arcsec): no single fit works
    result, truth = _stack(tmp_path, 7, peak=0.8)
    f = result.fits
    outer = (np.asarray(f["radius"].value) > 60) & (np.asarray(f["n_spectra"]) > 50)
    assert outer.any()
    d, e = np.asarray(f["dispersion"].value)[outer], np.asarray(f["dispersion_err"].value)[outer]
    assert np.all(np.abs(d - truth["dispersion"]) < 4 * e)
    assert np.all(e < 0.25 * truth["dispersion"])


def test_stacked_flux_is_the_mean_of_the_spectra(tmp_path):
    # flux conservation through the stack: sum over the stack's channels of
    # flux x n_spectra equals the sum of the input spectra of the bin (to 1e-6).  Noise-free
    # lines inside the band: with noise at the band's ends, the shift's ripple beyond a
    # spectrum's own channels is left out of the stack (a noise-level loss at its edges)
    path = tmp_path / "d.fits"
    vel, truth = disk_cube(path, seed=4, noise=0.0)
    cube = read_cube(str(path))
    bins = radial_bins(cube.meta.wcs, cube.shape[1:], center=(truth["x0"], truth["y0"]),
                       position_angle=60.0, inclination=50.0, edges=[0.0, 50.0, 100.0])
    res = stack_spectra(cube, vel, bins, noise=np.ones(cube.shape[1:]), components=1)
    t = res.spectra
    data = np.asarray(cube.data, dtype=np.float64)
    for b in (0, 1):
        rows = np.asarray(t["bin"]) == b
        stacked = np.sum(np.asarray(t["flux"].value)[rows] * np.asarray(t["n_spectra"])[rows])
        direct = data[:, bins.labels == b].sum()
        assert stacked == pytest.approx(direct, rel=1e-6, abs=1e-6 * np.abs(data).sum())
