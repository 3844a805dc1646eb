"""Figures of the width budget (matplotlib Figures on the Agg canvas, nothing written)."""
import io

import astropy.units as u
import numpy as np
import pytest
from astropy.wcs import WCS
from matplotlib.figure import Figure

from kinemap.errors import KinemapError
from kinemap.plotting.widths import (
    plot_dispersion_vs_intensity, plot_width_histograms, plot_width_maps
)
from kinemap.widths import width_budget

KMS = u.km / u.s


@pytest.fixture(scope="module")
def budget():
    rng = np.random.default_rng(42)
    shape = (30, 40)
    sig = {"Halpha": rng.uniform(18, 25, shape) * KMS, "SII_6716": rng.uniform(12, 16, shape) * KMS}
    sig["Halpha"][0, :5] = np.nan * KMS
    err = {k: np.full(shape, 0.3) * KMS for k in sig}
    return width_budget(sig, err, intrinsic=True, mu=0.6)


def _png_bytes(fig):
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return buf.getvalue()


def test_maps(budget):
    fig = plot_width_maps(budget)
    assert isinstance(fig, Figure)
    map_axes = [ax for ax in fig.axes if ax.images]  # the others are colour bars
    assert len(map_axes) == 3
    np.testing.assert_array_equal(np.asarray(map_axes[1].images[0].get_array()), budget.temperature)
    assert "fitted" in map_axes[1].get_title()
    assert _png_bytes(fig)[:8] == b"\x89PNG\r\n\x1a\n"


def test_maps_with_celestial_wcs(budget):
    w = WCS(naxis=2)
    w.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    w.wcs.crval = [150.0, 2.0]
    w.wcs.crpix = [20, 15]
    w.wcs.cdelt = [-1e-4, 1e-4]
    fig = plot_width_maps(budget, wcs=w, keys=("nonthermal_dispersion",))
    from astropy.visualization.wcsaxes import WCSAxes

    assert isinstance(fig.axes[0], WCSAxes)
    _png_bytes(fig)


def test_histograms_mark_medians(budget):
    fig = plot_width_histograms(budget)
    ax_s, ax_m = fig.axes[:2]
    med_s = np.nanmedian(budget.nonthermal_dispersion)
    med_m = np.nanmedian(budget.mach_number)
    xs = [line.get_xdata()[0] for line in ax_s.lines]
    xm = [line.get_xdata()[0] for line in ax_m.lines]
    assert med_s == pytest.approx(xs[0])
    assert med_m == pytest.approx(xm[0]) and 1.0 in xm
    counts = sum(p.get_height() for p in ax_s.patches)
    assert counts == np.isfinite(budget.nonthermal_dispersion).sum()
    _png_bytes(fig)


def test_dispersion_vs_intensity_scatter_and_density(budget):
    inten = np.linspace(0.1, 10, budget.nonthermal_dispersion.size).reshape(budget.nonthermal_dispersion.shape)
    fig = plot_dispersion_vs_intensity(budget, inten * u.K * KMS)
    ax = fig.axes[0]
    offsets = ax.collections[0].get_offsets()
    assert len(offsets) == np.isfinite(budget.nonthermal_dispersion).sum()
    assert ax.get_xscale() == "log" and "K km / s" in ax.get_xlabel()
    fig2 = plot_dispersion_vs_intensity(budget, inten, density=True, log_intensity=False)
    assert type(fig2.axes[0].collections[0]).__name__ == "PolyCollection"  # hexbin
    _png_bytes(fig2)


def test_plot_bad_input(budget):
    with pytest.raises(KinemapError, match=r"'intensity' must have the pixel shape of the budget \(30, 40\), got \(3,\)"):
        plot_dispersion_vs_intensity(budget, np.ones(3))
    with pytest.raises(KinemapError, match=r"'keys' has unknown map\(s\) \['velocity'\]"):
        plot_width_maps(budget, keys=("velocity",))
    with pytest.raises(KinemapError, match=r"'budget' must be a BudgetArrays"):
        plot_width_histograms({"a": 1})
    one_d = width_budget({"Halpha": [20.0, 21.0]}, {"Halpha": [0.1, 0.1]}, intrinsic=True, temperature=1e4 * u.K)
    with pytest.raises(KinemapError, match=r"map 'nonthermal_dispersion' must be 2D"):
        plot_width_maps(one_d, keys=("nonthermal_dispersion",))
