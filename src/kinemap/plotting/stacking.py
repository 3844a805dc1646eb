"""Figures of the stacking stage: the stacked spectrum of every bin with its fit, and the
fitted dispersion against the binned quantity (radius or map value).

Takes a ``StackedSpectra`` result (duck-typed: ``spectra`` and ``fits`` tables).
"""
from __future__ import annotations

import astropy.units as u
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

__all__ = ["figures"]


def _values(col):
    return np.asarray(getattr(col, "value", col), dtype=float)


def _unit_text(col) -> str:
    unit = getattr(col, "unit", None)
    return "" if unit is None or unit == u.one else f" [{u.Unit(unit).to_string()}]"


def _bin_label(fits, b) -> str:
    q = fits.meta.get("quantity", "radius")
    lo, hi = _values(fits[f"{q}_lo"])[b], _values(fits[f"{q}_hi"])[b]
    unit = fits[f"{q}_lo"].unit
    ut = "\"" if unit == u.arcsec else f" {u.Unit(unit).to_string()}" if unit is not None else ""
    return f"{q} {lo:.3g}-{hi:.3g}{ut}"


def _window(v, disp, dv):
    """Velocity range shown: about 8 fitted dispersions (at least 20 channels) each side,
    inside the stacked axis."""
    d = disp[np.isfinite(disp)]
    half = max(8 * float(np.median(d)) if d.size else 0.0, 20 * dv)
    lo, hi = (float(np.min(v)), float(np.max(v))) if v.size else (-half, half)
    return max(lo, -half), min(hi, half)


def _spectra_figure(result):
    spectra, fits = result.spectra, result.fits
    nbin = len(fits)
    ncols = min(4 if nbin <= 16 else 6, nbin)
    nrows = -(-nbin // ncols)
    fig = Figure(figsize=(2.9 * ncols + 0.6, 2.2 * nrows + 0.7))
    FigureCanvasAgg(fig)
    axes = fig.subplots(nrows, ncols, squeeze=False, sharex=True)
    b_all = np.asarray(spectra["bin"])
    v_all, f_all = _values(spectra["velocity"]), _values(spectra["flux"])
    e_all, m_all = _values(spectra["flux_err"]), _values(spectra["model"])
    disp, derr = _values(fits["dispersion"]), _values(fits["dispersion_err"])
    ncomp = np.asarray(fits["n_components"])
    for b in range(nrows * ncols):
        ax = axes.flat[b]
        if b >= nbin:
            ax.set_visible(False)
            continue
        sel = b_all == b
        v, f, e, m = v_all[sel], f_all[sel], e_all[sel], m_all[sel]
        if v.size:
            ax.fill_between(v, f - e, f + e, step="mid", color="0.8", lw=0)
            ax.step(v, f, where="mid", color="k", lw=0.8)
            if np.isfinite(m).any():
                ax.plot(v, m, color="#d62728", lw=1.2)
        if not v.size:
            ax.set_yticks([])
        ax.axhline(0, color="0.5", lw=0.5)
        text = f"{_bin_label(fits, b)}, N = {int(fits['n_spectra'][b])}"
        if np.isfinite(disp[b]):
            text += f"\n$\\sigma$ = {disp[b]:.2f} $\\pm$ {derr[b]:.2f} km/s"
            if ncomp[b] == 2:
                text += " (2 comp.)"
        elif v.size:
            text += "\nno fit (line under 5 errors)" if int(fits["status"][b]) == 3 else "\nno fit"
        else:
            text += "\nno spectra"
        ax.set_title(text, fontsize=7.5, loc="left")
        ax.tick_params(labelsize=7)
        if b % ncols == 0:
            ax.set_ylabel("mean flux" + _unit_text(spectra["flux"]), fontsize=8)
        if b >= nbin - ncols:
            ax.set_xlabel("velocity offset [km/s]", fontsize=8)
            ax.tick_params(labelbottom=True)
    axes.flat[0].set_xlim(*_window(v_all, disp, spectra.meta.get("channel_width_kms", 1.0)))
    fig.suptitle("Stacked spectra (grey: 1-sigma error; red: Gaussian fit)", fontsize=10)
    fig.tight_layout()
    return fig


def _dispersion_figure(result):
    fits = result.fits
    q = fits.meta.get("quantity", "radius")
    x = _values(fits[q])
    lo, hi = _values(fits[f"{q}_lo"]), _values(fits[f"{q}_hi"])
    d, e = _values(fits["dispersion"]), _values(fits["dispersion_err"])
    fig = Figure(figsize=(6.0, 4.2))
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(111)
    ok = np.isfinite(d) & np.isfinite(x)
    ax.errorbar(x[ok], d[ok], yerr=e[ok], xerr=[x[ok] - lo[ok], hi[ok] - x[ok]], fmt="o",
                color="k", ms=4, capsize=2, lw=0.8, label="first component")
    if "dispersion_2" in fits.colnames:
        d2, e2 = _values(fits["dispersion_2"]), _values(fits["dispersion_2_err"])
        ok2 = np.isfinite(d2) & np.isfinite(x)
        if ok2.any():
            ax.errorbar(x[ok2], d2[ok2], yerr=e2[ok2], fmt="s", color="#1f77b4", ms=4,
                        capsize=2, lw=0.8, mfc="none", label="second component")
            ax.legend(fontsize=8, frameon=False)
    label = "deprojected radius" if q == "radius" else "bin value"
    ax.set_xlabel(label + _unit_text(fits[q]))
    ax.set_ylabel("dispersion (Gaussian $\\sigma$) [km/s]")
    ax.set_title("Dispersion of the stacked spectra", fontsize=10)
    if ok.any():
        ax.set_ylim(0, 1.15 * float(np.nanmax(d[ok] + e[ok])))
    fig.tight_layout()
    return fig


def figures(result) -> dict:
    return {"stacked_spectra": (_spectra_figure(result), "stacked spectrum of every bin with "
                                                          "its Gaussian fit"),
            "stack_dispersion": (_dispersion_figure(result), "dispersion of the stacked "
                                                              "spectra per bin")}
