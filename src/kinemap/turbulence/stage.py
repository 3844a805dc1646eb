"""The turbulence stage: structure function, size-linewidth, sonic scale and gradients of
the velocity field of a cube (Gaussian fits or moment 1), as one frozen result.

Units: lags and sizes in arcsec (and pc with a distance), velocities in km/s, the
structure function in km^2/s^2, gradients in km/s/pc with a distance (km/s/arcsec
without), position angles in degrees east of north towards increasing velocity.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import ClassVar

import astropy.units as u
import numpy as np
from astropy.table import QTable

from kinemap.errors import KinemapError
from kinemap.io.products import Product
from kinemap.io.results import StageResult
from kinemap.status import Status
from kinemap.turbulence.gradients import local_gradients, plane_fit, sky_matrix
from kinemap.turbulence.linewidth import ARCSEC_PER_RADIAN, size_linewidth_arrays, sonic_scale
from kinemap.turbulence.structure import fit_power_law, lag_bins, structure_function_arrays
from kinemap.units import KMS, to_value

__all__ = ["TurbulenceStatistics", "turbulence_statistics"]

# Beam smoothing flattens the structure function at lags below about two beams (common
# practice); those rows are flagged and left out of the default fit range.
BEAM_FLAG_BEAMS = 2.0


@dataclass(frozen=True)
class TurbulenceStatistics(StageResult):
    """Turbulence statistics of a velocity field.

    Products (attributes): ``structure_function`` and ``size_linewidth`` (QTables, fits in
    their ``meta``), ``velocity_gradient``, ``velocity_gradient_err`` (km/s/pc with a
    distance, else km/s/arcsec), ``velocity_gradient_pa``, ``velocity_gradient_pa_err``
    (deg east of north).

    Attributes
    ----------
    sf : dict
        :func:`kinemap.turbulence.structure_function_arrays` output with ``lag`` in arcsec
        and the power-law fit under ``fit``.
    linewidth : dict
        :func:`kinemap.turbulence.size_linewidth_arrays` output with its fits.
    plane : dict
        :func:`kinemap.turbulence.plane_fit` of the whole field (km/s/arcsec).
    local : dict
        :func:`kinemap.turbulence.local_gradients` maps (km/s/arcsec).
    velocity : ndarray
        The velocity field analysed (km/s), kept for the plots.
    sonic : dict or None
        Sonic scale (``scale``, ``scale_err`` in arcsec, ``reached``) and the sound speed.
    """

    name: ClassVar[str] = "turbulence"

    sf: dict
    linewidth: dict
    plane: dict
    local: dict
    velocity: np.ndarray
    meta: object = None
    sonic: dict | None = None
    distance_pc: float | None = None
    matrix: np.ndarray | None = None  # arcsec east/north per pixel step (for the plots)
    seconds: float = 0.0
    settings: dict = field(default_factory=dict)

    @property
    def gradient_unit(self):
        return KMS / u.pc if self.distance_pc else KMS / u.arcsec

    def to_gradient_unit(self, value):
        """km/s/arcsec -> km/s/pc with a distance (unchanged without one)."""
        if not self.distance_pc:
            return value
        return np.asarray(value) * ARCSEC_PER_RADIAN / self.distance_pc

    def pc(self, arcsec):
        """Angular sizes (arcsec) as lengths (pc) at the distance."""
        return np.asarray(arcsec) / ARCSEC_PER_RADIAN * self.distance_pc

    def sf_table(self) -> QTable:
        s = self.sf
        t = QTable()
        t["lag"] = s["lag"] * u.arcsec
        if self.distance_pc:
            t["lag_pc"] = self.pc(s["lag"]) * u.pc
        t["sf2"] = s["sf2"] * KMS ** 2
        t["sf2_err"] = s["sf2_err"] * KMS ** 2
        t["npairs"] = s["npairs"]
        t["noise_bias"] = s["bias"] * KMS ** 2
        t["beam_smoothed"] = s["beam_smoothed"]
        t["in_fit"] = s["in_fit"]
        f = s["fit"]
        t.meta.update({"slope": f["slope"], "slope_err": f["slope_err"],
                       "fit_range_arcsec": list(map(float, s["fit_range"])),
                       "fit_points": f["npoints"], "amplitude_km2_s2_at_1arcsec": f["amplitude"],
                       "beam_fwhm_arcsec": s["beam"], "weighting": self.settings["weighting"],
                       "errors": f"delete-one-block jackknife, {self.settings['jackknife_blocks']}"
                                 f"^2 blocks",
                       "lag_unit": "arcsec", "sf2_unit": "km2 / s2"})
        return t

    def linewidth_table(self) -> QTable:
        s = self.linewidth
        t = QTable()
        t["size"] = s["size"] * u.arcsec
        if self.distance_pc:
            t["size_pc"] = self.pc(s["size"]) * u.pc
        for k in ("sigma", "sigma_err", "sigma_nt", "sigma_nt_err", "sigma_centroid"):
            t[k] = s[k] * KMS
        t["napertures"] = s["napertures"]
        t["in_fit"] = s["in_fit"]
        t.meta.update({k: v for k, v in self.summary().items()
                       if k.startswith(("size_linewidth", "sonic", "sound", "temperature"))})
        t.meta["size_unit"] = "pc" if self.distance_pc else "arcsec"
        return t

    def products(self) -> list[Product]:
        gu = self.gradient_unit
        loc = self.local
        return [
            Product("structure_function", self.sf_table(), u.one,
                    "second-order structure function of the velocity field (noise bias "
                    "removed)", "table"),
            Product("size_linewidth", self.linewidth_table(), u.one,
                    "dispersion of spectra averaged over apertures of growing size", "table"),
            Product("velocity_gradient", self.to_gradient_unit(loc["gradient"]), gu,
                    f"local velocity gradient (plane fit in a "
                    f"{self.settings['gradient_window_arcsec']:.0f} arcsec window)", "other"),
            Product("velocity_gradient_err", self.to_gradient_unit(loc["gradient_err"]), gu,
                    "1-sigma error of the local velocity gradient", "error", plot=False),
            Product("velocity_gradient_pa", loc["position_angle"], u.deg,
                    "direction of the local gradient (deg east of north, increasing velocity)",
                    "other"),
            Product("velocity_gradient_pa_err", loc["position_angle_err"], u.deg,
                    "1-sigma error of the local gradient direction", "error", plot=False),
        ]

    def summary(self) -> dict:
        p, f, lw = self.plane, self.sf["fit"], self.linewidth
        unit = "kms_per_pc" if self.distance_pc else "kms_per_arcsec"
        out = {
            "velocity_field": self.settings["velocity_field"],
            "structure_function_slope": _num(f["slope"]),
            "structure_function_slope_err": _num(f["slope_err"]),
            "structure_function_fit_range_arcsec": list(map(float, self.sf["fit_range"])),
            "size_linewidth_slope": _num(lw["fit"]["slope"]),
            "size_linewidth_slope_err": _num(lw["fit"]["slope_err"]),
            "size_linewidth_fitted": lw["fitted"],
            "size_linewidth_centroid_slope": _num(lw["fit_centroid"]["slope"]),
            "size_linewidth_centroid_slope_err": _num(lw["fit_centroid"]["slope_err"]),
            f"gradient_{unit}": _num(self.to_gradient_unit(p["gradient"])),
            f"gradient_err_{unit}": _num(self.to_gradient_unit(p["gradient_err"])),
            "gradient_position_angle_deg": _num(p["position_angle"]),
            "gradient_position_angle_err_deg": _num(p["position_angle_err"]),
            "gradient_v0_kms": _num(p["v0"]), "gradient_chi2_reduced": _num(p["chi2_reduced"]),
            "gradient_pixels": int(p["npixels"]),
            "gradient_errors": "formal, scaled by the reduced chi^2; optimistic when the "
                               "residuals are spatially correlated",
            "distance_pc": self.distance_pc,
        }
        if self.sonic is not None:
            s = self.sonic
            out.update({"sound_speed_kms": _num(s["sound_speed"]),
                        "temperature_k": _num(s["temperature"]),
                        "sonic_scale_reached": s["reached"],
                        "sonic_scale_arcsec": _num(s["scale"]) if s["reached"] else None,
                        "sonic_scale_err_arcsec": _num(s["scale_err"]) if s["reached"] else None,
                        "sonic_scale_note": s["note"]})
            if self.distance_pc and s["reached"]:
                out["sonic_scale_pc"] = _num(self.pc(s["scale"]))
                out["sonic_scale_err_pc"] = _num(self.pc(s["scale_err"]))
        return out

    def systemic_velocity(self):
        return None


def _num(x):
    return None if x is None or not np.isfinite(x) else float(x)


def _sources(data, velocity_field):
    """(velocity, error, intensity, dispersion, meta) of a fit, moment maps or a cube."""
    if hasattr(data, "velocity_field") and hasattr(data, "meta"):
        src = data
    else:
        from kinemap.io.reader import read_cube
        from kinemap.maps.masks import make_mask
        from kinemap.maps.moments import compute_moments
        from kinemap.maps.noise import estimate_noise

        cube = data if hasattr(data, "meta") and hasattr(data, "shape") else read_cube(data)
        noise = estimate_noise(cube)
        mask = make_mask(cube, noise=noise)
        if velocity_field == "gauss":
            from kinemap.linefit.stage import fit_cube

            src = fit_cube(cube, noise=noise, mask=mask)
        else:
            src = compute_moments(cube, mask=mask, noise=noise)
    v, err, inten = src.velocity_field()
    if hasattr(src, "component"):
        disp = src.component("dispersion")
    else:
        disp = src.arrays["moment2"]
    return v, err, inten, disp, src.meta


def _sound(widths):
    """Median sound speed, its error and temperature of a width budget's good pixels."""
    b = widths.budget
    ok = np.isin(np.asarray(b.width_status), (Status.OK, Status.AT_BOUND))
    cs = np.asarray(b.sound_speed)[ok]
    if not np.isfinite(cs).any():
        return None
    cs_err = getattr(b, "sound_speed_err", None)
    cs_err = float(np.nanmedian(np.asarray(cs_err)[ok])) if cs_err is not None else 0.0
    return (float(np.nanmedian(cs)), cs_err if np.isfinite(cs_err) else 0.0,
            float(np.nanmedian(np.asarray(b.temperature)[ok])))


def check_lag_range(value):
    """(lo, hi) arcsec of a lag range, or a KinemapError naming the fix."""
    return _range(value, "lag_range")


def check_distance(value):
    """A distance in pc (plain numbers are pc), or a KinemapError naming the fix."""
    d_pc = to_value(value, u.pc, name="distance")
    if not d_pc > 0:
        raise KinemapError(f"'distance' must be positive, e.g. '250 pc', got {value!r}")
    return float(d_pc)


def _range(value, name):
    if value is None:
        return None
    try:
        lo, hi = (to_value(x, u.arcsec, name=name) for x in value)
    except (TypeError, ValueError):
        raise KinemapError(f"'{name}' must be two lags in arcsec like '90,600', got {value!r}") \
            from None
    if not 0 < lo < hi:
        raise KinemapError(f"'{name}' must be two increasing positive lags (arcsec), got {value!r}")
    return float(lo), float(hi)


def _structure(v, err, pix, beam, o):
    sf = structure_function_arrays(v, err, edges=lag_bins(v.shape, nlags=o["nlags"]),
                                   weighting=o["weighting"], blocks=o["jackknife_blocks"])
    sf["lag"] = sf["lag"] * pix
    sf["beam"] = beam
    sf["beam_smoothed"] = sf["lag"] < BEAM_FLAG_BEAMS * (beam or 0.0)
    good = np.isfinite(sf["sf2"]) & (sf["npairs"] > 0)
    lo, hi = o["lag_range"] or (BEAM_FLAG_BEAMS * beam if beam else 2 * pix,
                                float(np.nanmax(sf["lag"][good])) if good.any() else 0.0)
    sf["fit_range"] = (lo, hi)
    sf["in_fit"] = good & (sf["lag"] >= lo * (1 - 1e-9)) & (sf["lag"] <= hi * (1 + 1e-9))
    m = sf["in_fit"]
    sf["fit"] = fit_power_law(sf["lag"][m], sf["sf2"][m], sf["sf2_err"][m]
                              if np.isfinite(sf["sf2_err"][m]).all() else None,
                              replicates=sf["replicates"][:, m] if len(sf["replicates"]) else None)
    return sf


def _linewidth(inten, v, disp, widths, pix, beam, nsizes):
    nt = None if widths is None else np.asarray(widths.budget.nonthermal_dispersion)
    if nt is not None and nt.shape != v.shape:
        raise KinemapError(f"the width budget's maps have shape {nt.shape}, the velocity "
                           f"field {v.shape}; run both on the same cube")
    lw = size_linewidth_arrays(inten, v, disp, nonthermal=nt, pixel_scale=pix, beam=beam,
                               nsizes=nsizes)
    lw["fitted"] = "sigma_nt" if nt is not None else "sigma"
    # the beam smooths the centroid field, so apertures of under two beams hold too little
    # of its variance (the structure function's flag, for the same reason)
    m = lw["size"] >= BEAM_FLAG_BEAMS * (beam or 0.0) * (1 - 1e-9)
    if m.sum() < 3:
        m = np.ones_like(m)
    lw["in_fit"] = m
    y = lw[lw["fitted"]]
    lw["fit"] = fit_power_law(lw["size"][m], y[m], lw[f"{lw['fitted']}_err"][m])
    lw["fit_centroid"] = fit_power_law(lw["size"][m], lw["sigma_centroid"][m],
                                       lw["sigma_err"][m])
    return lw


def _sonic(lw, sound):
    if sound is None:
        return None
    cs, cs_err, temp = sound
    s = sonic_scale(lw["fit"], cs, cs_err, sizes=lw["size"])
    s.update(sound_speed=cs, temperature=temp)
    sig = lw["sigma_nt"]
    if s["reached"]:
        s["note"] = "the non-thermal dispersion crosses the sound speed inside the sizes measured"
    elif np.nanmin(sig) > cs:
        s["note"] = ("not reached: the non-thermal dispersion exceeds the sound speed at the "
                     "smallest aperture (one beam)")
    else:
        s["note"] = "not reached: the non-thermal dispersion stays below the sound speed"
    return s


def turbulence_statistics(data, *, velocity_field: str = "gauss", widths=None, distance=None,
                          lag_range=None, nlags: int = 12, weighting: str = "errors",
                          gradient_window=None, nsizes: int = 10,
                          jackknife_blocks: int = 3) -> TurbulenceStatistics:
    """Structure function, size-linewidth relation, sonic scale and velocity gradients.

    Parameters
    ----------
    data : LineFitMaps, MomentMaps, Cube or anything :func:`kinemap.read_cube` reads
        The velocity field: the first Gaussian component of a fit, moment 1 of moment maps,
        or (for a cube) whichever ``velocity_field`` names, made with default options.
    velocity_field : {'gauss', 'moments'}
        For a cube input: Gaussian fits or moment 1.
    widths : WidthBudget, optional
        :func:`kinemap.line_widths` of the same cube: per-pixel non-thermal dispersions
        for ``sigma_nt``, and the sound speed (median over good pixels) for the sonic scale.
    distance : Quantity or str (pc), optional
        Sizes in pc and gradients in km/s/pc.
    lag_range : (lag, lag) in arcsec, optional
        Lags of the power-law fit of the structure function (default: two beams, or two
        pixels without a beam, to the largest lag).
    nlags : int
        Logarithmic lag bins from one pixel to a third of the map.
    weighting : {'errors', 'uniform'}
        Pixel weights 1/sigma_v^2, or equal weights (the noise bias is removed either way).
    gradient_window : Quantity or str (arcsec), optional
        Diameter of the moving window of the local gradients (default three beams, or
        seven pixels without a beam).
    nsizes : int
        Number of aperture sizes of the size-linewidth relation.
    jackknife_blocks : int
        Blocks per side of the jackknife errors of the structure function.

    Returns
    -------
    TurbulenceStatistics
    """
    t0 = time.perf_counter()
    if velocity_field not in ("gauss", "moments"):
        raise KinemapError(f"'velocity_field' must be 'gauss' or 'moments', got {velocity_field!r}")
    v, err, inten, disp, meta = _sources(data, velocity_field)
    pix = float(meta.pixel_scale_arcsec)
    beam = float(meta.beam.major.to_value(u.arcsec)) if getattr(meta, "beam", None) else None
    d_pc = None if distance is None else check_distance(distance)
    window = (to_value(gradient_window, u.arcsec, name="gradient_window")
              if gradient_window is not None else (3 * beam if beam else 7 * pix))
    o = dict(nlags=int(nlags), weighting=weighting, jackknife_blocks=int(jackknife_blocks),
             lag_range=_range(lag_range, "lag_range"))
    if o["nlags"] < 3:
        raise KinemapError(f"'nlags' must be at least 3, got {nlags!r}")
    sf = _structure(v, err, pix, beam, o)
    lw = _linewidth(inten, v, disp, widths, pix, beam, int(nsizes))
    matrix = sky_matrix(getattr(meta, "wcs", None), pixel_scale=pix)
    plane = plane_fit(v, err, matrix=matrix)
    local = local_gradients(v, err, matrix=matrix, window_pix=window / pix)
    sonic = _sonic(lw, _sound(widths)) if widths is not None else None
    settings = dict(velocity_field=velocity_field if not hasattr(data, "velocity_field") else
                    ("gauss" if hasattr(data, "component") else "moments"),
                    weighting=weighting, jackknife_blocks=int(jackknife_blocks),
                    gradient_window_arcsec=float(window), nlags=int(nlags))
    return TurbulenceStatistics(sf=sf, linewidth=lw, plane=plane, local=local, velocity=v,
                                meta=meta, sonic=sonic, distance_pc=d_pc, matrix=matrix,
                                seconds=time.perf_counter() - t0, settings=settings)
