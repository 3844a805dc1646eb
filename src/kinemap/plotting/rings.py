"""Figures of a tilted-ring fit: rotation curve, geometry, velocity fields, PV diagram.

Every function takes a :class:`kinemap.rings.RingFitResult` (plus data where needed) and
returns a matplotlib Figure; nothing is written to disk (the exporter saves figures).
Figures are built with the object-oriented API on the Agg canvas, so they work without a
display and do not touch pyplot's global state.
"""
from __future__ import annotations

import astropy.units as u
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import TwoSlopeNorm
from matplotlib.figure import Figure

from kinemap.units import KMS
from kinemap.status import Status

__all__ = [
    "figures",
    "plot_rotation_curve",
    "plot_ring_geometry",
    "plot_velocity_fields",
    "plot_pv_diagram",
    "plot_harmonics",
]

_VELOCITY_CMAP = "RdBu_r"  # diverging, centred on v_sys: blue approaching, red receding
_PV_CMAP = "Greys"


def _figure(width, height):
    fig = Figure(figsize=(width, height), dpi=150, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _vals(col, unit):
    return u.Quantity(col).to_value(unit)


def _kpc_axis(ax, result):
    """Secondary radius axis in kpc when the fit had a distance."""
    dist = result.settings.get("distance_mpc")
    if not dist:
        return
    k = np.deg2rad(1 / 3600.0) * dist * 1000.0
    sec = ax.secondary_xaxis("top", functions=(lambda r: r * k, lambda r: r / k))
    sec.set_xlabel("Radius (kpc)")


def plot_rotation_curve(result, *, title: str | None = None) -> Figure:
    """Rotation curve with errors and the approaching/receding halves.

    Beam-smeared rings are drawn with open symbols; rings whose status is not OK are
    left out (they are NaN).
    """
    t = result.table
    r = _vals(t["radius"], u.arcsec)
    v = _vals(t["v_rot"], KMS)
    e = _vals(t["v_rot_err"], KMS)
    smeared = np.asarray(t["beam_smeared"], bool)
    fig = _figure(6.4, 4.2)
    ax = fig.add_subplot()
    # the halves are nudged sideways so they stay visible next to the combined value
    nudge = 0.18 * result.ring_width.to_value(u.arcsec)
    ax.plot(r - nudge, _vals(t["v_rot_approaching"], KMS), ls="none", marker="v", ms=4, color="tab:blue",
            label="approaching half")
    ax.plot(r + nudge, _vals(t["v_rot_receding"], KMS), ls="none", marker="^", ms=4, color="tab:red",
            label="receding half")
    for sel, face, lab in ((~smeared, "black", "both halves"), (smeared, "white", "both halves, beam-smeared")):
        if sel.any():
            ax.errorbar(r[sel], v[sel], yerr=e[sel], fmt="o", ms=5, mfc=face, mec="black", ecolor="black",
                        capsize=2, lw=1, label=lab, zorder=3)
    ax.set_xlabel("Radius (arcsec)")
    ax.set_ylabel(r"$v_{\rm rot}$ (km s$^{-1}$)")
    ax.set_xlim(0, r.max() + result.ring_width.to_value(u.arcsec))
    finite = np.isfinite(v)
    top = np.nanmax(np.concatenate([v[finite] + e[finite], [0.0]])) if finite.any() else 1.0
    ax.set_ylim(0, 1.1 * top if top > 0 else 1.0)
    ax.grid(alpha=0.3)
    ax.legend(frameon=False, fontsize=8, loc="lower right")
    _kpc_axis(ax, result)
    if title:
        ax.set_title(title)
    return fig


def plot_ring_geometry(result, *, title: str | None = None) -> Figure:
    """Position angle, inclination, systemic velocity and centre against radius.

    Stage-2 ring-by-ring values with errors (grey points, only for the parameters fitted
    per ring), the final geometry (line) and the stage-1 global value (dashed).
    """
    final = result.table
    rings = result.stages.get("rings")
    gg = result.global_geometry
    r = _vals(final["radius"], u.arcsec)
    panels = (
        ("position_angle", u.deg, "Position angle (deg)", "position angle", "deg"),
        ("inclination", u.deg, "Inclination (deg)", "inclination", "deg"),
        ("v_sys", KMS, r"$v_{\rm sys}$ (km s$^{-1}$)", "v_sys", "km/s"),
        ("x_center", u.pix, "Centre x (pix)", "centre x", "pix"),
        ("y_center", u.pix, "Centre y (pix)", "centre y", "pix"),
    )
    drawn, notes = [], []
    for name, unit, label, short, unit_text in panels:
        ref = gg[name].to_value(unit)
        fv = _vals(final[name], unit)
        if name == "position_angle":
            fv = ref + (fv - ref + 180) % 360 - 180
        per_ring = rings is not None and name in result.settings.get("ring_free", ())
        finite = fv[np.isfinite(fv)]
        if not per_ring and finite.size and np.ptp(finite) <= 1e-9 * max(1.0, abs(ref)):
            # one value in every ring: a flat line says less than the number
            notes.append(f"{short} {finite[0]:.6g} {unit_text}")
            continue
        drawn.append((name, unit, label, ref, fv, per_ring))
    fig = _figure(6.4, 1.1 + 1.7 * max(1, len(drawn)))
    axes = np.atleast_1d(fig.subplots(max(1, len(drawn)), 1, sharex=True))
    for ax, (name, unit, label, ref, fv, per_ring) in zip(axes, drawn):
        if per_ring:
            rv = _vals(rings[name], unit)
            if name == "position_angle":
                rv = ref + (rv - ref + 180) % 360 - 180
            ax.errorbar(r, rv, yerr=_vals(rings[name + "_err"], unit), fmt="o", ms=3, color="0.55",
                        capsize=1.5, lw=0.8, label="ring by ring")
        ax.plot(r, fv, "-", color="black", lw=1.4, label="final")
        ax.axhline(ref, color="tab:red", ls="--", lw=1, label="global")
        ax.set_ylabel(label, fontsize=9)
        ax.grid(alpha=0.3)
    axes[0].legend(frameon=False, fontsize=7, ncol=3, loc="best")
    axes[-1].set_xlabel("Radius (arcsec)")
    if notes:
        fig.supxlabel("the same in every ring (panels not drawn): " + ", ".join(notes),
                      fontsize=8, color="0.3")
    if title:
        fig.suptitle(title)
    return fig


def _draw_rings(ax, result, every: int):
    t = result.table
    ok = np.asarray(t["status"]) == Status.OK
    rows = np.nonzero(ok)[0][::max(1, every)]
    for k in rows:
        x, y = result.grid.ring_ellipse(t["x_center"][k], t["y_center"][k], _vals(t["position_angle"], u.deg)[k],
                            _vals(t["inclination"], u.deg)[k], _vals(t["radius"], u.arcsec)[k])
        ax.plot(x, y, color="black", lw=0.5, alpha=0.6)
    # receding half of the major axis of the outermost drawn ring
    if rows.size:
        k = rows[-1]
        pa = np.deg2rad(_vals(t["position_angle"], u.deg)[k])
        rad = _vals(t["radius"], u.arcsec)[k]
        dx, dy = result.grid.pixel_offsets(rad * np.sin(pa), rad * np.cos(pa))
        x0, y0 = t["x_center"][k], t["y_center"][k]
        ax.plot([x0 - dx, x0 + dx], [y0 - dy, y0 + dy], color="black", lw=0.8, ls=":")
        ax.plot([x0 + dx], [y0 + dy], marker="o", ms=3, color="tab:red")


def plot_velocity_fields(result, *, rings_every: int = 1, title: str | None = None,
                         wcs=None) -> Figure:
    """Observed, model and residual velocity fields side by side, with ring ellipses.

    The velocity panels share a diverging colour map centred on the global v_sys with
    limits symmetric about it; the residual panel is centred on zero.  A red dot marks
    the receding end of the major axis.  With the maps' celestial ``wcs`` the axes are
    in world coordinates (pixel axes otherwise).
    """
    vel = result.velocity.to_value(KMS)
    model = result.model.to_value(KMS)
    resid = result.residual.to_value(KMS)
    vsys = result.global_geometry["v_sys"].to_value(KMS)
    dev = np.abs(np.concatenate([vel[np.isfinite(vel)], model[np.isfinite(model)]]) - vsys)
    half = float(np.percentile(dev, 99.5)) if dev.size else 1.0
    half = half if half > 0 else 1.0
    rfin = resid[np.isfinite(resid)]
    rlim = float(np.percentile(np.abs(rfin), 99)) if rfin.size else 1.0
    rlim = rlim if rlim > 0 else 1.0
    fig = _figure(13.0, 4.4)
    if wcs is None:
        axes = fig.subplots(1, 3, sharex=True, sharey=True)
    else:
        axes = [fig.add_subplot(1, 3, i + 1, projection=wcs) for i in range(3)]
    norm = TwoSlopeNorm(vcenter=vsys, vmin=vsys - half, vmax=vsys + half)
    for ax, img, lab in ((axes[0], vel, "Observed"), (axes[1], model, "Model")):
        im = ax.imshow(img, origin="lower", cmap=_VELOCITY_CMAP, norm=norm, interpolation="nearest")
        ax.set_title(lab)
        _draw_rings(ax, result, rings_every)
    fig.colorbar(im, ax=axes[:2], shrink=0.85, label=r"$v_{\rm los}$ (km s$^{-1}$)")
    im = axes[2].imshow(resid, origin="lower", cmap=_VELOCITY_CMAP, norm=TwoSlopeNorm(0.0, -rlim, rlim),
                        interpolation="nearest")
    axes[2].set_title("Observed - model")
    _draw_rings(axes[2], result, rings_every)
    fig.colorbar(im, ax=axes[2], shrink=0.85, label=r"residual (km s$^{-1}$)")
    ny, nx = vel.shape
    for i, ax in enumerate(axes):
        ax.set_xlim(-0.5, nx - 0.5)
        ax.set_ylim(-0.5, ny - 0.5)
        if wcs is None:
            ax.set_xlabel("x (pix)")
        else:
            from kinemap.plotting.maps import world_axes

            world_axes(ax, wcs, ticks=3, ylabel=i == 0)
            if i:
                ax.coords[1].set_ticklabel_visible(False)
    if wcs is None:
        axes[0].set_ylabel("y (pix)")
    if title:
        fig.suptitle(title)
    return fig


def plot_pv_diagram(pv, result, *, title: str | None = None) -> Figure:
    """Position-velocity diagram along the global major axis with the projected model.

    Parameters
    ----------
    pv : kinemap.rings.PositionVelocitySlice
        The slice (from :func:`kinemap.rings.major_axis_pv`).
    result : RingFitResult
        The ring fit (its global v_sys is marked).
    """
    off = pv.offset.to_value(u.arcsec)
    vax = pv.velocity.to_value(KMS)
    fig = _figure(6.4, 4.6)
    ax = fig.add_subplot()
    order = np.argsort(vax)
    data = pv.data[order]
    finite = data[np.isfinite(data)]
    vmax = float(np.percentile(finite, 99.5)) if finite.size else 1.0
    dv = np.median(np.abs(np.diff(vax))) if vax.size > 1 else 1.0
    ds = off[1] - off[0] if off.size > 1 else 1.0
    im = ax.imshow(data, origin="lower", aspect="auto", cmap=_PV_CMAP, vmin=0, vmax=vmax if vmax > 0 else None,
                   extent=(off[0] - ds / 2, off[-1] + ds / 2, vax[order][0] - dv / 2, vax[order][-1] + dv / 2),
                   interpolation="nearest")
    ax.plot(off, pv.model_velocity.to_value(KMS), color="tab:red", lw=1.5, label="ring model")
    ax.axhline(result.global_geometry["v_sys"].to_value(KMS), color="tab:blue", ls="--", lw=0.8,
               label=r"$v_{\rm sys}$")
    ax.axvline(0.0, color="tab:blue", ls=":", lw=0.8)
    unit = "" if pv.unit == u.dimensionless_unscaled else f" ({pv.unit.to_string('latex_inline')})"
    fig.colorbar(im, ax=ax, label="Intensity" + unit)
    ax.set_xlabel(f"Offset along PA = {pv.position_angle.to_value(u.deg):.1f} deg (arcsec, + receding)")
    ax.set_ylabel(r"$v_{\rm los}$ (km s$^{-1}$)")
    ax.legend(frameon=False, fontsize=8, loc="upper left")
    if title:
        ax.set_title(title)
    return fig


def plot_harmonics(result, *, title: str | None = None) -> Figure:
    """Harmonic coefficients per ring: c1 (top) and the non-circular terms (bottom)."""
    h = result.harmonics
    r = _vals(h["radius"], u.arcsec)
    fig = _figure(6.4, 5.6)
    top, bottom = fig.subplots(2, 1, sharex=True, height_ratios=(1, 1.3))
    top.errorbar(r, _vals(h["c1"], KMS), yerr=_vals(h["c1_err"], KMS), fmt="o", ms=3, color="black", capsize=1.5)
    top.set_ylabel(r"$c_1$ (km s$^{-1}$)")
    markers = {"s1": "o", "c2": "s", "s2": "D", "c3": "^", "s3": "v"}
    for name, m in markers.items():
        bottom.errorbar(r, _vals(h[name], KMS), yerr=_vals(h[name + "_err"], KMS), fmt=m, ms=3, capsize=1.5,
                        lw=0.8, label=f"${name[0]}_{name[1]}$")
    bottom.axhline(0, color="0.5", lw=0.8)
    bottom.set_ylabel(r"coefficient (km s$^{-1}$)")
    bottom.set_xlabel("Radius (arcsec)")
    bottom.legend(frameon=False, fontsize=8, ncol=5)
    for ax in (top, bottom):
        ax.grid(alpha=0.3)
    if title:
        fig.suptitle(title)
    return fig


def figures(rings) -> dict:
    """``{name: (Figure, description)}`` for a :class:`kinemap.RingFit`."""
    r = rings.result
    figs = {
        "rotation_curve": (plot_rotation_curve(r),
                           "rotation curve with approaching and receding halves"),
        "ring_geometry": (plot_ring_geometry(r), "ring geometry against radius"),
        "velocity_fields": (plot_velocity_fields(r, wcs=getattr(rings.meta, "wcs", None)),
                            "velocity field, ring model and residual"),
        "harmonics": (plot_harmonics(r), "harmonic terms per ring"),
    }
    if rings.pv is not None:
        figs["pv_major_axis"] = (plot_pv_diagram(rings.pv, r),
                                 "position-velocity diagram along the major axis with the model")
    return figs
