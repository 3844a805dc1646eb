"""Channel-map pages: a grid of panels with world axes, one colour scale, contours at
multiples of the noise, the beam and the velocity in each panel.

Takes a ``ChannelMaps`` result (duck-typed: ``images``, ``velocity``, ``velocity_lo``,
``velocity_hi``, ``noise``, ``levels``, ``pages``, ``meta``).  Each page is a PNG; the
writer also binds the pages into one PDF.
"""
from __future__ import annotations

import astropy.units as u
import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.patches import Ellipse

__all__ = ["figures", "page_figure", "COLUMNS"]

COLUMNS = 4
_PANEL_IN = 2.3      # panel width, inches
_LEFT, _RIGHT, _BOTTOM, _TOP = 0.95, 1.25, 0.75, 0.6  # margins, inches


def _scale(result):
    """One colour scale for every panel: from -2 noise to a high percentile of the data."""
    vals = result.images[np.isfinite(result.images)]
    sigma = float(np.nanmedian(result.noise))
    if vals.size == 0:
        return 0.0, 1.0
    top = float(np.percentile(vals, 99.9))
    vmax = max(top, 5 * sigma) if np.isfinite(sigma) else top
    vmin = -2 * sigma if np.isfinite(sigma) else float(np.percentile(vals, 0.5))
    return vmin, (vmax if vmax > vmin else vmin + 1.0)


def _beam(ax, meta, shape):
    beam = meta.beam
    if beam is None:
        return
    pix = meta.pixel_scale_arcsec
    w, h = beam.minor.to_value(u.arcsec) / pix, beam.major.to_value(u.arcsec) / pix
    ny, nx = shape
    pad = max(h, w) / 2 + 0.04 * min(nx, ny)
    ax.add_patch(Ellipse((pad, pad), w, h, angle=beam.pa.to_value(u.deg), facecolor="#f5b041",
                         edgecolor="black", lw=0.8, zorder=5))


def _label_axes(ax, labelled: bool):
    """Ticks on every panel, tick labels and axis names on the bottom-left one only (the
    panels share one grid; labels on every panel would run into their neighbours')."""
    lon, lat = ax.coords[0], ax.coords[1]
    lon.set_ticks(number=3, color="black")
    lat.set_ticks(number=4, color="black")
    lon.set_ticklabel(exclude_overlapping=True, size=7)
    lat.set_ticklabel(exclude_overlapping=True, size=7)
    lon.display_minor_ticks(False)
    lon.set_ticklabel_visible(labelled)
    lat.set_ticklabel_visible(labelled)
    lon.set_axislabel("Right ascension" if labelled else "", size=8)
    lat.set_axislabel("Declination" if labelled else "", size=8)


def page_figure(result, panels, vmin, vmax, page: int, npages: int):
    """The figure of one page (``panels``: indices into the result's images)."""
    meta = result.meta
    ny, nx = result.images.shape[1:]
    n = len(panels)
    ncols = min(COLUMNS, n)
    nrows = -(-n // ncols)
    pw = _PANEL_IN
    ph = pw * ny / nx
    width = _LEFT + ncols * pw + _RIGHT
    height = _BOTTOM + nrows * ph + _TOP
    fig = Figure(figsize=(width, height))
    FigureCanvasAgg(fig)
    cmap = matplotlib.colormaps["Greys"].copy()
    cmap.set_bad("#f3e9d2")
    im = None
    dec = _decimals(result)
    for j, k in enumerate(panels):
        row, col = divmod(j, ncols)
        rect = ((_LEFT + col * pw) / width, (_BOTTOM + (nrows - 1 - row) * ph) / height,
                pw / width, ph / height)
        ax = fig.add_axes(rect, projection=meta.wcs)
        img = result.images[k]
        im = ax.imshow(img, origin="lower", cmap=cmap, vmin=vmin, vmax=vmax,
                       interpolation="nearest")
        sigma = result.noise[k]
        levels = np.asarray(result.levels) * sigma
        if np.isfinite(img).any() and np.isfinite(sigma) and sigma > 0:
            filled = np.where(np.isfinite(img), img, 0.0)
            neg, pos = levels[levels < 0], levels[levels > 0]
            if pos.size and np.nanmax(img) > pos[0]:
                ax.contour(filled, levels=pos, colors="#c0392b", linewidths=0.7)
            if neg.size and np.nanmin(img) < neg[-1]:
                ax.contour(filled, levels=neg, colors="#2e6fd8", linewidths=0.7,
                           linestyles="dashed")
        ax.text(0.04, 0.95, f"{result.velocity[k]:.{dec}f} km/s", transform=ax.transAxes,
                ha="left", va="top", fontsize=8, color="black", zorder=6,
                bbox=dict(boxstyle="round,pad=0.2", facecolor="white", edgecolor="0.6",
                          lw=0.5, alpha=0.9))
        _beam(ax, meta, (ny, nx))
        _label_axes(ax, row == nrows - 1 and col == 0)
    cax = fig.add_axes(((_LEFT + ncols * pw + 0.12) / width, _BOTTOM / height,
                        0.15 / width, nrows * ph / height))
    cb = fig.colorbar(im, cax=cax)
    unit = u.Unit(meta.bunit)
    known = unit != u.one and not getattr(meta, "bunit_missing", False)
    cb.set_label(f"intensity [{unit.to_string()}]" if known else
                 "intensity (no BUNIT in the header)", size=9)
    cb.ax.tick_params(labelsize=8)
    lv = ", ".join(f"{x:g}" for x in result.levels)
    noise = f"{np.nanmedian(result.noise):.3g}" + (f" {unit.to_string()}" if known else "")
    beam = "" if meta.beam is not None else "; no beam in the header (--beam draws one)"
    fig.text(_LEFT / width, 1 - 0.1 / height,
             f"Channel maps, {meta.convention} velocity, {meta.frame or 'frame unknown'}; "
             f"page {page} of {npages}\ncontours at {lv} x the noise of a panel ({noise})"
             f"{beam}", ha="left", va="top", fontsize=9, linespacing=1.4)
    return fig


def _decimals(result) -> int:
    """Decimals that tell neighbouring panels' velocities apart (at least one)."""
    step = np.diff(result.velocity)
    step = float(np.min(np.abs(step))) if step.size else 1.0
    return int(max(1, min(4, np.ceil(-np.log10(step)) + 1))) if step > 0 else 1


def figures(result) -> dict:
    """``{'channel_maps_pN': (Figure, description), ...}`` and ``'channel_maps'``: the list
    of all pages (the writer binds a list into one PDF)."""
    vmin, vmax = _scale(result)
    pages = result.pages
    out, figs = {}, []
    for i, panels in enumerate(pages, 1):
        fig = page_figure(result, list(panels), vmin, vmax, i, len(pages))
        lo, hi = result.velocity[panels[0]], result.velocity[panels[-1]]
        out[f"channel_maps_p{i}"] = (fig, f"channel maps {lo:.1f} to {hi:.1f} km/s "
                                          f"(page {i} of {len(pages)})")
        figs.append(fig)
    out["channel_maps"] = (figs, "all channel-map pages")
    return out
