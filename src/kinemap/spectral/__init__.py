"""Spectral axes: the CTYPE table and velocity conventions, frames, air/vacuum wavelengths,
channel responses and the line catalogue.  Pure functions of header values; no files
except the packaged line catalogue."""
from kinemap.spectral.axes import CONVENTIONS, axis_kind, from_velocity, to_velocity

__all__ = ["CONVENTIONS", "axis_kind", "to_velocity", "from_velocity"]
