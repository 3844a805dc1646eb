"""Map PNGs read well: discrete labelled colour bars for integer maps, units on colour bars,
robust limits for error maps, constant maps not drawn, world axes on velocity panels."""
from types import SimpleNamespace

import astropy.units as u
import numpy as np
import pytest
from astropy.wcs import WCS

from conftest import make_header
from kinemap.plotting.maps import plot_map, robust_limits
from kinemap.status import Status


@pytest.fixture(scope="module")
def meta():
    h = make_header("FREQ", ny=40, nx=50)
    return SimpleNamespace(wcs=WCS(h).celestial, beam=None, pixel_scale_arcsec=7.2)


def _colourbar(fig):
    """The colour bar's axes (the one that is not the map)."""
    return next(ax for ax in fig.axes if not ax.images)


def _tick_labels(cax):
    return [t.get_text() for t in cax.get_yticklabels()]


def test_status_map_has_one_labelled_tick_per_code(meta):
    status = np.random.default_rng(0).integers(0, 5, (40, 50))
    fig = plot_map(status, meta, title="fit status code", unit=u.one, kind="status")
    cax = _colourbar(fig)
    np.testing.assert_array_equal(cax.get_yticks(), [int(c) for c in Status])
    # the labels are the table of kinemap/status.py, code and name
    assert _tick_labels(cax) == [f"{int(c)} {c.name.lower()}" for c in Status]


def test_mask_and_count_maps_are_discrete(meta):
    rng = np.random.default_rng(1)
    mask = (rng.random((40, 50)) > 0.5).astype(np.uint8)
    cax = _colourbar(plot_map(mask, meta, title="signal mask", unit=u.one, kind="mask"))
    np.testing.assert_array_equal(cax.get_yticks(), [0, 1])
    assert _tick_labels(cax) == ["0 outside", "1 inside"]
    nchan = rng.integers(3, 12, (40, 50)).astype(float)
    fig = plot_map(nchan, meta, title="number of channels used", unit=u.one, kind="count")
    cax = _colourbar(fig)
    np.testing.assert_array_equal(cax.get_yticks(), np.arange(3, 12))
    assert _tick_labels(cax) == [str(k) for k in range(3, 12)]
    # one colour per whole number: the image's norm has a boundary between each
    norm = next(ax for ax in fig.axes if ax.images).images[0].norm
    np.testing.assert_allclose(norm.boundaries, np.arange(2.5, 12.0))


def test_every_colour_bar_has_its_unit(meta):
    v = np.random.default_rng(2).normal(100, 20, (40, 50))
    fig = plot_map(v, meta, title="intensity-weighted velocity (moment 1)", unit="km/s",
                   kind="velocity")
    assert _colourbar(fig).get_ylabel() == f"[{u.Unit('km/s').to_string()}]"
    ratio = plot_map(v / 100, meta, title="line ratio", unit=u.one, kind="ratio")
    assert _colourbar(ratio).get_ylabel() == "ratio (no unit)"


def test_error_map_limits_ignore_a_few_extreme_edge_pixels(meta):
    rng = np.random.default_rng(3)
    err = rng.normal(1.0, 0.1, (40, 50))
    err[:, 0] = 500.0  # one column of edge pixels, 2 % of the map
    err[0, :] = 300.0
    vmin, vmax = robust_limits(err[np.isfinite(err)], "error")
    # the bulk's scale: median + 10 robust sigma (1.4826 MAD, common practice) is about 2
    assert 1.5 < vmax < 2.5 and 0.6 < vmin < 1.0
    im = next(ax for ax in plot_map(err, meta, title="error", unit="km/s",
                                    kind="error").axes if ax.images).images[0]
    assert im.get_clim() == pytest.approx((vmin, vmax))
    # the old scale (99.5th percentile) would have been set by the edge
    assert np.percentile(err, 99.5) > 100


def test_constant_map_is_not_drawn_but_named(meta):
    fig = plot_map(np.full((40, 50), 10.0), meta, title="kinetic temperature (assumed)",
                   unit="K", kind="temperature")
    assert not any(ax.images for ax in fig.axes)
    text = " ".join(t.get_text() for t in fig.texts)
    assert "kinetic temperature (assumed)" in text and "10 K" in text and "constant" in text


def test_width_maps_leave_out_a_constant_panel_with_a_note():
    from kinemap.plotting.widths import plot_width_maps

    rng = np.random.default_rng(4)
    b = SimpleNamespace(nonthermal_dispersion=rng.normal(1, 0.1, (30, 40)),
                        mach_number=rng.normal(2, 0.1, (30, 40)),
                        temperature=np.full((30, 40), 10.0), temperature_solved=False)
    fig = plot_width_maps(b, wcs=WCS(make_header("FREQ", ny=30, nx=40)))
    assert len([ax for ax in fig.axes if ax.images]) == 2
    assert any("temperature (assumed): 10 K in every pixel" in t.get_text() for t in fig.texts)


def test_velocity_panels_have_world_axes():
    from astropy.visualization.wcsaxes import WCSAxes

    from kinemap.plotting.turbulence import plot_gradients

    wcs = WCS(make_header("FREQ", ny=30, nx=40)).celestial
    res = SimpleNamespace(velocity=np.random.default_rng(5).normal(0, 1, (30, 40)),
                          local={"position_angle": np.full((30, 40), 45.0)},
                          matrix=None, plane={"gradient": 0.1, "position_angle": 45.0},
                          distance_pc=None, to_gradient_unit=lambda g: g,
                          meta=SimpleNamespace(wcs=wcs))
    ax = next(a for a in plot_gradients(res).axes if a.images)
    assert isinstance(ax, WCSAxes)
    assert ax.coords[0].get_axislabel() == "Right ascension"


def test_width_histogram_axis_is_not_stretched_by_a_few_extreme_pixels():
    from kinemap.plotting.widths import plot_width_histograms

    rng = np.random.default_rng(6)
    mach = rng.normal(1.5, 0.3, (30, 40))
    mach[0, :3] = 40.0  # three runaway pixels
    b = SimpleNamespace(nonthermal_dispersion=rng.normal(10, 1, (30, 40)), mach_number=mach)
    ax_m = plot_width_histograms(b).axes[1]
    assert ax_m.get_xlim()[1] < 10
    assert ax_m.get_title() == "3 of 1200 pixels beyond the axis"
