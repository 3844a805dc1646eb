"""Figures of the per-pixel Gaussian fits: example spectra with their fits and residuals."""
from __future__ import annotations

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

__all__ = ["figures", "plot_example_spectra"]


def figures(fit) -> dict:
    """``{name: (Figure, description)}`` for a :class:`kinemap.LineFitMaps`."""
    fig = plot_example_spectra(fit)
    return {} if fig is None else {
        "example_spectra": (fig, "brightest, median and faintest fitted spectra with their "
                                 "fits and residuals")}


def plot_example_spectra(fit):
    """Three spectra (brightest, median, faintest accepted fit), model over data, residuals.
    Uses the spectra the fit kept (``fit.examples``); None when no spectrum was fitted."""
    picks = fit.examples
    if not picks:
        return None
    fig = Figure(figsize=(4.2 * len(picks), 4.6))
    FigureCanvasAgg(fig)
    axes = fig.subplots(2, len(picks), sharex=True, gridspec_kw={"height_ratios": [3, 1]},
                        squeeze=False)
    unit = fit.meta.bunit.to_string() or "arbitrary"
    for j, ex in enumerate(picks):
        v, spec, model = ex["axis"], ex["data"], ex["model"]
        top, bottom = axes[0, j], axes[1, j]
        top.step(v, spec, where="mid", color="0.3", lw=0.9, label="data")
        top.plot(v, model, color="C3", lw=1.4, label="fit")
        top.set_title(f"{ex['label']}: pixel (x={ex['x']}, y={ex['y']})\n"
                      f"v = {ex['velocity']:.2f} +- {ex['velocity_err']:.2f}, "
                      f"sigma = {ex['dispersion']:.2f} +- {ex['dispersion_err']:.2f} km/s",
                      fontsize=8.5)
        bottom.step(v, np.asarray(spec) - np.asarray(model), where="mid", color="0.3", lw=0.8)
        bottom.axhline(0, color="C3", lw=0.8)
        bottom.set_xlabel("velocity [km/s]")
        if j == 0:
            top.set_ylabel(f"intensity [{unit}]")
            bottom.set_ylabel("residual")
            top.legend(fontsize=8, frameon=False)
    fig.tight_layout()
    return fig
