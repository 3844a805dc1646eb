"""The rings stage of a run: fit a velocity field and hand products and plots to the exporter."""
from __future__ import annotations

from dataclasses import dataclass, field

import astropy.units as u
import numpy as np

from kinemap.units import KMS, to_value
from kinemap.errors import KinemapError
from kinemap.io.products import Product
from kinemap.rings.fit import RingFitResult, fit_rings
from kinemap.rings.grid import SkyGrid

__all__ = ["RingStage", "run_rings"]


@dataclass(frozen=True)
class RingStage:
    """A ring fit plus what the plots need (the cube for the position-velocity diagram)."""

    result: RingFitResult
    cube_data: object = None
    cube_velocity: np.ndarray | None = None
    options: dict = field(default_factory=dict)

    def products(self) -> list[Product]:
        r = self.result
        tab = r.table.copy()
        tab.meta = {k: (list(v) if isinstance(v, tuple) else v) for k, v in tab.meta.items()}
        harm = r.harmonics.copy()
        return [
            Product("rotation_curve", tab, u.one, "tilted-ring solution per ring (Begeman 1989)",
                    "table"),
            Product("harmonics", harm, u.one,
                    "harmonic expansion of each ring to third order (Schoenmakers et al. 1997)",
                    "table"),
            Product("velocity_model", r.model.to_value(KMS), KMS,
                    "line-of-sight velocity of the final ring model", "velocity"),
            Product("velocity_residual", r.residual.to_value(KMS), KMS,
                    "velocity field minus ring model", "residual"),
        ]

    def figures(self, state) -> dict:
        from kinemap.plotting.rings import (
            plot_harmonics, plot_pv_diagram, plot_ring_geometry, plot_rotation_curve,
            plot_velocity_fields
        )

        figs = {
            "rotation_curve": (plot_rotation_curve(self.result),
                               "rotation curve with approaching and receding halves"),
            "ring_geometry": (plot_ring_geometry(self.result), "ring geometry against radius"),
            "velocity_fields": (plot_velocity_fields(self.result),
                                "velocity field, ring model and residual"),
            "harmonics": (plot_harmonics(self.result), "harmonic terms per ring"),
        }
        if self.cube_data is not None:
            figs["pv_major_axis"] = (plot_pv_diagram(self.cube_data, self.cube_velocity, self.result),
                                     "position-velocity diagram along the major axis with the model")
        return figs

    def summary(self) -> dict:
        g = self.result.global_geometry
        t = self.result.table
        ok = np.asarray(t["status"]) == 0
        return {
            "position_angle_deg": float(g["position_angle"].to_value(u.deg)),
            "inclination_deg": float(g["inclination"].to_value(u.deg)),
            "v_sys_kms": float(g["v_sys"].to_value(KMS)),
            "x_center_pix": float(g["x_center"].to_value(u.pix) if hasattr(g["x_center"], "unit") else g["x_center"]),
            "y_center_pix": float(g["y_center"].to_value(u.pix) if hasattr(g["y_center"], "unit") else g["y_center"]),
            "rings_fitted": int(ok.sum()),
            "rings_failed": int((~ok).sum()),
        }


def _center_pixels(center, wcs):
    """'RA,DEC' (degrees or sexagesimal) -> 0-based pixel (x, y)."""
    from astropy.coordinates import SkyCoord

    if center is None:
        return None, None
    text = str(center)
    try:
        ra, dec = (p.strip() for p in text.split(","))
        if any(ch in text for ch in "hmsd:"):
            sc = SkyCoord(ra, dec, unit=(u.hourangle, u.deg))
        else:
            sc = SkyCoord(float(ra) * u.deg, float(dec) * u.deg)
    except (ValueError, TypeError):
        raise KinemapError(f"'center' must be 'RA,DEC' in degrees or sexagesimal, got {center!r}") from None
    x, y = wcs.world_to_pixel(sc)
    return float(x), float(y)


def run_rings(velocity, velocity_error, intensity, meta, opts: dict, *, cube=None,
              progress: bool = False) -> RingStage:
    """Run :func:`fit_rings` with the options of a config's [rings] section."""
    grid = SkyGrid.from_wcs(meta.wcs, shape=velocity.shape)
    x0, y0 = _center_pixels(opts.get("center"), meta.wcs)
    beam = meta.beam
    beam_fwhm = None
    if beam is not None:
        beam_fwhm = float(np.sqrt(beam.major.to_value(u.arcsec) * beam.minor.to_value(u.arcsec))) * u.arcsec
    def q(name, unit):
        v = opts.get(name)
        return None if v is None else to_value(v, unit, name=name) * u.Unit(unit)
    fix = list(opts.get("fix") or [])
    result = fit_rings(
        velocity, grid, intensity=intensity, velocity_error=velocity_error,
        x_center=x0, y_center=y0, position_angle=q("position_angle", u.deg),
        inclination=q("inclination", u.deg), v_sys=q("v_sys", KMS), fix=fix,
        ring_width=q("ring_width", u.arcsec), beam_fwhm=beam_fwhm,
        distance=q("distance", u.Mpc), stages=tuple(opts.get("stages") or (1, 2, 3)),
        final_geometry=opts.get("final_geometry", "median"), weighting=opts.get("weighting", "cos"),
        exclude_minor_axis=to_value(opts.get("exclude_minor_axis", 20.0), u.deg,
                                    name="exclude_minor_axis") * u.deg,
        min_points=int(opts.get("min_points", 20)),
        expansion_in_geometry=bool(opts.get("expansion_in_geometry", False)),
        n_bootstrap=int(opts.get("bootstrap", 0)), seed=opts.get("seed"), progress=progress)
    cube_data, cube_v = None, None
    if cube is not None and opts.get("pv_diagram", True):
        nbytes = np.prod(cube.shape) * 8
        if nbytes < 2e9:  # the diagram reads the cube; skip it for very large cubes
            cube_data = np.asarray(cube.data, dtype=np.float64)
            cube_v = cube.velocity
    return RingStage(result=result, cube_data=cube_data, cube_velocity=cube_v, options=dict(opts))
