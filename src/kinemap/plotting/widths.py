"""Figures of the line-width budget: maps, histograms, width against intensity.

Every function returns a :class:`matplotlib.figure.Figure` drawn on the Agg canvas
(no pyplot state, no windows, no files); the exporter decides where to save it.
NaN pixels are left blank in maps and skipped in histograms and scatter plots.
"""
from __future__ import annotations

import astropy.units as u
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import NullFormatter

from kinemap.errors import KinemapError

__all__ = ["figures", "plot_width_maps", "plot_width_histograms", "plot_dispersion_vs_intensity"]

_LABELS = {
    "nonthermal_dispersion": (r"$\sigma_{\rm nt}$", "km/s"),
    "nonthermal_dispersion_err": (r"error of $\sigma_{\rm nt}$", "km/s"),
    "thermal_dispersion": (r"$\sigma_{\rm th}$", "km/s"),
    "temperature": ("temperature", "K"),
    "temperature_err": ("temperature error", "K"),
    "sound_speed": (r"$c_{\rm s}$", "km/s"),
    "mach_number": (r"Mach number $\sqrt{3}\,\sigma_{\rm nt}/c_{\rm s}$", ""),
}


def _new_figure(figsize) -> Figure:
    fig = Figure(figsize=figsize, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _check_budget(budget) -> None:
    if not all(hasattr(budget, k) for k in ("nonthermal_dispersion", "mach_number")):
        raise KinemapError(
            f"'budget' must be a BudgetArrays from kinemap.widths.width_budget, got {type(budget).__name__}"
        )


def _label(key: str) -> str:
    name, unit = _LABELS[key]
    return f"{name} [{unit}]" if unit else name


def plot_width_maps(
    budget,
    *,
    wcs=None,
    keys: tuple[str, ...] = ("nonthermal_dispersion", "temperature", "mach_number"),
    cmap: str = "viridis",
) -> Figure:
    """Side-by-side maps of budget products (default: sigma_nt, temperature, Mach number).

    Parameters
    ----------
    budget : BudgetArrays
        Result of :func:`kinemap.widths.width_budget` with 2D (y, x) maps.
    wcs : astropy.wcs.WCS, optional
        Celestial WCS of the maps; axes are then labelled in world coordinates.
    keys : tuple of str, optional
        Which maps to draw: attribute names listed in :meth:`BudgetArrays.products`
        (value maps only, e.g. 'sound_speed', 'thermal_dispersion').
    cmap : str, optional
        Matplotlib colour map.
    """
    _check_budget(budget)
    if not keys:
        raise KinemapError("'keys' must name at least one map, e.g. ('nonthermal_dispersion',)")
    bad = [k for k in keys if k not in _LABELS]
    if bad:
        raise KinemapError(f"'keys' has unknown map(s) {bad}; choose from {sorted(_LABELS)}")
    maps = []
    for k in keys:
        arr = getattr(budget, k)
        if arr is None:
            raise KinemapError(f"map '{k}' is not in this budget (the temperature was assumed without error)")
        if arr.ndim != 2:
            raise KinemapError(f"map '{k}' must be 2D (y, x) to draw, got shape {arr.shape}")
        maps.append(arr)
    from kinemap.plotting.maps import robust_limits, world_axes

    # a map with one value everywhere (an assumed temperature) says so in a note instead
    drawn, notes = [], []
    for k, arr in zip(keys, maps):
        finite = arr[np.isfinite(arr)]
        if finite.size > 1 and finite.min() == finite.max():
            name, unit = _LABELS[k]
            notes.append(f"{_title(k, budget)}: {finite[0]:.4g} {unit} in every pixel "
                         "(constant, not drawn)".replace("  ", " "))
        else:
            drawn.append((k, arr))
    if not drawn:
        drawn, notes = list(zip(keys, maps))[:1], []
    fig = _new_figure((4.2 * len(drawn), 4.0 + 0.25 * len(notes)))
    projection = wcs.celestial if wcs is not None else None
    for i, (k, arr) in enumerate(drawn):
        ax = fig.add_subplot(1, len(drawn), i + 1, projection=projection)
        finite = arr[np.isfinite(arr)]
        # 2-98 percentile stretch so a few outliers do not wash out the map; errors robust
        if k.endswith("_err"):
            vmin, vmax = robust_limits(finite, "error")
        else:
            vmin, vmax = (np.percentile(finite, [2, 98]) if finite.size else (None, None))
        im = ax.imshow(arr, origin="lower", cmap=cmap, vmin=vmin, vmax=vmax, interpolation="nearest")
        unit = _LABELS[k][1]
        fig.colorbar(im, ax=ax, shrink=0.8, label=f"[{unit}]" if unit else "no unit")
        ax.set_title(_title(k, budget))
        if projection is None:
            ax.set_xlabel("x [pixel]")
            ax.set_ylabel("y [pixel]")
        else:
            world_axes(ax, projection, ticks=3, ylabel=i == 0)
    if notes:
        fig.text(0.5, 0.01, "\n".join(notes), fontsize=9, color="0.3", ha="center",
                 va="bottom")
        fig.get_layout_engine().set(rect=(0, 0.06 * len(notes), 1, 1 - 0.06 * len(notes)))
    return fig


def _title(key: str, budget) -> str:
    title = _LABELS[key][0]
    if key == "temperature":
        title += " (fitted)" if budget.temperature_solved else " (assumed)"
    return title


def plot_width_histograms(budget, *, bins="auto") -> Figure:
    """Histograms of sigma_nt and of the Mach number, medians marked by dashed lines.

    Mach number 1 (transonic) is marked by a dotted line for reference.
    """
    _check_budget(budget)
    fig = _new_figure((9.0, 3.6))
    for i, key in enumerate(("nonthermal_dispersion", "mach_number")):
        ax = fig.add_subplot(1, 2, i + 1)
        vals = np.asarray(getattr(budget, key), dtype=float).ravel()
        vals = vals[np.isfinite(vals)]
        ax.set_xlabel(_label(key))
        ax.set_ylabel("pixels")
        if vals.size == 0:
            ax.text(0.5, 0.5, "no valid pixels", transform=ax.transAxes, ha="center", va="center")
            continue
        med = float(np.median(vals))
        # a few runaway pixels (further from the central 99 % than its own width) would
        # squeeze the rest into a few bins: they are left off the axis and counted
        lo, hi = np.percentile(vals, [0.5, 99.5])
        inside = vals[(vals >= lo - (hi - lo)) & (vals <= hi + (hi - lo))]
        ax.hist(inside if inside.size > 1 else vals, bins=bins, color="0.6", edgecolor="0.3")
        if vals.size - inside.size and inside.size > 1:
            ax.set_title(f"{vals.size - inside.size} of {vals.size} pixels beyond the axis",
                         fontsize=8, color="0.3")
        ax.axvline(med, color="C3", ls="--", label=f"median {med:.3g}")
        if key == "mach_number":
            ax.axvline(1.0, color="k", ls=":", label="Mach 1")
        ax.legend(loc="upper right", fontsize="small")
    return fig


def plot_dispersion_vs_intensity(
    budget,
    intensity,
    *,
    log_intensity: bool = True,
    density: bool | None = None,
    gridsize: int = 50,
) -> Figure:
    """sigma_nt against intensity per pixel: scatter, or a density (hexbin) plot for many pixels.

    Parameters
    ----------
    budget : BudgetArrays
    intensity : array or Quantity
        Intensity map (e.g. moment 0) with the pixel shape of the budget.
    log_intensity : bool, optional
        Logarithmic intensity axis (pixels with intensity <= 0 are then left out).
    density : bool, optional
        True: hexbin density; False: scatter; None (default): density above 5000 pixels.
    gridsize : int, optional
        Hexagons across the x axis for the density plot.
    """
    _check_budget(budget)
    unit = ""
    if isinstance(intensity, u.Quantity):
        unit = intensity.unit.to_string()
        intensity = intensity.value
    inten = np.asarray(intensity, dtype=float)
    snt = budget.nonthermal_dispersion
    if inten.shape != snt.shape:
        raise KinemapError(
            f"'intensity' must have the pixel shape of the budget {snt.shape}, got {inten.shape}"
        )
    keep = np.isfinite(inten) & np.isfinite(snt)
    if log_intensity:
        keep &= inten > 0
    xv, yv = inten[keep], snt[keep]
    fig = _new_figure((5.0, 4.0))
    ax = fig.add_subplot(1, 1, 1)
    ax.set_xlabel(f"intensity [{unit}]" if unit else "intensity")
    ax.set_ylabel(_label("nonthermal_dispersion"))
    if xv.size == 0:
        ax.text(0.5, 0.5, "no valid pixels", transform=ax.transAxes, ha="center", va="center")
        return fig
    if density is None:
        density = xv.size > 5000
    if density:
        hb = ax.hexbin(xv, yv, gridsize=gridsize, bins="log", mincnt=1, cmap="Greys",
                       xscale="log" if log_intensity else "linear")
        fig.colorbar(hb, ax=ax, label="pixels")
    else:
        ax.scatter(xv, yv, s=4, alpha=0.6, color="C0", edgecolors="none")
        if log_intensity:
            ax.set_xscale("log")
    if log_intensity:
        # labelled minor ticks crowd a log axis spanning less than a few decades
        ax.xaxis.set_minor_formatter(NullFormatter())
    return fig


def figures(widths) -> dict:
    """``{name: (Figure, description)}`` for a :class:`kinemap.WidthBudget`."""
    b = widths.budget
    figs = {"width_maps": (plot_width_maps(b, wcs=widths.meta.wcs),
                           "non-thermal dispersion, temperature and Mach number maps"),
            "width_histograms": (plot_width_histograms(b),
                                 "distributions of the non-thermal dispersion and Mach number")}
    if widths.intensity is not None:
        figs["width_vs_intensity"] = (plot_dispersion_vs_intensity(b, widths.intensity),
                                      "non-thermal dispersion against integrated intensity")
    return figs
