"""Line catalogue and line-width budget (thermal / non-thermal decomposition).

Array level: functions take numpy arrays or Quantities of per-pixel line widths (for
example from the Gaussian line fitter) and return a frozen :class:`BudgetArrays`;
:func:`line_widths` fits the lines of a cube and returns a :class:`WidthBudget` whose
maps are Projections.

Conventions: dispersion = Gaussian sigma (FWHM = 2.35482 sigma), velocities in km/s,
temperatures in K, uncertainties 1 sigma, NaN = no data, status codes from
:mod:`kinemap.status`.
"""
from kinemap.widths.budget import BudgetArrays
from kinemap.widths.budget import width_budget
from kinemap.widths.stage import WidthBudget, line_widths
from kinemap.spectral.catalogue import (
    MEDIA, Line, air_to_vacuum, check_line_in_range, get_line, load_catalogue, medium_from_ctype,
    vacuum_to_air
)
from kinemap.widths.thermal import (
    K_OVER_AMU, MU_IONIZED, MU_MOLECULAR, channel_dispersion, sound_speed, thermal_dispersion
)

__all__ = [
    "Line",
    "MEDIA",
    "load_catalogue",
    "get_line",
    "medium_from_ctype",
    "check_line_in_range",
    "air_to_vacuum",
    "vacuum_to_air",
    "K_OVER_AMU",
    "MU_MOLECULAR",
    "MU_IONIZED",
    "thermal_dispersion",
    "sound_speed",
    "channel_dispersion",
    "WidthBudget",
    "BudgetArrays",
    "line_widths",
    "width_budget",
]
