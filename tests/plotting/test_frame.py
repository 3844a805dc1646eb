"""The frame picture: maps drawn with a reused frame look like maps drawn in full."""
import io

import numpy as np
import pytest
from PIL import Image

import kinemap
from conftest import gaussian_cube, make_header, write_cube
from kinemap.plotting import _frame
from kinemap.plotting import maps as pm


def _meta(tmp_path):
    cube = gaussian_cube(16, 48, 40, centre_chan=8.0, sigma_chan=2.0, noise=0.01)
    path = write_cube(tmp_path / "c.fits", cube, make_header("VRAD", nchan=16, ny=48, nx=40,
                                                             crval=0.0, cdelt=2000.0,
                                                             cunit="m/s"))
    return kinemap.read_cube(path).meta


# not constant: a constant map is drawn as a note, with no frame
_RAMP = np.arange(48 * 40.0).reshape(48, 40)


def _png(data, meta, *, reuse):
    with pytest.MonkeyPatch.context() as mp:
        if not reuse:
            mp.setattr(pm, "reuse_frame", lambda ax, key: None)
        fig = pm.plot_map(data, meta, title="a velocity map", unit="km/s", kind="velocity")
        buf = io.BytesIO()
        pm.save(fig, buf)
    return np.asarray(Image.open(buf).convert("RGBA")).astype(int)


def test_reused_frame_matches_a_full_drawing(tmp_path, monkeypatch):
    meta = _meta(tmp_path)
    rng = np.random.default_rng(3)
    first, second = rng.normal(0, 50, (2, 48, 40))
    monkeypatch.setattr(_frame, "_PICTURES", {})
    _png(first, meta, reuse=True)  # draws the frame picture
    assert len(_frame._PICTURES) == 1
    fast = _png(second, meta, reuse=True)  # pastes it
    assert len(_frame._PICTURES) == 1
    full = _png(second, meta, reuse=False)
    assert fast.shape == full.shape
    diff = np.abs(fast - full).max(axis=-1)
    # only antialiased edges may round differently when pasted (at most a few levels)
    assert diff.max() <= 4
    assert (diff > 0).mean() < 0.01


def test_frame_picture_holds_the_ticks_and_labels(tmp_path, monkeypatch):
    meta = _meta(tmp_path)
    monkeypatch.setattr(_frame, "_PICTURES", {})
    _png(_RAMP, meta, reuse=True)
    (x0, y0, rgba), = _frame._PICTURES.values()
    ink = rgba[..., 3] > 0
    # labels and ticks on the left and at the bottom: ink far apart in both directions
    rows, cols = np.flatnonzero(ink.any(axis=1)), np.flatnonzero(ink.any(axis=0))
    assert np.ptp(rows) > 200 and np.ptp(cols) > 200
    assert ink.mean() < 0.5  # a frame, not a filled picture


def test_a_style_change_draws_a_new_frame(tmp_path, monkeypatch):
    import matplotlib

    meta = _meta(tmp_path)
    monkeypatch.setattr(_frame, "_PICTURES", {})
    _png(_RAMP, meta, reuse=True)
    with matplotlib.rc_context({"xtick.labelsize": 14}):
        _png(_RAMP, meta, reuse=True)
    sizes = sorted(rgba.shape for _, _, rgba in _frame._PICTURES.values())
    assert len(sizes) == 2 and sizes[0] != sizes[1]  # larger labels, a larger picture
