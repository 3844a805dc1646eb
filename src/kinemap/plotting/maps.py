"""PNG plots of 2D products: world-coordinate axes, colour bar with unit, beam ellipse.

Colour choices: velocity maps use a diverging map centred on the systemic velocity
(the median of the map unless given) with symmetric limits; intensities a sequential map
with percentile limits; errors robust limits (a few edge pixels do not set the scale);
integer maps (status, mask, counts) a discrete map with one labelled tick per value.
"""
from __future__ import annotations

import textwrap
import threading

import astropy.units as u
import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import BoundaryNorm, ListedColormap
from matplotlib.figure import Figure
from matplotlib.patches import Ellipse

from kinemap.plotting._frame import reuse_frame
from kinemap.plotting._image import show_nearest
from kinemap.plotting._png import write_png
from kinemap.status import Status

__all__ = ["plot_map", "save_map", "CMAPS", "robust_limits", "world_axes", "save", "save_pages"]

CMAPS = {"intensity": "inferno", "velocity": "RdBu_r", "residual": "RdBu_r", "dispersion": "viridis",
         "error": "cividis", "noise": "cividis", "count": "Greys", "mask": "Greys",
         "ratio": "PuOr_r", "temperature": "plasma", "other": "viridis"}


def _finite(a):
    a = np.asarray(a, dtype=float)
    return a[np.isfinite(a)]


def _add_beam(ax, meta):
    beam = meta.beam
    if beam is None:
        return
    pix = meta.pixel_scale_arcsec
    w = beam.minor.to_value(u.arcsec) / pix
    h = beam.major.to_value(u.arcsec) / pix
    ny, nx = ax.images[0].get_array().shape
    x0, y0 = 0.08 * nx + h / 2, 0.08 * ny + h / 2
    # BPA is east of north; with east to the left the ellipse turns anticlockwise by BPA.
    ax.add_patch(Ellipse((x0, y0), w, h, angle=beam.pa.to_value(u.deg), facecolor="none",
                         edgecolor="k", lw=1.2, hatch="///", zorder=5))


# integer maps: a discrete colour bar with one labelled tick per value
_DISCRETE = ("status", "mask", "count")
_MASK_LABELS = {0: "0 outside", 1: "1 inside"}
_STATUS_COLOURS = ["#2c7bb6", "#fdae61", "#ffffbf", "#d7d7d7", "#7f7f7f", "#ffffff",
                   "#d7191c", "#000000"]
# more whole values than this in a count map: a continuous bar with whole-number ticks
_MAX_CODES = 16


def robust_limits(vals, kind: str, center: float | None = None) -> tuple[float, float]:
    """Colour limits of a map's finite values ``vals``.

    Velocities: symmetric about ``center`` (the median unless given; 0 for residuals) at
    the 98th percentile of the deviations.  Errors and noise: the 1st percentile to the
    smaller of the 99.5th percentile and median + 10 robust sigma (1.4826 MAD, common
    practice), so a few huge values at the mask's edge do not wash out the map while a
    broad spread of errors (faint regions) keeps its range.  Others: 1st to 99.5th
    percentile.
    """
    if vals.size == 0:
        return 0.0, 1.0
    if kind in ("velocity", "residual"):
        c = 0.0 if kind == "residual" else (float(np.median(vals)) if center is None
                                           else float(center))
        half = float(np.percentile(np.abs(vals - c), 98)) or 1.0
        return c - half, c + half
    if kind in ("error", "noise"):
        lo, hi, med = (float(x) for x in np.percentile(vals, [1, 99.5, 50]))
        mad = float(np.median(np.abs(vals - med))) * 1.4826
        hi = min(hi, med + 10.0 * mad) if mad > 0 else hi
    else:
        lo, hi = (float(x) for x in np.percentile(vals, [1, 99.5]))
    if hi <= lo:
        lo, hi = lo - 0.5, hi + 0.5
    return lo, hi


def _unit_label(unit, kind) -> str:
    """What the colour bar says: the unit, or what the numbers are when they have none."""
    if unit != u.one:
        return f"[{unit.to_string()}]"
    return {"status": "status code", "mask": "", "count": "number",
            "ratio": "ratio (no unit)"}.get(kind, "no unit")


def _codes(data, kind):
    """(values, labels, colours) of an integer map's colour bar, or None when a count map
    holds too many values for one tick each."""
    if kind == "status":
        codes = list(Status)
        return ([int(c) for c in codes], [f"{int(c)} {c.name.lower()}" for c in codes],
                _STATUS_COLOURS[: len(codes)])
    vals = _finite(data)
    lo, hi = (int(np.floor(vals.min())), int(np.ceil(vals.max()))) if vals.size else (0, 1)
    if kind == "mask":
        lo, hi = 0, 1
    if hi - lo + 1 > _MAX_CODES:
        return None
    values = list(range(lo, hi + 1))
    cmap = matplotlib.colormaps["Greys" if kind == "mask" else "viridis"]
    colours = ([cmap(0.15), cmap(0.8)] if kind == "mask" else
               [cmap(x) for x in np.linspace(0.0, 1.0, len(values))])
    labels = [_MASK_LABELS[v] if kind == "mask" else str(v) for v in values]
    return values, labels, colours


def _draw_discrete(fig, ax, data, kind, label):
    """An integer map with one colour and one labelled colour-bar tick per value."""
    table = _codes(data, kind)
    if table is None:
        from matplotlib.ticker import MaxNLocator

        cmap = _cmap(kind)
        im = show_nearest(ax, data, origin="lower", cmap=cmap)
        cb = fig.colorbar(im, ax=ax)
        cb.locator = MaxNLocator(integer=True)
        cb.update_ticks()
        cb.set_label(label)
        return cb
    values, labels, colours = table
    cmap = ListedColormap(colours).with_extremes(bad="#e8e8e8")
    norm = BoundaryNorm(np.arange(values[0] - 0.5, values[-1] + 1.0), cmap.N)
    shown = (np.where(np.isfinite(data), data, Status.NO_DATA) if kind == "status"
             else np.asarray(data, dtype=float))
    im = show_nearest(ax, shown, origin="lower", cmap=cmap, norm=norm)
    cb = fig.colorbar(im, ax=ax, ticks=values)
    cb.ax.set_yticklabels(labels, fontsize=7 if kind == "status" else None)
    cb.ax.minorticks_off()
    cb.set_label(label)
    return cb


def _constant_note(vals, title, unit, figsize):
    """A small figure that says the map holds one value (nothing to see in a map)."""
    fig = Figure(figsize=(figsize[0], 1.1))
    FigureCanvasAgg(fig)
    unit_text = "" if unit == u.one else f" {unit.to_string()}"
    fig.text(0.5, 0.62, textwrap.fill(title, 70), ha="center", va="center", fontsize=10)
    fig.text(0.5, 0.28, f"{vals[0]:.6g}{unit_text} in all {vals.size} pixels with data: "
             "a constant map is not drawn", ha="center", va="center", fontsize=9,
             color="0.3")
    return fig


def plot_map(data, meta, *, title: str, unit, kind: str = "other", center: float | None = None,
             figsize=(6.0, 5.2)):
    """Figure of one map with the cube's celestial WCS.  Returns a matplotlib Figure.

    The title holds the description and the colour bar the unit.  Integer maps (status,
    mask, counts) get one colour and one labelled tick per value; error and noise maps
    robust limits (:func:`robust_limits`); a map with a single value in every pixel is
    not drawn: the figure says the value instead.
    """
    vals = _finite(data)
    unit = u.Unit(unit)
    if vals.size > 1 and vals.min() == vals.max() and kind != "status":
        return _constant_note(vals, title, unit, figsize)
    fig = Figure(figsize=figsize)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(111, projection=meta.wcs)
    label = _unit_label(unit, kind)
    if kind in _DISCRETE:
        cb = _draw_discrete(fig, ax, data, kind, label)
    else:
        vmin, vmax = robust_limits(vals, kind, center)
        im = show_nearest(ax, data, origin="lower", cmap=_cmap(kind), vmin=vmin, vmax=vmax)
        cb = fig.colorbar(im, ax=ax)
        cb.set_label(label)
    _add_beam(ax, meta)
    world_axes(ax, meta.wcs)
    _set_title(ax, title)
    key = _layout_key(figsize, meta, data)
    _layout(fig, ax, cb, key, meta)
    reuse_frame(ax, key)
    return fig


def _cmap(kind):
    return matplotlib.colormaps[CMAPS.get(kind, "viridis")].with_extremes(bad="#e8e8e8")


def _set_title(ax, title):
    # narrower than the image, so a long title never reaches over the colour bar
    ax.set_title(textwrap.fill(title, 48), fontsize=10 if len(title) > 48 else None)


def _layout_key(figsize, meta, data):
    """Everything the frame (ticks, labels) depends on: maps with one key share one drawing
    (the title and colour bar move the figure's top and right edges, not the frame)."""
    return (tuple(figsize), tuple(meta.wcs.wcs.ctype), np.shape(data), _wcs_key(meta.wcs))


# Figures of continuous maps kept for save_map, per thread: {key: (figure, axes, image,
# colour bar)}, the oldest dropped beyond _MAX_KEPT.
_KEPT = threading.local()
_MAX_KEPT = 4


def save_map(path, data, meta, *, title: str, unit, kind: str = "other",
             center: float | None = None, figsize=(6.0, 5.2)):
    """``save(plot_map(data, meta, ...), path)``, with the same pixels, in less time.

    The figure, world-coordinate axes and colour bar of a continuous map cost a third of
    drawing it; maps of one cube share all three but for the image, colour scale, colour
    bar label and title.  So the first continuous map of a layout (and beam) is drawn by
    :func:`plot_map` and kept (per thread: figures are not shared between threads), and
    the next ones only change those parts on it; the colour bar follows its image.
    Integer and constant maps are drawn anew.  The figure is never handed out.
    """
    vals = _finite(data)
    unit = u.Unit(unit)
    constant = vals.size > 1 and vals.min() == vals.max()
    beam = getattr(meta, "beam", None)
    key = (_layout_key(figsize, meta, data), getattr(meta, "pixel_scale_arcsec", None),
           None if beam is None else tuple(float(q.to_value(u.deg))
                                           for q in (beam.major, beam.minor, beam.pa)))
    kept = getattr(_KEPT, "figures", None)
    if kept is None:
        kept = _KEPT.figures = {}
    if kind in _DISCRETE or constant or key not in kept:
        fig = plot_map(data, meta, title=title, unit=unit, kind=kind, center=center,
                       figsize=figsize)
        if not (kind in _DISCRETE or constant):
            if len(kept) >= _MAX_KEPT:
                kept.pop(next(iter(kept)))
            ax = next(a for a in fig.axes if a.images)
            kept[key] = (fig, ax, ax.images[0], ax.images[0].colorbar)
        save(fig, path)
        return
    fig, ax, im, cb = kept[key]
    vmin, vmax = robust_limits(vals, kind, center)
    im.set_data(data)
    with im.callbacks.blocked():  # the colour bar redraws once for both changes
        im.set_cmap(_cmap(kind))
        im.set_clim(vmin, vmax)
    cb.update_normal(im)
    cb.set_label(_unit_label(unit, kind))
    _set_title(ax, title)
    _layout(fig, ax, cb, key[0], meta)
    save(fig, path)


def world_axes(ax, wcs, *, ticks: int = 4, ylabel: bool = True):
    """Label the world axes of a WCSAxes panel; at most ``ticks`` longitude ticks, with
    overlapping labels left out (sexagesimal RA labels are wide)."""
    lon, lat = ax.coords[0], ax.coords[1]
    lon.set_axislabel(_axis_label(wcs, 0))
    lat.set_axislabel(_axis_label(wcs, 1) if ylabel else " ")
    lon.set_ticks(number=ticks)
    lon.set_ticklabel(exclude_overlapping=True)
    lat.set_ticklabel(exclude_overlapping=True)


# Layouts measured so far: key -> (figure size, boxes of the map and colour-bar axes in
# inches from the bottom left, how far the colour bar's labels reach to the right and the
# title up, in inches).  tight_layout has to draw the WCS axes to measure their tick labels,
# which cost as much as drawing the PNG itself; maps of one cube share those labels, so a
# layout is measured once and every map of it reuses the boxes.
_TEMPLATES: dict = {}


def _wcs_key(wcs):
    """What the tick labels of a celestial WCS depend on, as a hashable key."""
    w = wcs.wcs
    return (tuple(np.round(w.crval, 9)), tuple(np.round(w.crpix, 6)),
            tuple(np.round(w.get_pc().ravel(), 12)), tuple(np.round(w.get_cdelt(), 12)))


def _reach(fig, ax, cb, renderer):
    """(right edge of the colour bar with its labels, top of the title), in inches."""
    return (cb.ax.get_tightbbox(renderer).x1 / fig.dpi,
            ax.title.get_window_extent(renderer).y1 / fig.dpi)


def _layout(fig, ax, cb, key, meta):
    """Place the map and its colour bar in the boxes of the layout ``key``.

    The boxes are those tight_layout gives a standard map of the layout (a map of the same
    shape and frame with a one-line title and a colour bar from 0 to 1 in km/s), measured
    once per layout (:func:`_measure`).  Only the colour bar's tick labels and the title
    differ between maps of one cube, and measuring them is cheap (plain text): each map
    keeps the boxes, in inches from the bottom left, and its figure grows or shrinks to the
    right and at the top by how much further its colour-bar labels and title reach than
    the standard map's, so its margins are the ones tight_layout gave: every map of a cube
    is drawn at one scale and place, its frame is one picture (_frame.py), and its PNG is
    the same whatever was drawn before it (in this process or another).
    """
    template = _TEMPLATES.get(key)
    if template is None:
        template = _TEMPLATES[key] = _measure(key, meta)
    size, boxes, reach = template
    _place(fig, (ax, cb.ax), boxes, size)
    now = _reach(fig, ax, cb, fig.canvas.get_renderer())
    if max(abs(a - b) for a, b in zip(now, reach)) > 1e-6:
        _place(fig, (ax, cb.ax), boxes, [s + a - b for s, a, b in zip(size, now, reach)])


def _measure(key, meta):
    """The layout of the standard map of ``key`` (see :func:`_layout`)."""
    figsize, _, shape, _ = key
    fig = Figure(figsize=figsize)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(111, projection=meta.wcs)
    im = show_nearest(ax, np.zeros(shape), origin="lower", cmap=_cmap("other"), vmin=0.0,
                      vmax=1.0)
    cb = fig.colorbar(im, ax=ax)
    cb.set_label(_unit_label(u.km / u.s, "velocity"))
    world_axes(ax, meta.wcs)
    _set_title(ax, "map")
    fig.tight_layout()
    size = tuple(fig.get_size_inches())
    boxes = [a.get_position(original=True).bounds for a in (ax, cb.ax)]
    boxes = [(x0 * size[0], y0 * size[1], w * size[0], h * size[1]) for x0, y0, w, h in boxes]
    return size, boxes, _reach(fig, ax, cb, fig.canvas.get_renderer())


def _place(fig, axes, boxes, size):
    """Size ``size`` (inches) for ``fig``, and ``axes`` at ``boxes`` (inches)."""
    w, h = size
    fig.set_size_inches(w, h)
    for a, (x0, y0, bw, bh) in zip(axes, boxes):
        a.set_position((x0 / w, y0 / h, bw / w, bh / h))


def _axis_label(wcs, i):
    ctype = wcs.wcs.ctype[i].split("-")[0]
    return {"RA": "Right ascension", "DEC": "Declination", "GLON": "Galactic longitude",
            "GLAT": "Galactic latitude"}.get(ctype, ctype)


def save(fig, path, *, dpi=120):
    """Write ``fig`` as a PNG: matplotlib's pixels, encoded unfiltered at zlib level 1
    (:mod:`kinemap.plotting._png`: a map saved in about a third of PIL's time, in smaller
    files)."""
    write_png(fig, path, dpi=dpi)


def save_pages(figs, path):
    """Write the figures ``figs`` as the pages of one PDF (vector graphics, images kept
    at their pixel resolution)."""
    from matplotlib.backends.backend_pdf import PdfPages

    with PdfPages(path) as pdf:
        for fig in figs:
            pdf.savefig(fig)
