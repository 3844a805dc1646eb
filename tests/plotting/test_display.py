"""Maps reduced for their PNG (kinemap.plotting._display): block means against numpy's
nanmean over the same blocks and the reduced WCS against astropy's world coordinates of
the block centres (reference libraries)."""
import warnings
from dataclasses import dataclass

import numpy as np
from astropy.wcs import WCS

from kinemap.parallel import store
from kinemap.plotting._display import display_map


@dataclass(frozen=True)
class _Meta:
    wcs: WCS


def _wcs():
    w = WCS(naxis=2)
    w.wcs.ctype = ["RA---SIN", "DEC--SIN"]
    w.wcs.crval, w.wcs.crpix, w.wcs.cdelt = [150.0, -30.0], [40.5, 20.5], [-2e-4, 2e-4]
    return w


def test_small_maps_are_drawn_as_they_are():
    a, meta = np.ones((50, 60)), _Meta(_wcs())
    b, m = display_map(a, meta, "velocity", max_side=60)
    assert b is a and m is meta


def test_block_means_and_wcs_of_a_reduced_map(monkeypatch):
    monkeypatch.setattr(store, "CHUNK_BYTES", 2000)  # several bands
    rng = np.random.default_rng(4)
    ny, nx, f = 103, 77, 4  # edges: partial blocks on both axes
    a = rng.normal(size=(ny, nx))
    a[rng.random(a.shape) < 0.3] = np.nan
    a[:4, :4] = np.nan  # one block with no value
    small, meta = display_map(a, _Meta(_wcs()), "velocity", max_side=26)
    assert small.shape == (26, 20)
    padded = np.full((104, 80), np.nan)
    padded[:ny, :nx] = a
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ref = np.nanmean(padded.reshape(26, f, 20, f), axis=(1, 3))
    np.testing.assert_array_equal(small, ref)
    assert np.isnan(small[0, 0])
    # a reduced pixel sits at the centre of its block: old pixel (f - 1) / 2 + f i
    for i, j in ((0, 0), (5, 11), (25, 19)):
        x_old, y_old = (f - 1) / 2 + f * j, (f - 1) / 2 + f * i
        np.testing.assert_allclose(meta.wcs.pixel_to_world_values(j, i),
                                   _wcs().pixel_to_world_values(x_old, y_old), rtol=0,
                                   atol=1e-10)


def test_category_maps_keep_whole_values():
    a = np.arange(40 * 30, dtype=np.int16).reshape(40, 30) % 7
    small, _ = display_map(a, _Meta(_wcs()), "status", max_side=10)
    assert small.dtype == np.int16 and small.shape == (10, 8)
    np.testing.assert_array_equal(small, a[::4, ::4])
