"""The world-coordinate frame of a map, drawn once per layout and reused as a picture.

Drawing a map with world-coordinate axes spends most of its time on the frame: the WCS
axes transform a grid of world coordinates to find the ticks, lay out sexagesimal tick
labels and measure them to avoid overlaps.  All maps of one cube drawn in one layout
(figure size, axes box in pixels, WCS, axis labels) have the same frame, so the first is
drawn into a transparent picture of its own and every map of the layout, the first too,
pastes that picture where the frame would be drawn: in the frame's place in the z-order
(above the image, below the beam and other patches), so the PNGs look as before.

Only the frame is reused; the image, colour bar, title and patches are drawn for each map.
The caller names what the frame depends on besides the axes box (``key``); the axes box
in pixels from the bottom left, the dpi and matplotlib's font, axes and tick settings are
added here (the figure's size is not: the frame is drawn from the bottom left, so maps
whose figures differ only to the right of it or above it share the picture).
"""
from __future__ import annotations

import threading
from functools import partial

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import RendererAgg

__all__ = ["reuse_frame"]

_PICTURES: dict = {}  # full key -> (x0, y0 from the bottom, RGBA array cropped to the frame)
_LOCK = threading.Lock()
_MAX_PICTURES = 64  # a long session with many layouts must not keep pictures forever


def reuse_frame(ax, key) -> None:
    """Draw ``ax``'s world-coordinate frame from a picture shared by all axes of ``key``.

    ``ax`` is a WCSAxes; ``key`` is hashable and must change with anything that changes
    the frame other than the axes box and dpi (the WCS, the axis labels, the fonts, the
    tick settings).  Axes without a world-coordinate frame are left alone.
    """
    artist = getattr(ax, "_wcsaxesartist", None)
    if artist is None or not hasattr(ax, "draw_wcsaxes"):
        return
    artist.draw = partial(_draw_picture, ax, key)


_STYLE_KEYS = tuple(k for k in matplotlib.rcParams if k.startswith(
    ("font.", "text.", "mathtext.", "axes.", "xtick.", "ytick.", "grid.")))


def _style():
    """The matplotlib settings the frame's look depends on (a user may change them
    between two writes in one session)."""
    params = dict.__getitem__  # the stored values, without rcParams' per-key checks
    return hash(tuple(repr(params(matplotlib.rcParams, k)) for k in _STYLE_KEYS))


def _full_key(ax, key, renderer):
    # the box in pixels from the bottom left, after the aspect was applied by Axes.draw:
    # figures of different sizes with the axes at one place share the picture
    return (key, float(renderer.dpi), _style(),
            tuple(round(v, 3) for v in ax.bbox.bounds))


def _render(ax, renderer):
    """The frame alone on a transparent canvas of the figure's size, cropped to its ink."""
    sub = RendererAgg(renderer.width, renderer.height, renderer.dpi)
    ax.draw_wcsaxes(sub)
    rgba = np.asarray(sub.buffer_rgba())
    rows = np.flatnonzero(rgba[..., 3].any(axis=1))
    cols = np.flatnonzero(rgba[..., 3].any(axis=0))
    if rows.size == 0:
        return None
    top, bottom, left, right = rows[0], rows[-1] + 1, cols[0], cols[-1] + 1
    # draw_image takes rows from the bottom up, placed from y0 (pixels above the bottom);
    # the buffer's rows run from the top down
    return (int(left), int(renderer.height - bottom),
            np.ascontiguousarray(rgba[top:bottom, left:right][::-1]))


def _draw_picture(ax, key, renderer):
    if not ax.axison:
        return
    if not isinstance(renderer, RendererAgg):  # vector output: draw the frame itself
        ax.draw_wcsaxes(renderer)
        return
    full = _full_key(ax, key, renderer)
    with _LOCK:
        picture = _PICTURES.get(full)
    if picture is None:
        picture = _render(ax, renderer)
        with _LOCK:
            if len(_PICTURES) >= _MAX_PICTURES:
                _PICTURES.pop(next(iter(_PICTURES)))
            _PICTURES[full] = picture
    if picture is None:
        return
    x0, y0, rgba = picture
    gc = renderer.new_gc()
    try:
        renderer.draw_image(gc, x0, y0, rgba)
    finally:
        gc.restore()
