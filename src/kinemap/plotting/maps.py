"""PNG plots of 2D products: world-coordinate axes, colour bar with unit, beam ellipse.

Colour choices: velocity maps use a diverging map centred on the systemic velocity
(the median of the map unless given) with symmetric limits; intensities a sequential map
with percentile limits; status maps a discrete map with a legend of the codes.
"""
from __future__ import annotations

import textwrap

import astropy.units as u
import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import BoundaryNorm, ListedColormap
from matplotlib.figure import Figure
from matplotlib.patches import Ellipse

from kinemap.plotting._frame import reuse_frame
from kinemap.status import Status

__all__ = ["plot_map", "CMAPS"]

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


def plot_map(data, meta, *, title: str, unit, kind: str = "other", center: float | None = None,
             figsize=(6.0, 5.2)):
    """Figure of one map with the cube's celestial WCS.  Returns a matplotlib Figure."""
    fig = Figure(figsize=figsize)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(111, projection=meta.wcs)
    vals = _finite(data)
    # a long description goes in the (wrapped) title; the colour bar keeps the unit
    label = title if len(title) <= 40 else ""
    unit = u.Unit(unit)
    if unit != u.one:
        label = f"{label} [{unit.to_string()}]".strip()
    if kind == "status":
        codes = list(Status)
        colours = ["#2c7bb6", "#fdae61", "#ffffbf", "#d7d7d7", "#7f7f7f", "#ffffff",
                   "#d7191c", "#000000"][: len(codes)]
        cmap = ListedColormap(colours)
        norm = BoundaryNorm(np.arange(-0.5, len(codes) + 0.5), cmap.N)
        im = ax.imshow(np.where(np.isfinite(data), data, Status.NO_DATA), origin="lower",
                       cmap=cmap, norm=norm, interpolation="nearest")
        cb = fig.colorbar(im, ax=ax, ticks=range(len(codes)))
        cb.ax.set_yticklabels([f"{int(c)} {c.name.lower()}" for c in codes], fontsize=7)
        cb.set_label("status")
    else:
        cmap = matplotlib.colormaps[CMAPS.get(kind, "viridis")].copy()
        cmap.set_bad("#e8e8e8")
        if vals.size == 0:
            vmin, vmax = 0.0, 1.0
        elif kind in ("velocity", "residual"):
            c = 0.0 if kind == "residual" else (float(np.median(vals)) if center is None
                                               else float(center))
            half = float(np.percentile(np.abs(vals - c), 98)) or 1.0
            vmin, vmax = c - half, c + half
        else:
            vmin, vmax = (float(np.percentile(vals, 1)), float(np.percentile(vals, 99.5)))
            if vmax <= vmin:
                vmin, vmax = vmin - 0.5, vmax + 0.5
        im = ax.imshow(data, origin="lower", cmap=cmap, vmin=vmin, vmax=vmax,
                       interpolation="nearest")
        cb = fig.colorbar(im, ax=ax)
        cb.set_label(label)
    _add_beam(ax, meta)
    lon, lat = ax.coords[0], ax.coords[1]
    lon.set_axislabel(_axis_label(meta.wcs, 0))
    lat.set_axislabel(_axis_label(meta.wcs, 1))
    wrapped = textwrap.fill(title, 60)
    ax.set_title(wrapped, fontsize=10 if len(title) > 60 else None)
    key = (tuple(figsize), kind == "status", wrapped.count("\n"), bool(label),
           tuple(meta.wcs.wcs.ctype), np.shape(data), _wcs_key(meta.wcs))
    _layout(fig, cb, key)
    reuse_frame(ax, key)
    return fig


# Layout of the figures drawn so far: key -> (subplot parameters, right edge of the colour
# bar in pixels).  tight_layout has to draw the WCS axes to measure their tick labels,
# which cost as much as drawing the PNG itself; maps of one cube share those labels, so
# the first figure of a kind measures and the others reuse its margins.
_TEMPLATES: dict = {}
_RIGHT_STEP = 0.1  # inches


def _wcs_key(wcs):
    """What the tick labels of a celestial WCS depend on, as a hashable key."""
    w = wcs.wcs
    return (tuple(np.round(w.crval, 9)), tuple(np.round(w.crpix, 6)),
            tuple(np.round(w.get_pc().ravel(), 12)), tuple(np.round(w.get_cdelt(), 12)))


def _layout(fig, cb, key):
    """tight_layout on the first figure of ``key``; the same margins for the next ones.

    Only the colour bar's tick labels differ between maps of one cube, and measuring them
    is cheap (a plain axis): the right margin moves by the difference in their extent, as
    tight_layout would move it.
    """
    renderer = fig.canvas.get_renderer()
    template = _TEMPLATES.get(key)
    if template is None:
        fig.tight_layout()
        right_px = cb.ax.get_tightbbox(renderer).x1
        pars = fig.subplotpars
        _TEMPLATES[key] = ({k: getattr(pars, k) for k in ("left", "right", "bottom", "top",
                                                           "wspace", "hspace")}, right_px)
        return
    pars, right_px = template
    fig.subplots_adjust(**pars)
    shift = (cb.ax.get_tightbbox(renderer).x1 - right_px) / (fig.get_figwidth() * fig.dpi)
    # in whole steps of _RIGHT_STEP inches, rounded towards more room: maps whose colour
    # bar labels differ a little share the axes box, and so the frame picture (_frame.py)
    step = _RIGHT_STEP / fig.get_figwidth()
    shift = np.ceil(shift / step - 1e-6) * step
    if abs(shift) > 1e-4:
        fig.subplots_adjust(right=pars["right"] - shift)


def _axis_label(wcs, i):
    ctype = wcs.wcs.ctype[i].split("-")[0]
    return {"RA": "Right ascension", "DEC": "Declination", "GLON": "Galactic longitude",
            "GLAT": "Galactic latitude"}.get(ctype, ctype)


def save(fig, path, *, dpi=120):
    """Write ``fig`` as a PNG.  zlib level 1 instead of PIL's 6: the same pixels (PNG is
    lossless), a map saved in about 40 % less time, files of about the same size (noisy
    maps compress little either way)."""
    fig.savefig(path, dpi=dpi, pil_kwargs={"compress_level": 1})
