"""Figures of the 3D ring fit: channel maps and PV diagrams with model contours, the
rotation curve (2D against 3D, v_rot against v_circ), dispersion and surface brightness.

Takes the :class:`kinemap.rings.stage3d.RingFit3D` result only (duck-typed) and draws
with matplotlib's object-oriented API (no pyplot state)."""
from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure

__all__ = ["figures"]


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
    fig = Figure(figsize=(3 * cols, 3 * rows))
    lev = _levels(res.model)
    vmax = np.nanpercentile(res.data, 99.9)
    for i, c in enumerate(picks):
        ax = fig.add_subplot(rows, cols, i + 1)
        ax.imshow(res.data[c], origin="lower", cmap="Greys", vmin=-0.2 * vmax, vmax=vmax)
        if lev is not None:
            ax.contour(res.model[c], levels=lev, colors="tab:red", linewidths=0.8)
        ax.set_title(f"{res.velocity[c]:.1f} km/s", fontsize=8)
        ax.set_xticks([])
        ax.set_yticks([])
    fig.suptitle("channel maps: data (grey) and 3D model (red contours)")
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
    fig = Figure(figsize=(10, 4))
    half = max(res.model.shape[1:]) // 2
    lev = _levels(res.model)
    for i, (major, title) in enumerate(((True, "major axis"), (False, "minor axis"))):
        ax = fig.add_subplot(1, 2, i + 1)
        d, s = _pv(res.data, res.geometry, major, half)
        m, _ = _pv(res.model, res.geometry, major, half)
        ext = [s[0], s[-1], res.velocity[0], res.velocity[-1]]
        ax.imshow(d, origin="lower", aspect="auto", extent=ext, cmap="Greys")
        if lev is not None:
            ax.contour(m, levels=lev, colors="tab:red", linewidths=0.8, extent=ext)
        ax.set_xlabel("offset (pixels)")
        ax.set_ylabel("velocity (km/s)")
        ax.set_title(f"PV along the {title}")
    return fig


def rotation_curve(res) -> Figure:
    t = res.table
    fig = Figure(figsize=(11, 4))
    ax = fig.add_subplot(1, 3, 1)
    r = t["radius"].value
    ax.errorbar(r, t["v_rot"].value, t["v_rot_err"].value, fmt="o-", label="v_rot 3D")
    ax.errorbar(r, t["v_circ"].value, t["v_circ_err"].value, fmt="s-", label="v_circ 3D")
    t2 = res.rings_2d.table
    ax.plot(t2["radius"].value, t2["v_rot"].value, "^--", label="v_rot 2D (moment 1)")
    ax.set_xlabel("radius (arcsec)")
    ax.set_ylabel("km/s")
    ax.legend(fontsize=8)
    ax.set_title("rotation curve")
    ax = fig.add_subplot(1, 3, 2)
    ax.errorbar(r, t["dispersion"].value, t["dispersion_err"].value, fmt="o-")
    ax.set_xlabel("radius (arcsec)")
    ax.set_ylabel("dispersion (km/s)")
    ax = fig.add_subplot(1, 3, 3)
    ax.plot(r, t["surface_brightness"], "o-")
    ax.set_xlabel("radius (arcsec)")
    ax.set_ylabel("face-on surface brightness")
    ax.set_yscale("log")
    return fig


def figures(res) -> dict:
    return {"rings3d_channels": (channel_maps(res), "channel maps with 3D model contours"),
            "rings3d_pv": (pv_diagrams(res), "PV diagrams along the major and minor axes"),
            "rings3d_curve": (rotation_curve(res), "rotation curve 2D vs 3D, v_rot and v_circ; "
                                                   "dispersion and surface brightness")}
