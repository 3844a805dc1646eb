"""The lighter drawing paths of map PNGs show what matplotlib's general ones show.

NearestImage (index sampling) against matplotlib's own AxesImage resampling and against
matplotlib's colormap applied to the data; the PNG writer against PIL's decoding of
matplotlib's own PNG; the layout template against the boxes it promises.
"""
import io
from types import SimpleNamespace

import matplotlib
import numpy as np
import pytest
from astropy.wcs import WCS
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import BoundaryNorm, ListedColormap, Normalize
from matplotlib.figure import Figure
from PIL import Image

from conftest import make_header
from kinemap.plotting import _frame
from kinemap.plotting import maps as pm
from kinemap.plotting._image import NearestImage, show_nearest
from kinemap.plotting._png import png_bytes


def _buffer(fig, dpi=120):
    fig.savefig(io.BytesIO(), dpi=dpi, format="raw")
    return np.asarray(fig.canvas.buffer_rgba()).astype(int)


def _figure(data, fast, *, size=(5.0, 4.0), **kwargs):
    fig = Figure(figsize=size, dpi=120)  # the dpi of the buffer: display = PNG pixels
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(111)
    ax.set_axis_off()
    if fast:
        im = show_nearest(ax, data, **kwargs)
        assert isinstance(im, NearestImage)
    else:
        im = ax.imshow(data, interpolation="nearest", **kwargs)
    return fig, ax, im


@pytest.mark.parametrize("shape", [(512, 512), (300, 700), (41, 53), (7, 5)])
@pytest.mark.parametrize("origin", ["lower", "upper"])
def test_nearest_image_equals_matplotlib_resampling(shape, origin):
    """Shrunk (512 -> ~380 px) and enlarged (7 x 5 -> ~60 px a pixel) maps with NaNs:
    pixel for pixel the image matplotlib's Agg resampling draws (reference library)."""
    rng = np.random.default_rng(sum(shape))
    data = rng.normal(0.0, 1.0, shape)
    data[rng.random(shape) < 0.05] = np.nan
    cmap = matplotlib.colormaps["RdBu_r"].with_extremes(bad="#e8e8e8")
    kw = dict(origin=origin, cmap=cmap, vmin=-1.5, vmax=1.5)
    fast = _buffer(_figure(data, True, **kw)[0])
    ref = _buffer(_figure(data, False, **kw)[0])
    _assert_same_but_edges(fast, ref, shape)


def _assert_same_but_edges(fast, ref, shape):
    """Equal, except where Agg's fixed-point (1/256 pixel) coordinates put a cell edge one
    PNG pixel over: then a whole PNG column (or row) shows the map's next column (row).
    The colours themselves are checked against the data in the next test."""
    diff = np.abs(fast - ref).max(axis=-1) > 0
    drawn = (ref[..., :3] != 255).any(axis=-1)  # the image (no white in these colormaps)
    height, width = drawn.any(axis=1).sum(), drawn.any(axis=0).sum()
    # whole lines: columns (rows) differing over most of the image's height (width)
    full_c = diff.sum(axis=0) > 0.5 * height
    full_r = diff.sum(axis=1) > 0.5 * width
    stray = diff & ~full_c[None, :] & ~full_r[:, None]
    # ... and the image's outermost pixels, where it meets the axes edge
    r, c = np.flatnonzero(drawn.any(axis=1)), np.flatnonzero(drawn.any(axis=0))
    stray[[r[0], r[-1]], :] = False
    stray[:, [c[0], c[-1]]] = False
    assert not stray.any()
    # a few of the cell edges (at most one per cell)
    ny, nx = shape
    assert full_c.sum() <= 0.2 * min(width, nx) and full_r.sum() <= 0.2 * min(height, ny)
    if width >= 2 * nx and height >= 2 * ny:  # enlarged: a moved edge shows the neighbour
        rows, cols = np.nonzero(diff & ~stray)
        near = np.zeros(rows.size, bool)
        for dr, dc in ((0, 1), (0, -1), (1, 0), (-1, 0)):
            near |= (fast[rows, cols] == ref[rows + dr, cols + dc]).all(axis=-1)
        assert near.all()


@pytest.mark.parametrize("shape", [(12, 16), (512, 512), (300, 700)])
def test_nearest_image_shows_matplotlibs_colours_of_the_data(shape):
    """Every PNG pixel whose centre lies inside a map pixel (not within 0.1 pixel of its
    edge) holds matplotlib's colormap of that pixel's value (Colormap(Normalize(value)),
    reference library); NaN pixels the bad colour.  Enlarged and shrunk maps."""
    rng = np.random.default_rng(5)
    data = rng.normal(0.0, 1.0, shape)
    data[rng.random(shape) < 0.05] = np.nan
    cmap = matplotlib.colormaps["viridis"].with_extremes(bad="#e8e8e8")
    fig, ax, im = _figure(data, True, origin="lower", cmap=cmap, vmin=-1.0, vmax=1.0)
    png = _buffer(fig)
    h = png.shape[0]
    # PNG pixel centres -> map coordinates (pixel centres at whole numbers)
    bx = ax.bbox
    cols = np.arange(int(bx.x0) + 1, int(bx.x1) - 1)
    rows = np.arange(int(bx.y0) + 1, int(bx.y1) - 1)  # from the bottom
    X, Y = np.meshgrid(cols + 0.5, rows + 0.5)
    xy = ax.transData.inverted().transform(np.c_[X.ravel(), Y.ravel()])
    j, i = np.floor(xy[:, 0] + 0.5).astype(int), np.floor(xy[:, 1] + 0.5).astype(int)
    clear = (np.abs(xy[:, 0] + 0.5 - np.round(xy[:, 0] + 0.5)) > 0.1) & \
            (np.abs(xy[:, 1] + 0.5 - np.round(xy[:, 1] + 0.5)) > 0.1) & \
            (j >= 0) & (j < shape[1]) & (i >= 0) & (i < shape[0])
    assert clear.mean() > 0.5
    shown = png[h - 1 - Y.ravel().astype(int), X.ravel().astype(int)][clear]
    value = np.ma.masked_invalid(data[i[clear], j[clear]])
    expected = np.round(cmap(Normalize(-1.0, 1.0)(value)) * 255)
    assert np.abs(shown - expected).max() <= 1
    bad = ~np.isfinite(data[i[clear], j[clear]])
    assert bad.any() and (shown[bad][:, :3] == [0xe8, 0xe8, 0xe8]).all()


def test_nearest_image_keeps_a_discrete_norm():
    """Status-like codes through a BoundaryNorm: the colours matplotlib draws."""
    rng = np.random.default_rng(6)
    codes = rng.integers(0, 4, (60, 90)).astype(float)
    cmap = ListedColormap(["#2c7bb6", "#fdae61", "#ffffbf", "#d7191c"])
    kw = dict(origin="lower", cmap=cmap, norm=BoundaryNorm(np.arange(-0.5, 4.0), 4))
    fast = _buffer(_figure(codes, True, **kw)[0])
    ref = _buffer(_figure(codes, False, **kw)[0])
    _assert_same_but_edges(fast, ref, codes.shape)


def test_png_writer_holds_matplotlibs_pixels(tmp_path):
    """The unfiltered PNG decodes (PIL, reference library) to the pixels of matplotlib's own
    PNG of the same figure; transparent figures keep their alpha channel."""
    rng = np.random.default_rng(7)
    fig, _, _ = _figure(rng.normal(size=(50, 60)), True, origin="lower", cmap="inferno")
    pm.save(fig, tmp_path / "fast.png")
    fig.savefig(tmp_path / "ref.png", dpi=120)
    fast, ref = Image.open(tmp_path / "fast.png"), Image.open(tmp_path / "ref.png")
    assert fast.mode == "RGB" and fast.size == ref.size
    assert fast.info["dpi"] == pytest.approx(ref.info["dpi"])
    np.testing.assert_array_equal(np.asarray(fast), np.asarray(ref.convert("RGB")))
    clear = np.zeros((3, 4, 4), np.uint8)
    clear[1, 2] = [10, 20, 30, 128]
    back = Image.open(io.BytesIO(png_bytes(clear, 100)))
    assert back.mode == "RGBA"
    np.testing.assert_array_equal(np.asarray(back), clear)


@pytest.fixture()
def meta():
    h = make_header("FREQ", ny=40, nx=50)
    return SimpleNamespace(wcs=WCS(h).celestial, beam=None, pixel_scale_arcsec=7.2)


def test_maps_of_one_cube_share_the_axes_box_and_frame(meta, monkeypatch):
    """A two-line title and wide colour-bar labels grow the figure, not move the map: the
    map's box in pixels is the first figure's and one frame picture serves both."""
    monkeypatch.setattr(pm, "_TEMPLATES", {})
    monkeypatch.setattr(_frame, "_PICTURES", {})
    rng = np.random.default_rng(8)
    boxes, sizes = [], []
    for mean, title in ((1.0, "short title"),  # colour-bar labels: 5-digit ones are wider
                        (20000.0, "a much longer title that has to be wrapped onto a second line")):
        fig = pm.plot_map(rng.normal(mean, 1.0 + mean / 10, (40, 50)), meta, title=title, unit="km/s",
                          kind="intensity")
        png = _buffer(fig)
        ax = next(a for a in fig.axes if a.images)
        boxes.append(np.round(ax.bbox.bounds, 3))
        sizes.append(png.shape[:2])
        # the colour bar's labels and the title stay inside the figure
        r = fig.canvas.get_renderer()
        cb = next(a for a in fig.axes if not a.images)
        assert cb.get_tightbbox(r).x1 <= fig.bbox.width
        assert ax.title.get_window_extent(r).y1 <= fig.bbox.height
    np.testing.assert_array_equal(boxes[0], boxes[1])
    assert sizes[1][0] > sizes[0][0] and sizes[1][1] > sizes[0][1]  # taller and wider
    assert len(_frame._PICTURES) == 1


def test_save_map_on_a_kept_figure_equals_a_new_figure(meta, tmp_path, monkeypatch):
    """Maps drawn one after another on the kept figure: byte for byte the pixels of
    save(plot_map(...)) on a new figure, whatever the previous map was (colour scales of
    other sizes, an offset on the colour bar, one- and two-line titles, integer and
    constant maps in between)."""
    monkeypatch.setattr(pm._KEPT, "figures", {}, raising=False)
    rng = np.random.default_rng(9)
    maps = [
        ("intensity", "integrated intensity", "K km/s", rng.gamma(2.0, 3.0, (40, 50))),
        ("velocity", "velocity at the line peak, a much longer title of two lines", "km/s",
         rng.normal(1500.0, 40.0, (40, 50))),
        ("mask", "signal mask", "", (rng.random((40, 50)) > 0.5).astype(float)),
        ("error", "error of the velocity", "km/s", rng.gamma(1.0, 2e-7, (40, 50))),
        ("noise", "noise", "K", np.full((40, 50), 0.2)),
        ("residual", "residual", "km/s", rng.normal(0.0, 5.0, (40, 50))),
        ("dispersion", "dispersion", "km/s", rng.normal(1.0e6, 10.0, (40, 50))),
    ]
    maps[0][3][:5, :7] = np.nan
    for kind, title, unit, data in maps:
        kept, new = tmp_path / f"kept_{kind}.png", tmp_path / f"new_{kind}.png"
        pm.save_map(kept, data, meta, title=title, unit=unit, kind=kind, center=1500.0)
        pm.save(pm.plot_map(data, meta, title=title, unit=unit, kind=kind, center=1500.0),
                new)
        a, b = np.asarray(Image.open(kept)), np.asarray(Image.open(new))
        assert a.shape == b.shape, kind
        np.testing.assert_array_equal(a, b, err_msg=kind)
    assert len(pm._KEPT.figures) == 1  # the continuous maps were drawn on one figure
