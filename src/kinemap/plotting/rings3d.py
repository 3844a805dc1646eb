"""Figures of the 3D ring fit: channel maps and PV diagrams with model contours, the
rotation curve (2D against 3D, v_rot against v_circ), dispersion and surface brightness.

Takes the :class:`kinemap.rings.stage3d.RingFit3D` result only (duck-typed) and draws
with matplotlib's object-oriented API (no pyplot state)."""
from __future__ import annotations

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

__all__ = ["figures"]


def _figure(width, height):
    # constrained layout: the panels' axis labels must not run into their neighbours
    fig = Figure(figsize=(width, height), dpi=120, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _unit(res):
    unit = getattr(res.meta, "bunit", None)
    return "" if unit is None else unit.to_string()


def _pixel_arcsec(res):
    """Pixel size (arcsec) from the cube's celestial WCS (1 when unknown)."""
    from astropy.wcs.utils import proj_plane_pixel_scales

    wcs = getattr(res.meta, "wcs", None)
    if wcs is None:
        return 1.0
    return float(np.sqrt(np.prod(proj_plane_pixel_scales(wcs.celestial)))) * 3600.0


def _levels(model):
    peak = np.nanmax(model)
    return peak * np.array([0.1, 0.3, 0.6, 0.9]) if peak > 0 else None


def channel_maps(res, n: int = 12) -> Figure:
    """A grid of ``n`` channels spanning the emission: data in colour, model contours."""
    flux = np.nansum(res.model, axis=(1, 2))
    live = np.nonzero(flux > 0.01 * flux.max())[0] if flux.max() > 0 else np.arange(res.model.shape[0])
    picks = np.unique(np.linspace(live.min(), live.max(), n).round().astype(int))
    cols = 4
    rows = int(np.ceil(picks.size / cols))
    fig = _figure(2.6 * cols + 1.0, 2.6 * rows + 0.6)
    lev = _levels(res.model)
    vmax = np.nanpercentile(res.data, 99.9)
    im = None
    for i, c in enumerate(picks):
        ax = fig.add_subplot(rows, cols, i + 1)
        im = ax.imshow(res.data[c], origin="lower", cmap="Greys", vmin=-0.2 * vmax, vmax=vmax)
        if lev is not None:
            ax.contour(res.model[c], levels=lev, colors="tab:red", linewidths=0.8)
        ax.set_title(f"{res.velocity[c]:.1f} km/s", fontsize=8)
        ax.set_xticks([])
        ax.set_yticks([])
    if im is not None:
        fig.colorbar(im, ax=fig.axes, shrink=0.8, label=f"data ({_unit(res)})")
    fig.suptitle("channel maps: data (grey) and 3D model (red contours at 10, 30, 60, 90% "
                 "of the model's peak)", fontsize=10)
    return fig


def _pv(cube, geo, along_major, half):
    """Position-velocity slice through the centre (nearest pixel, 1-pixel wide)."""
    ny, nx = cube.shape[1:]
    pa = np.deg2rad(geo["position_angle"] + (0 if along_major else 90))
    s = np.arange(-half, half + 1)
    # pixel steps for a sky direction at PA on a north-up, east-left grid
    x = np.clip(np.round(geo["x_center"] - s * np.sin(pa)).astype(int), 0, nx - 1)
    y = np.clip(np.round(geo["y_center"] + s * np.cos(pa)).astype(int), 0, ny - 1)
    return cube[:, y, x], s


def pv_diagrams(res) -> Figure:
    fig = _figure(10, 4)
    half = max(res.model.shape[1:]) // 2
    pix = _pixel_arcsec(res)
    lev = _levels(res.model)
    for i, (major, title) in enumerate(((True, "major axis"), (False, "minor axis"))):
        ax = fig.add_subplot(1, 2, i + 1)
        d, s = _pv(res.data, res.geometry, major, half)
        m, _ = _pv(res.model, res.geometry, major, half)
        ext = [s[0] * pix, s[-1] * pix, res.velocity[0], res.velocity[-1]]
        im = ax.imshow(d, origin="lower", aspect="auto", extent=ext, cmap="Greys")
        if lev is not None:
            ax.contour(m, levels=lev, colors="tab:red", linewidths=0.8, extent=ext)
        ax.axhline(res.geometry["v_sys"], color="tab:blue", lw=0.6, ls=":")
        fig.colorbar(im, ax=ax, label=f"data ({_unit(res)})")
        ax.set_xlabel("offset from the centre (arcsec; > 0 towards the PA)" if major
                      else "offset from the centre (arcsec; > 0 towards PA + 90)")
        ax.set_ylabel("velocity (km/s)")
        ax.set_title(f"PV along the {title}: data, 3D model (red), v_sys (dotted)", fontsize=9)
    return fig


def rotation_curve(res) -> Figure:
    t = res.table
    fig = _figure(13, 4.2)
    ax = fig.add_subplot(1, 3, 1)
    r = np.asarray(t["radius"].value)
    ax.errorbar(r, t["v_rot"].value, t["v_rot_err"].value, fmt="o-", capsize=2,
                label="v_rot 3D")
    ax.errorbar(r + 0.01 * np.ptp(r), t["v_circ"].value, t["v_circ_err"].value, fmt="s-",
                capsize=2, mfc="none", label="v_circ 3D (pressure support)")
    t2 = res.rings_2d.table
    v2 = np.asarray(t2["v_rot"].value)
    ok2 = np.isfinite(v2)
    ax.plot(np.asarray(t2["radius"].value)[ok2], v2[ok2], "^--", label="v_rot 2D (moment 1)")
    ax.set_xlabel("radius (arcsec)")
    ax.set_ylabel("rotation speed (km/s)")
    ax.set_ylim(bottom=min(0.0, float(np.nanmin(np.r_[t["v_rot"].value, 0.0]))))
    ax.legend(fontsize=8, loc="lower right")
    ax.set_title("rotation curve", fontsize=10)
    ax = fig.add_subplot(1, 3, 2)
    ax.errorbar(r, t["dispersion"].value, t["dispersion_err"].value, fmt="o-", capsize=2)
    ax.set_ylim(bottom=0.0)
    ax.set_xlabel("radius (arcsec)")
    ax.set_ylabel("dispersion (km/s)")
    ax.set_title("velocity dispersion (3D)", fontsize=10)
    ax = fig.add_subplot(1, 3, 3)
    sb = np.asarray(t["surface_brightness"], float)
    pos = sb > 0
    ax.plot(r[pos], sb[pos], "o-")
    if (~pos).any():  # rings the NNLS left empty: marked on the axis, not lost
        ax.plot(r[~pos], np.full((~pos).sum(), sb[pos].min() if pos.any() else 1.0), "v",
                color="tab:gray", label="Sigma = 0")
        ax.legend(fontsize=8)
    ax.set_xlabel("radius (arcsec)")
    ax.set_ylabel(f"face-on surface brightness ({_unit(res)} km/s)")
    ax.set_yscale("log")
    # labels at 1, 2 and 5 per decade only: matplotlib labels every minor tick of a span of
    # one or two decades, and they run into each other
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    ax.yaxis.set_major_locator(LogLocator(subs=(1.0, 2.0, 5.0)))
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    ax.yaxis.set_minor_formatter(NullFormatter())
    ax.set_title("surface brightness (3D)", fontsize=10)
    return fig


def figures(res) -> dict:
    return {"rings3d_channels": (channel_maps(res), "channel maps with 3D model contours"),
            "rings3d_pv": (pv_diagrams(res), "PV diagrams along the major and minor axes"),
            "rings3d_curve": (rotation_curve(res), "rotation curve 2D vs 3D, v_rot and v_circ; "
                                                   "dispersion and surface brightness")}
