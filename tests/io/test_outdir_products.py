"""Products that cannot be right: a stage with no finite value anywhere is an error and
nothing is written; a single all-NaN map of a stage that made others is written, warned
about and listed in the manifest (one mechanism in the writer, for every stage)."""
from __future__ import annotations

import json
from dataclasses import dataclass

import astropy.units as u
import numpy as np
import pytest

from _outdir_cases import leftovers, small_cube
from kinemap import read_cube
from kinemap.errors import KinemapError, ProductWarning
from kinemap.io.products import Product
from kinemap.io.results import StageResult
from kinemap.io.writer import write_results


@dataclass(frozen=True)
class _Maps(StageResult):
    """A stage result made of given maps (the writer only sees products)."""

    maps: dict
    meta: object
    name = "test_stage"

    def products(self):
        return [Product(k, v, u.km / u.s, f"map {k}", "velocity") for k, v in self.maps.items()]


@pytest.fixture
def meta(tmp_path):
    with pytest.warns(Warning):  # the small cube has no beam
        return read_cube(small_cube(tmp_path)).meta


def test_a_stage_without_any_finite_value_is_refused(tmp_path, meta):
    nan = np.full((12, 10), np.nan)
    status = np.zeros((12, 10), np.int16)  # whole numbers cannot be NaN: not judged
    result = _Maps({"a": nan, "b": nan.copy(), "status": status}, meta)
    out = tmp_path / "out"
    with pytest.raises(KinemapError, match="test_stage stage produced no finite value"):
        write_results([result], out, plots=False)
    assert not out.exists() and leftovers(out) == []


def test_one_empty_map_is_written_warned_and_listed(tmp_path, meta):
    good = np.arange(120, dtype=float).reshape(12, 10)
    result = _Maps({"velocity": good, "velocity_3": np.full((12, 10), np.nan)}, meta)
    out = tmp_path / "out"
    with pytest.warns(ProductWarning, match="velocity_3"):
        manifest = write_results([result], out, plots=False)
    on_disk = json.loads((out / "manifest.json").read_text())
    assert on_disk["empty_products"] == ["velocity_3"] == manifest["empty_products"]
    assert on_disk["summary"]["test_stage"]["empty_products"] == ["velocity_3"]
    assert (out / "velocity_3.fits").exists()
