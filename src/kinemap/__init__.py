"""kinemap: kinematics from spectral-line cubes.

Data flow (one direction): read -> noise & mask -> per-pixel maps -> rotation curve /
line-width budget -> export.  See README.md for the conventions used everywhere.
"""
from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("kinemap")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+unknown"

from kinemap.errors import KinemapError, KinemapWarning  # noqa: E402

__all__ = ["__version__", "KinemapError", "KinemapWarning"]
