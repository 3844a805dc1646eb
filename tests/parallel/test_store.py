"""Maps kept on disk (kinemap.parallel.store) against numpy's whole-array functions
(reference library): the band-by-band reductions must give numpy's numbers exactly."""
import numpy as np
import pytest

from kinemap.parallel import store


def _maps(seed):
    rng = np.random.default_rng(seed)
    for trial in range(150):
        ny, nx = (int(n) for n in rng.integers(1, 30, 2))
        a = rng.normal(size=(ny, nx)) * 10.0 ** rng.integers(-3, 4)
        if trial % 3 == 0:
            a = np.round(a)  # many ties
        if trial % 5 == 0:
            a[:] = 2.5
            a.flat[0] = 1e300  # one far value: every other value in one bin
        if trial % 7 == 0:
            a = a + 1e9  # values close together in relative terms
        a[rng.random(a.shape) < rng.random() * 0.6] = np.nan
        yield a


@pytest.mark.parametrize("gather", [7, store._GATHER])
def test_nanmedian_equals_numpy(monkeypatch, gather):
    # Reference: numpy.nanmedian.  A small gather limit forces the range to be narrowed
    # several times; small bands force many bands per map.
    monkeypatch.setattr(store, "_GATHER", gather)
    monkeypatch.setattr(store, "CHUNK_BYTES", 40)
    for a in _maps(1):
        ref = np.nanmedian(a) if np.isfinite(a).any() else np.nan
        got = store.nanmedian(a)
        assert got == ref or (np.isnan(ref) and np.isnan(got)), (a, got, ref)


def test_reductions_on_disk_equal_numpy(monkeypatch):
    # Reference: numpy's isfinite/any/count on the same values held in memory.
    monkeypatch.setattr(store, "CHUNK_BYTES", 64)
    for a in _maps(2):
        disk = store.allocate({"x": ((), np.float64, np.nan)}, a.shape, max_memory=0)["x"]
        assert store.on_disk(disk)
        for ys, band in store.row_chunks(disk):
            band[...] = a[ys]
        assert store.any_finite(disk) == bool(np.isfinite(a).any())
        assert store.finite_fraction(disk) == np.count_nonzero(np.isfinite(a)) / a.size
        ref = np.nanmedian(a) if np.isfinite(a).any() else np.nan
        assert store.nanmedian(disk) == ref or np.isnan(ref)
        pos = store.derive(disk, lambda b: b > 0, np.bool_)
        assert store.on_disk(pos) and np.array_equal(np.asarray(pos), a > 0)


def test_allocate_keeps_small_maps_in_memory_and_fills_both():
    outputs = {"v": ((), np.float64, np.nan), "n": ((), np.int32, 0),
               "s": ((3,), np.float32, -1.0)}
    small = store.allocate(outputs, (20, 30), max_memory=1 << 30)
    disk = store.allocate(outputs, (20, 30), max_memory=1000)
    for k in outputs:
        assert not store.on_disk(small[k]) and store.on_disk(disk[k])
        assert small[k].shape == disk[k].shape and small[k].dtype == disk[k].dtype
        np.testing.assert_array_equal(small[k], disk[k])
    assert disk["s"].shape == (3, 20, 30) and (disk["s"] == -1.0).all()
