"""Rotation curves from velocity maps: the public ring fit and its result.

:func:`fit_rings` takes what a user holds (a velocity ``Projection`` with its WCS and
beam, a map read by :func:`kinemap.io.read_map`, the result of :func:`kinemap.fit_cube`
or :func:`kinemap.compute_moments`, or a plain array with ``wcs=``), works out the sky
grid and the beam, and runs the staged tilted-ring fit of :mod:`kinemap.rings.fit`.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import ClassVar

import astropy.units as u
import numpy as np

from kinemap.errors import BeamWarning, KinemapError
from kinemap.io.cube import CubeMeta
from kinemap.io.products import Product
from kinemap.io.results import StageResult
from kinemap.rings.fit import RingFitResult
from kinemap.rings.fit import fit_velocity_field
from kinemap.rings.grid import SkyGrid
from kinemap.units import KMS, to_value

__all__ = ["RingFit", "fit_rings"]


@dataclass(frozen=True)
class RingFit(StageResult):
    """A tilted-ring fit of a velocity field.

    Attributes
    ----------
    table : astropy.table.QTable
        One row per ring (``rotation_curve`` product): radius, v_rot, v_exp, geometry,
        errors, status and, with a distance, radius_kpc and mass_enclosed.
    result : kinemap.rings.fit.RingFitResult
        The full fit (stages, global geometry, first guess, settings).
    pv : PositionVelocitySlice or None
        Major-axis position-velocity slice of the cube (when a cube was given).

    The products are attributes too: ``velocity_model`` and ``velocity_residual``
    (Projections in km/s) and the ``harmonics`` table.
    """

    name: ClassVar[str] = "rings"

    result: RingFitResult
    meta: object
    pv: object = None
    settings: dict = field(default_factory=dict)

    @property
    def table(self):
        """The ring table as a QTable (columns with units are Quantities)."""
        from astropy.table import QTable

        return QTable(self.result.table)

    @property
    def seconds(self) -> float:
        return float(self.result.settings.get("seconds", 0.0))

    def systemic_velocity(self) -> float | None:
        return float(self.result.global_geometry["v_sys"].to_value(KMS))

    @property
    def model_note(self) -> str:
        from kinemap.rings.model import MODEL_NOTE

        return MODEL_NOTE

    def model_velocity_at(self, x, y):
        """The ring model's line-of-sight velocity (km/s) at 0-based pixel positions of the
        fitted map, passing v_sys continuously at the centre (for position-velocity cuts)."""
        from kinemap.rings.model import RingModel

        return RingModel(self.result.table, self.result.grid).model_velocity_at(x, y)

    def products(self) -> list[Product]:
        r = self.result
        tab = r.table.copy()
        tab.meta = {k: (list(v) if isinstance(v, tuple) else v) for k, v in tab.meta.items()}
        return [
            Product("rotation_curve", tab, u.one, "tilted-ring solution per ring (Begeman 1989)",
                    "table"),
            Product("harmonics", r.harmonics.copy(), u.one,
                    "harmonic expansion of each ring to third order (Schoenmakers et al. 1997)",
                    "table"),
            Product("velocity_model", r.model.to_value(KMS), KMS,
                    "line-of-sight velocity of the final ring model", "velocity"),
            Product("velocity_residual", r.residual.to_value(KMS), KMS,
                    "velocity field minus ring model", "residual"),
        ]

    def summary(self) -> dict:
        g = self.result.global_geometry
        ok = np.asarray(self.table["status"]) == 0
        return {
            "position_angle_deg": float(g["position_angle"].to_value(u.deg)),
            "inclination_deg": float(g["inclination"].to_value(u.deg)),
            "v_sys_kms": float(g["v_sys"].to_value(KMS)),
            "x_center_pix": float(u.Quantity(g["x_center"]).value),
            "y_center_pix": float(u.Quantity(g["y_center"]).value),
            "rings_fitted": int(ok.sum()),
            "rings_failed": int((~ok).sum()),
        }


def _center_pixels(center, wcs):
    """'RA,DEC' (degrees or sexagesimal) or a SkyCoord -> 0-based pixel (x, y)."""
    from kinemap.io.positions import parse_position

    if center is None:
        return None, None
    x, y = wcs.world_to_pixel(parse_position(center, "center"))
    return float(x), float(y)


def _map_values(m, unit, name):
    """Plain float64 values of a map in ``unit`` (Quantities converted, numbers taken as
    ``unit``)."""
    if m is None:
        return None
    if isinstance(m, u.Quantity):
        if unit is None:
            return np.asarray(m.value, dtype=np.float64)
        try:
            return np.asarray(m.to_value(unit), dtype=np.float64)
        except u.UnitConversionError:
            raise KinemapError(f"'{name}' is in {m.unit}, not {unit}; give a map in {unit}") from None
    if hasattr(m, "data") and hasattr(m, "unit") and hasattr(m, "meta"):  # a SkyMap
        return _map_values(u.Quantity(m.data, m.unit), unit, name)
    return np.asarray(m, dtype=np.float64)


def _meta_of(velocity, wcs):
    """The provenance of a velocity input: its own meta, or one built from its WCS."""
    meta = getattr(velocity, "meta", None)
    if isinstance(meta, CubeMeta):
        return meta
    wcs = wcs if wcs is not None else getattr(velocity, "wcs", None)
    if wcs is None:
        raise KinemapError("the velocity map carries no WCS; give a Projection, a map read "
                           "with kinemap.io.read_map, or wcs=")
    info = meta if isinstance(meta, dict) else {}
    try:
        beam = getattr(velocity, "beam", None)
    except Exception:  # spectral-cube raises NoBeamError for a Projection without a beam
        beam = None
    if beam is not None:
        from kinemap.io.beams import as_beam

        beam = as_beam(beam)
    return CubeMeta(wcs=wcs.celestial, bunit=KMS, convention=str(info.get("convention", "unknown")),
                    rest_value=info.get("rest_value"), frame=str(info.get("frame", "")),
                    beam=beam, medium=None, ctype_original="", ctype="",
                    native_convention=str(info.get("convention", "unknown")),
                    source=str(info.get("source", "in-memory velocity map")))


def dispersion_map(source):
    """The dispersion map (km/s) of a fit or moment result: the first Gaussian component's
    dispersion, else moment 2; None for anything else."""
    if hasattr(source, "component"):
        try:
            return np.asarray(source.component("dispersion"), float)
        except (KeyError, ValueError, AttributeError):
            return None
    arrays = getattr(source, "arrays", None)
    if isinstance(arrays, dict) and "moment2" in arrays:
        return np.asarray(arrays["moment2"], float)
    return None


def _inputs(velocity, velocity_err, intensity, wcs):
    """(v, v_err, intensity arrays, meta) from any accepted velocity input."""
    if hasattr(velocity, "velocity_field") and hasattr(velocity, "products"):  # a stage result
        v, err, inten = velocity.velocity_field()
        return (v, err if velocity_err is None else _map_values(velocity_err, KMS, "velocity_err"),
                inten if intensity is None else _map_values(intensity, None, "intensity"),
                velocity.meta)
    meta = _meta_of(velocity, wcs)
    v = _map_values(velocity, KMS, "velocity")
    if v.ndim != 2:
        raise KinemapError(f"'velocity' must be a 2D map, got shape {v.shape}; for a cube run "
                           "kinemap.fit_cube first and pass its result")
    err = _map_values(velocity_err, KMS, "velocity_err")
    inten = _map_values(intensity, None, "intensity")
    for name, m in (("velocity_err", err), ("intensity", inten)):
        if m is not None and m.shape != v.shape:
            raise KinemapError(f"'{name}' has shape {m.shape}, the velocity map {v.shape}; "
                               "give maps on the same pixel grid")
    return v, err, inten, meta


def fit_rings(velocity, *, velocity_err=None, intensity=None, center=None,
              position_angle=None, inclination=None, v_sys=None, distance=None, beam=None,
              ring_width=None, fix=(), weighting: str = "cos", exclude_minor_axis=20.0,
              stages=(1, 2, 3), final_geometry: str = "median", min_points: int = 20,
              bootstrap: int = 0, seed: int | None = 0, expansion_in_geometry: bool = False,
              cube=None, pv_diagram: bool = True, wcs=None, dispersion=None,
              progress: bool = False) -> RingFit:
    """Fit a tilted-ring model (Begeman 1989) to a velocity field.

    Parameters
    ----------
    velocity : Projection, SkyMap, LineFitMaps, MomentMaps or array (ny, nx)
        Line-of-sight velocity (km/s for plain numbers; positive receding; NaN = no data).
        A Projection or SkyMap brings its WCS and beam; a fit or moment result brings its
        velocity, error and intensity maps.  A plain array needs ``wcs``.
    velocity_err, intensity : array or Quantity (ny, nx), optional
        1-sigma velocity errors (km/s) and an intensity map for the weights.
    center : str or SkyCoord, optional
        Kinematic centre, 'RA,DEC' in degrees or sexagesimal.  Guessed when not given.
    position_angle, inclination : Quantity or float (deg), optional
        PA east of north to the receding half of the major axis; inclination 0 face-on.
    v_sys : Quantity or float (km/s), optional
    distance : Quantity or float (Mpc), optional
        Adds radius_kpc and mass_enclosed (M = v^2 R / G) to the table.
    beam : Quantity, str or beam object, optional
        Needed when the map does not carry its beam: it sets the default ring width
        (about one beam), flags rings within two beams of the centre as beam-smeared and
        scales the errors for beam-correlated pixels.
    ring_width : Quantity or float (arcsec), optional
    fix : sequence of str
        Held fixed: 'center', 'position_angle', 'inclination', 'v_sys', 'v_exp'.
    weighting : {'cos', 'cos2', 'uniform'}
    exclude_minor_axis : Quantity or float (deg)
        Half-width of the wedge around the minor axis left out.
    stages : sequence of int
        1 global geometry, 2 ring-by-ring geometry, 3 smoothed geometry and final v_rot.
    final_geometry : {'median', 'polynomial', 'rings', 'global'}
    bootstrap : int
        Bootstrap resamples for the errors (0: none).
    cube : kinemap.io.Cube, optional
        The cube the map came from, for the major-axis position-velocity slice.
    dispersion : array or Quantity (ny, nx), optional
        Line-of-sight velocity dispersion map (km/s).  With an intensity map it adds the
        pressure-support columns (dispersion, dispersion_err, surface_brightness,
        asymmetric_drift, v_circ, v_circ_err) from ring averages, with a BeamWarning:
        beam smearing inflates the dispersions (use fit_rings_3d).  Taken from a fit
        (Gaussian dispersion) or moment result (moment 2) when ``velocity`` is one.

    Returns
    -------
    RingFit
    """
    v, err, inten, meta = _inputs(velocity, velocity_err, intensity, wcs)
    if dispersion is None:
        dispersion = dispersion_map(velocity)
    else:
        dispersion = _map_values(dispersion, KMS, "dispersion")
    if beam is not None:
        from kinemap.io.beams import as_beam
        from dataclasses import replace

        meta = replace(meta, beam=as_beam(beam))
    if meta.beam is None:
        warnings.warn("the velocity map has no beam (give beam=): rings are one pixel scale "
                      "wide by default, no ring is flagged as beam-smeared and the errors "
                      "assume independent pixels", BeamWarning, stacklevel=2)
    return fit_velocity_arrays(
        v, err, inten, meta, center=center, position_angle=position_angle,
        inclination=inclination, v_sys=v_sys, distance=distance, ring_width=ring_width,
        fix=fix, weighting=weighting, exclude_minor_axis=exclude_minor_axis, stages=stages,
        final_geometry=final_geometry, min_points=min_points, bootstrap=bootstrap, seed=seed,
        expansion_in_geometry=expansion_in_geometry, cube=cube, pv_diagram=pv_diagram,
        dispersion=dispersion, progress=progress)


def _pressure(result, grid, dispersion, inten, beam_fwhm):
    from kinemap.rings._pressure2d import add_pressure_columns

    if dispersion.shape != inten.shape:
        raise KinemapError(f"'dispersion' has shape {dispersion.shape}, the velocity map "
                           f"{inten.shape}; give maps on the same pixel grid")
    jac = np.asarray(grid.jacobian)
    pix2 = abs(float(np.linalg.det(jac)))
    # pixels per beam: 2 pi sigma^2 of a circular Gaussian of the beam's geometric mean FWHM
    area = (1.1331 * beam_fwhm.to_value(u.arcsec) ** 2 / pix2) if beam_fwhm is not None else 1.0
    add_pressure_columns(result.table, jac, dispersion, inten, beam_area_pix=area)
    warnings.warn("2D pressure support: the dispersions are ring averages of a dispersion map, "
                  "which beam smearing inflates (and with them the asymmetric drift); "
                  "fit the cube with --model 3d for intrinsic dispersions", BeamWarning,
                  stacklevel=3)


def _quantity(value, unit, name):
    return None if value is None else to_value(value, unit, name=name) * u.Unit(unit)


def fit_velocity_arrays(v, err, inten, meta, *, center=None, position_angle=None,
                        inclination=None, v_sys=None, distance=None, ring_width=None, fix=(),
                        weighting="cos", exclude_minor_axis=20.0, stages=(1, 2, 3),
                        final_geometry="median", min_points=20, bootstrap=0, seed=0,
                        expansion_in_geometry=False, cube=None, pv_diagram=True,
                        dispersion=None, progress=False) -> RingFit:
    """:func:`fit_rings` on plain arrays (km/s) with the input's ``meta`` (its WCS and
    beam); the common path of the Python API and the config runner.  ``dispersion``
    (km/s map) with ``inten`` adds the pressure-support columns."""
    grid = SkyGrid.from_wcs(meta.wcs, shape=v.shape)
    x0, y0 = _center_pixels(center, meta.wcs)
    beam_fwhm = None
    if meta.beam is not None:
        b = meta.beam
        beam_fwhm = float(np.sqrt(b.major.to_value(u.arcsec) * b.minor.to_value(u.arcsec))) * u.arcsec
    result = fit_velocity_field(
        v, grid, intensity=inten, velocity_err=err, x_center=x0, y_center=y0,
        position_angle=_quantity(position_angle, u.deg, "position_angle"),
        inclination=_quantity(inclination, u.deg, "inclination"),
        v_sys=_quantity(v_sys, KMS, "v_sys"), fix=list(fix or []),
        ring_width=_quantity(ring_width, u.arcsec, "ring_width"), beam_fwhm=beam_fwhm,
        distance=_quantity(distance, u.Mpc, "distance"), stages=tuple(stages or (1, 2, 3)),
        final_geometry=final_geometry, weighting=weighting,
        exclude_minor_axis=_quantity(exclude_minor_axis, u.deg, "exclude_minor_axis"),
        min_points=int(min_points), expansion_in_geometry=bool(expansion_in_geometry),
        bootstrap=int(bootstrap), seed=seed, progress=progress)
    if dispersion is not None and inten is not None:
        _pressure(result, grid, dispersion, inten, beam_fwhm)
    pv = None
    if cube is not None and pv_diagram and np.prod(cube.shape) * 8 < 2e9:
        # the slice reads the whole cube: skipped for very large cubes
        from kinemap.rings.pv import major_axis_pv

        data = np.asarray(cube.data, dtype=np.float64)
        pv = major_axis_pv(data * cube.meta.bunit, cube.velocity * KMS, result)
    settings = dict(center=center, position_angle=position_angle, inclination=inclination,
                    v_sys=v_sys, distance=distance, ring_width=ring_width, fix=list(fix or []),
                    weighting=weighting, stages=list(stages or ()), bootstrap=int(bootstrap))
    return RingFit(result=result, meta=meta, pv=pv, settings=settings)
