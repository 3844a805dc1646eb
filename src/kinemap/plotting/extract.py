"""Figures of extracted spectra and position-velocity diagrams.

Takes the result objects only (:class:`kinemap.extract.spectrum.SpectrumResult`,
:class:`kinemap.extract.pv.PVDiagram`, duck-typed) and returns matplotlib Figures.
"""
from __future__ import annotations

import astropy.units as u
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.patches import Ellipse

__all__ = ["figures", "plot_spectrum", "plot_pv"]

_KMS = r"km s$^{-1}$"


def _figure(width, height):
    fig = Figure(figsize=(width, height), dpi=150, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _unit_label(unit) -> str:
    unit = u.Unit(unit)
    return "" if unit == u.one else f" ({unit.to_string('latex_inline')})"


def plot_spectrum(result) -> Figure:
    """The spectrum as steps with its 1-sigma band, the Gaussian fit and the moment window."""
    t = result.table
    v = t["velocity"].to_value(u.km / u.s)
    order = np.argsort(v)
    v = v[order]
    f = np.asarray(t["flux"].value, float)[order]
    e = np.asarray(t["flux_err"].value, float)[order]
    fig = _figure(6.4, 4.2)
    ax = fig.add_subplot()
    ax.fill_between(v, f - e, f + e, step="mid", color="0.8", lw=0, label=r"$\pm1\sigma$")
    ax.step(v, f, where="mid", color="black", lw=1.0, label="spectrum")
    fit, mom = result.fit, result.moments
    if fit["status"] == "ok":
        vv = np.linspace(v[0], v[-1], 800)
        g = fit["amplitude"] * np.exp(-0.5 * ((vv - fit["centre"]) / fit["dispersion"]) ** 2)
        ax.plot(vv, g, color="tab:red", lw=1.3,
                label=(f"Gaussian: {fit['centre']:.4g} {_KMS}, "
                       rf"$\sigma$ = {fit['dispersion']:.3g} {_KMS}"))
    lo, hi = mom["window"]
    if np.isfinite(lo) and fit["status"] == "ok":
        ax.axvspan(lo, hi, color="tab:blue", alpha=0.07, lw=0, label="moment window")
    ax.axhline(0.0, color="0.5", lw=0.6)
    ax.set_xlim(v[0], v[-1])
    ax.set_xlabel(f"Velocity ({result.meta.convention}, {result.meta.frame or 'frame unknown'}; "
                  f"{_KMS})")
    what = "Flux density" if result.mode == "sum" else "Mean brightness"
    ax.set_ylabel(what + _unit_label(t["flux"].unit))
    ax.set_title(_wrap(result.table.meta["aperture"]), fontsize=9)
    ax.legend(fontsize=7, loc="best", framealpha=0.85, edgecolor="none")
    ax.grid(alpha=0.25)
    return fig


def _wrap(text, width=70):
    import textwrap

    return "\n".join(textwrap.wrap(text, width)[:2])


def plot_pv(pv) -> Figure:
    """The diagram (offset across, velocity up), the beam's FWHM along the cut by one
    channel in the lower left, v_sys and the ring model when there is one."""
    off, vel = pv.offset, pv.velocity
    order = np.argsort(vel)
    data = pv.data[order]
    vs = vel[order]
    finite = data[np.isfinite(data)]
    vmax = float(np.percentile(finite, 99.5)) if finite.size else 1.0
    vmin = min(0.0, float(np.percentile(finite, 1))) if finite.size else 0.0
    ds = off[1] - off[0] if off.size > 1 else 1.0
    dv = float(np.median(np.abs(np.diff(vs)))) if vs.size > 1 else 1.0
    fig = _figure(6.4, 4.6)
    ax = fig.add_subplot()
    im = ax.imshow(data, origin="lower", aspect="auto", cmap="Greys",
                   vmin=vmin, vmax=vmax if vmax > vmin else None, interpolation="nearest",
                   extent=(off[0] - ds / 2, off[-1] + ds / 2, vs[0] - dv / 2, vs[-1] + dv / 2))
    fig.colorbar(im, ax=ax, label="Intensity" + _unit_label(pv.unit))
    if pv.model_velocity is not None and np.isfinite(pv.model_velocity).any():
        ax.plot(off, pv.model_velocity, color="tab:red", lw=1.5, label="ring model")
    if pv.v_sys is not None:
        ax.axhline(pv.v_sys, color="tab:blue", ls="--", lw=0.8, label=r"$v_{\rm sys}$")
    if off[0] < 0 < off[-1]:
        ax.axvline(0.0, color="tab:blue", ls=":", lw=0.8)
    for k, at in enumerate(pv.vertices[1:-1]):  # the bends of a polyline
        ax.axvline(at, color="tab:green", ls="-.", lw=0.8, label="vertex" if k == 0 else None)
    if pv.beam_along:
        x0 = off[0] + 0.06 * (off[-1] - off[0]) + pv.beam_along / 2
        y0 = vs[0] + 0.08 * (vs[-1] - vs[0])
        ax.add_patch(Ellipse((x0, y0), pv.beam_along, dv, facecolor="tab:orange",
                             edgecolor="black", lw=0.8, zorder=5))
        ax.annotate("beam", (x0, y0), xytext=(0, 7), textcoords="offset points", ha="center",
                    fontsize=7)
    ax.set_xlabel("Offset along the cut (arcsec)")
    ax.set_ylabel(f"Velocity ({_KMS})")
    ax.set_title(_wrap(pv.description + (f", averaged over {pv.width:g} arcsec" if pv.width
                                         else "")), fontsize=9)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(frameon=False, fontsize=8, loc="upper left")
    return fig


def figures(result) -> dict:
    """``{name: (Figure, description)}`` for a spectrum or a PV diagram."""
    if result.name == "spectrum":
        return {"spectrum": (plot_spectrum(result), "the spectrum with its Gaussian fit")}
    return {"pv": (plot_pv(result), "position-velocity diagram"
                   + (" with the ring model" if result.model_velocity is not None else ""))}
