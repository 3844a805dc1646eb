"""The installed version (a module of its own so the subpackages can record it without
importing the public API in ``kinemap/__init__.py``)."""
from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("kinemap")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+unknown"
