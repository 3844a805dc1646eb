"""Turbulence statistics of a velocity field: structure function, size-linewidth relation,
sonic scale and velocity gradients.

The array functions work on plain maps (km/s, pixel lags); :func:`turbulence_statistics`
takes a line fit, moment maps or a cube and returns a :class:`TurbulenceStatistics` with
products in arcsec (pc with a distance) and km/s.
"""
from kinemap.turbulence.gradients import gradient_direction, local_gradients, plane_fit, sky_matrix
from kinemap.turbulence.linewidth import aperture_sizes, size_linewidth_arrays, sonic_scale
from kinemap.turbulence.stage import TurbulenceStatistics, turbulence_statistics
from kinemap.turbulence.structure import (
    correlate, fit_power_law, lag_bins, structure_function_arrays
)

__all__ = ["turbulence_statistics", "TurbulenceStatistics", "structure_function_arrays",
           "fit_power_law", "lag_bins", "correlate", "plane_fit", "local_gradients",
           "sky_matrix", "gradient_direction", "size_linewidth_arrays", "aperture_sizes",
           "sonic_scale"]
