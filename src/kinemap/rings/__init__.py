"""Tilted-ring fitting of velocity fields (Begeman 1989) and harmonic ring expansions.

Works on numpy arrays plus the sky geometry of the pixel grid; reads and writes no files.

Public API
----------
fit_rings(velocity, ...) -> RingFit
    The ring fit of a velocity Projection, map or fit result (WCS and beam from the map).
fit_velocity_field(velocity, grid, ...) -> RingFitResult
    The three-stage tilted-ring fit on plain arrays and a SkyGrid, automatic first guesses.
first_guess(velocity, grid, ...) -> FirstGuess
    Centre, v_sys, position angle and inclination estimated from the maps.
SkyGrid
    Orientation and scale of the pixel grid (``SkyGrid.from_wcs``, ``SkyGrid.from_scale``).
harmonic_expansion(velocity, rings, grid, ...) -> Table
model_velocity_field(rings, shape, grid) -> Quantity
major_axis_pv(cube, velocity_axis, result, ...) -> PositionVelocitySlice
dynamical_mass(v_rot, radius) -> Quantity;  physical_radius(radius, distance) -> Quantity
"""
from kinemap.rings.fit import RING_COLUMNS, RingFitResult, fit_velocity_field
from kinemap.rings.grid import SkyGrid
from kinemap.rings.guess import FirstGuess, first_guess
from kinemap.rings.harmonics import HARMONIC_TERMS, harmonic_expansion
from kinemap.rings.mass import dynamical_mass, physical_radius
from kinemap.rings.model import model_velocity_field
from kinemap.rings.pv import PositionVelocitySlice, major_axis_pv
from kinemap.rings.stage import RingFit, fit_rings

__all__ = [
    "fit_rings",
    "RingFit",
    "fit_velocity_field",
    "RingFitResult",
    "RING_COLUMNS",
    "SkyGrid",
    "first_guess",
    "FirstGuess",
    "harmonic_expansion",
    "HARMONIC_TERMS",
    "model_velocity_field",
    "major_axis_pv",
    "PositionVelocitySlice",
    "dynamical_mass",
    "physical_radius",
]
