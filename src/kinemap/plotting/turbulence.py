"""Figures of the turbulence statistics: structure function, size-linewidth, gradients.

Takes a :class:`kinemap.turbulence.TurbulenceStatistics` (duck-typed) and draws with the
matplotlib object API on the Agg canvas.
"""
from __future__ import annotations

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

__all__ = ["figures", "plot_structure_function", "plot_size_linewidth", "plot_gradients"]


def _figure(w, h) -> Figure:
    fig = Figure(figsize=(w, h), layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def plot_structure_function(result) -> Figure:
    """SF2 against lag (log-log) with errors, the power-law fit over its range, and the
    two-beam scale below which beam smoothing flattens the curve."""
    s = result.sf
    fig = _figure(6.0, 4.4)
    ax = fig.add_subplot()
    ok = np.isfinite(s["sf2"]) & (s["sf2"] > 0)
    for sel, face, label in ((ok & ~s["beam_smoothed"], "black", "SF$_2$"),
                             (ok & s["beam_smoothed"], "white", "SF$_2$, under two beams")):
        if sel.any():
            ax.errorbar(s["lag"][sel], s["sf2"][sel], yerr=s["sf2_err"][sel], fmt="o", ms=5,
                        mfc=face, mec="black", ecolor="black", capsize=2, lw=1, label=label)
    f = s["fit"]
    if np.isfinite(f["slope"]):
        x = np.geomspace(*s["fit_range"], 50)
        ax.plot(x, f["amplitude"] * x ** f["slope"], color="tab:red",
                label=f"fit: slope {f['slope']:.2f} $\\pm$ {f['slope_err']:.2f}")
    if s["beam"]:
        ax.axvline(s["beam"], color="0.5", ls=":", label="beam FWHM")
        ax.axvline(2 * s["beam"], color="0.5", ls="--", label="two beams")
    _log_axes(ax)
    ax.set_xlabel("lag (arcsec)")
    ax.set_ylabel(r"SF$_2$ (km$^2$ s$^{-2}$), noise bias removed")
    ax.grid(alpha=0.3, which="both")
    ax.legend(frameon=False, fontsize=8)
    return fig


def plot_size_linewidth(result) -> Figure:
    """Aperture dispersions against size with the power-law fit, the centroid part, and
    the sound speed and sonic scale when a width budget was given."""
    lw = result.linewidth
    fig = _figure(6.0, 4.4)
    ax = fig.add_subplot()
    size = lw["size"]
    ax.errorbar(size, lw["sigma"], yerr=lw["sigma_err"], fmt="o", color="black", ms=5,
                capsize=2, label=r"$\sigma$ of the averaged spectrum")
    if np.isfinite(lw["sigma_nt"]).any():
        ax.errorbar(size, lw["sigma_nt"], yerr=lw["sigma_nt_err"], fmt="s", color="tab:blue",
                    ms=4, capsize=2, label=r"$\sigma_{\rm nt}$")
    ax.plot(size, lw["sigma_centroid"], "^", color="tab:green", ms=5,
            label="rms of centroid velocities")
    fits = ((lw["fit"], "tab:red", lw["fitted"]), (lw["fit_centroid"], "tab:green", "centroids"))
    x = size[lw["in_fit"]]
    for f, color, name in fits:
        if np.isfinite(f["slope"]) and x.size:
            ax.plot(x, f["amplitude"] * x ** f["slope"], color=color, lw=1,
                    label=f"{name}: $\\gamma$ = {f['slope']:.2f} $\\pm$ {f['slope_err']:.2f}")
    if result.sonic is not None:
        ax.axhline(result.sonic["sound_speed"], color="tab:orange", ls="--",
                   label=f"c$_s$ ({result.sonic['temperature']:.0f} K)")
        if result.sonic["reached"]:
            ax.axvline(result.sonic["scale"], color="tab:orange", ls=":", label="sonic scale")
    _log_axes(ax)
    ax.set_xlabel("aperture size (arcsec)")
    ax.set_ylabel("dispersion (km s$^{-1}$)")
    ax.grid(alpha=0.3, which="both")
    ax.legend(frameon=False, fontsize=7)
    if result.distance_pc:
        sec = ax.secondary_xaxis("top", functions=(result.pc, lambda p: np.asarray(p) *
                                                   (size[0] / result.pc(size[0]))))
        sec.set_xlabel("size (pc)")
    return fig


def plot_gradients(result, *, arrows: int = 14) -> Figure:
    """The velocity field with local-gradient arrows (towards increasing velocity) and the
    global plane's gradient."""
    v, loc = result.velocity, result.local
    fig = _figure(6.2, 5.4)
    wcs = getattr(getattr(result, "meta", None), "wcs", None)
    ax = fig.add_subplot(projection=wcs)
    im = ax.imshow(v, origin="lower", cmap="RdBu_r", interpolation="nearest")
    fig.colorbar(im, ax=ax, label="velocity [km/s]")
    ny, nx = v.shape
    step = max(1, max(ny, nx) // arrows)
    yy, xx = np.mgrid[step // 2:ny:step, step // 2:nx:step]
    pa = np.radians(loc["position_angle"][yy, xx])
    m = getattr(result, "matrix", None)
    # a unit step east/north in pixels: the inverse of the sky matrix
    minv = np.linalg.inv(m) if m is not None else np.array([[-1.0, 0.0], [0.0, 1.0]])
    dx = minv[0, 0] * np.sin(pa) + minv[0, 1] * np.cos(pa)
    dy = minv[1, 0] * np.sin(pa) + minv[1, 1] * np.cos(pa)
    norm = np.hypot(dx, dy)
    ax.quiver(xx, yy, dx / norm, dy / norm, color="black", scale=arrows * 1.6, width=0.004)
    p = result.plane
    ax.set_title(f"global gradient {result.to_gradient_unit(p['gradient']):.3g} "
                 f"{'km/s/pc' if result.distance_pc else 'km/s/arcsec'} towards PA {p['position_angle']:.0f} deg",
                 fontsize=9)
    if wcs is None:
        ax.set_xlabel("x (pixel)")
        ax.set_ylabel("y (pixel)")
    else:
        from kinemap.plotting.maps import world_axes

        world_axes(ax, wcs)
    return fig


def figures(result) -> dict:
    """``{name: (Figure, description)}`` of the turbulence statistics."""
    return {
        "structure_function_plot": (plot_structure_function(result),
                                    "structure function of the velocity field with its "
                                    "power-law fit"),
        "size_linewidth_plot": (plot_size_linewidth(result),
                                "dispersion of aperture-averaged spectra against size"),
        "velocity_gradients_plot": (plot_gradients(result),
                                    "velocity field with local gradient directions"),
    }


def _log_axes(ax):
    """Log-log axes labelled at 1, 2 and 5 times each decade in plain numbers: matplotlib's
    default minor labels on a span of a decade or two (2x10^1 3x10^1 ...) run together."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    ax.set_xscale("log")
    ax.set_yscale("log")
    for axis in (ax.xaxis, ax.yaxis):
        axis.set_major_locator(LogLocator(subs=(1.0, 2.0, 5.0)))
        axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
        axis.set_minor_formatter(NullFormatter())
