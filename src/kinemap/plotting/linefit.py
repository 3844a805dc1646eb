"""Figures of the line-fit stage: example spectra with their fits and residuals."""
from __future__ import annotations

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from kinemap.parallel.blocks import read_rows  # noqa: E402
from kinemap.status import Status  # noqa: E402

__all__ = ["plot_example_spectra", "example_pixels"]


def example_pixels(fit) -> list[tuple[str, int, int]]:
    """(label, y, x) of the brightest, median and faintest accepted pixel."""
    ok = fit.status == Status.OK
    if not ok.any():
        return []
    tot, _ = fit.integrated_total()
    vals = np.where(ok, tot, np.nan)
    flat = np.flatnonzero(np.isfinite(vals))
    if flat.size == 0:
        return []
    order = flat[np.argsort(vals.ravel()[flat])]
    picks = [("brightest", order[-1]), ("median", order[order.size // 2]), ("faintest", order[0])]
    nx = fit.status.shape[1]
    return [(label, int(i // nx), int(i % nx)) for label, i in picks]


def plot_example_spectra(cube, fit):
    """Three spectra (brightest, median, faintest accepted fit), model over data, residuals."""
    picks = example_pixels(fit)
    if not picks:
        return None
    v = cube.velocity
    fig, axes = plt.subplots(2, len(picks), figsize=(4.2 * len(picks), 4.6), sharex=True,
                             gridspec_kw={"height_ratios": [3, 1]}, squeeze=False)
    unit = cube.meta.bunit.to_string() or "arbitrary"
    for j, (label, y, x) in enumerate(picks):
        spec = read_rows(cube, slice(y, y + 1), dtype=np.float64)[:, 0, x]
        model = fit.model_spectrum(v, y, x)
        top, bottom = axes[0, j], axes[1, j]
        top.step(v, spec, where="mid", color="0.3", lw=0.9, label="data")
        top.plot(v, model, color="C3", lw=1.4, label="fit")
        top.set_title(f"{label}: pixel (x={x}, y={y})\n"
                      f"v = {fit.velocity[0, y, x]:.2f} +- {fit.velocity_error[0, y, x]:.2f}, "
                      f"sigma = {fit.dispersion[0, y, x]:.2f} +- {fit.dispersion_error[0, y, x]:.2f} km/s",
                      fontsize=8.5)
        bottom.step(v, spec - model, where="mid", color="0.3", lw=0.8)
        bottom.axhline(0, color="C3", lw=0.8)
        bottom.set_xlabel("velocity [km/s]")
        if j == 0:
            top.set_ylabel(f"intensity [{unit}]")
            bottom.set_ylabel("residual")
            top.legend(fontsize=8, frameon=False)
    fig.tight_layout()
    return fig
