"""Where numba caches kinemap's compiled kernels: a user cache folder keyed by version.

By default numba writes its cache into ``__pycache__`` beside the sources.  A
non-editable re-install deletes the installed package folder, ``__pycache__`` with it,
so every re-install compiled the fitting kernels again (about 40 s).  Pointing numba at
``<user cache>/kinemap/<version>/numba`` keeps them: numba files them under a hash of the
source folder's path and checks each entry against a hash of its source file's contents
(numba >= 0.57), so re-installing the same version at the same place finds them valid,
and edited sources (a development checkout) still recompile.  The version in the path
lets ``rm -rf`` of one version's folder clear exactly its kernels.

A ``NUMBA_CACHE_DIR`` the user set is left alone.  This module imports nothing heavy:
``kinemap/__init__.py`` calls :func:`use_user_cache` before any kernel module exists.
"""
from __future__ import annotations

import os
import sys

__all__ = ["kernel_cache_dir", "use_user_cache"]


def _user_cache_home() -> str:
    """The platform's per-user cache folder (XDG on Linux, as most tools use it)."""
    if sys.platform == "darwin":
        return os.path.join(os.path.expanduser("~"), "Library", "Caches")
    if os.name == "nt":
        return os.environ.get("LOCALAPPDATA") or os.path.join(os.path.expanduser("~"),
                                                              "AppData", "Local")
    return os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")


def kernel_cache_dir(version: str) -> str:
    """``<user cache>/kinemap/<version>/numba``: where this version's kernels are cached."""
    safe = "".join(c if c.isalnum() or c in ".-_+" else "_" for c in version)
    return os.path.join(_user_cache_home(), "kinemap", safe, "numba")


def use_user_cache(version: str) -> str | None:
    """Point numba's cache at :func:`kernel_cache_dir` unless ``NUMBA_CACHE_DIR`` is set.

    Returns the folder numba will use (None: numba's default, beside the sources).  When
    the folder cannot be created (a read-only home), numba's default stays.  If numba is
    imported already, its config is updated too (numba reads the variable at import).
    """
    if os.environ.get("NUMBA_CACHE_DIR"):
        return os.environ["NUMBA_CACHE_DIR"]
    path = kernel_cache_dir(version)
    try:
        os.makedirs(path, exist_ok=True)
    except OSError:
        return None
    os.environ["NUMBA_CACHE_DIR"] = path
    config = getattr(sys.modules.get("numba"), "config", None)
    if config is not None and not getattr(config, "CACHE_DIR", ""):
        config.CACHE_DIR = path
    return path
