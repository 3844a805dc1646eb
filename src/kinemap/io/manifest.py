"""manifest.json: what was made, from what, how, and how long each stage took."""
from __future__ import annotations

import json
import sys
from datetime import datetime, timezone
from importlib.metadata import PackageNotFoundError, version

import astropy.units as u

from kinemap._version import __version__

__all__ = ["build_manifest", "write_json"]


def _unit_str(unit) -> str:
    unit = u.Unit(unit)
    return "" if unit == u.one else unit.to_string()


def build_manifest(meta, products: dict, *, timings: dict, options: dict,
                   figures: dict | None = None, summary: dict | None = None,
                   execution: dict | None = None) -> dict:
    rest = None
    if meta is not None and meta.rest_value is not None:
        rest = {"value": float(meta.rest_value.value), "unit": meta.rest_value.unit.to_string(),
                "medium": meta.medium}
        if meta.medium == "air":  # the FITS headers carry the vacuum value as RESTWAV
            from kinemap.spectral.airvac import fits_air_to_vacuum

            rest["vacuum_value_angstrom"] = float(fits_air_to_vacuum(
                meta.rest_value.to_value("Angstrom")))
    doc = {
        "kinemap_version": __version__,
        "versions": library_versions(),
        "command_line": command_line(),
        "created": datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "input": None if meta is None else {
            "file": meta.source, "sha256": meta.checksum, "spectral_ctype": meta.ctype_original,
            "header_repairs": list(meta.repairs), "subset": meta.subset},
        "conventions": None if meta is None else {
            "velocity_convention": meta.convention, "rest_value": rest, "frame": meta.frame,
            "velocity_sign": "positive receding", "dispersion": "Gaussian sigma",
            "beam": None if meta.beam is None else {
                "major_arcsec": float(meta.beam.major.to_value(u.arcsec)),
                "minor_arcsec": float(meta.beam.minor.to_value(u.arcsec)),
                "pa_deg": float(meta.beam.pa.to_value(u.deg))}},
        "options": options,
        "products": {k: {"path": v["path"], "unit": _unit_str(v["unit"]),
                         "description": v["description"]} for k, v in products.items()},
        "figures": figures or {},
        "timings": {k: round(float(v), 4) for k, v in timings.items()},
        "execution": execution or {},
    }
    if summary:
        doc["summary"] = summary
    return doc


_LIBRARIES = ("numpy", "scipy", "astropy", "spectral-cube", "numba", "dask", "matplotlib")


def library_versions() -> dict:
    """Versions of kinemap and the libraries whose numbers its products depend on."""
    out = {"kinemap": __version__, "python": sys.version.split()[0]}
    for name in _LIBRARIES:
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            out[name] = None
    return out


def command_line() -> str | None:
    """The command that made the products (None inside a Python session)."""
    argv0 = sys.argv[0] if sys.argv else ""
    if not argv0.endswith("kinemap") and "kinemap/cli" not in argv0:
        return None
    import shlex

    return " ".join(shlex.quote(a) for a in ["kinemap", *sys.argv[1:]])


def write_json(path, doc) -> None:
    with open(path, "w") as fh:
        json.dump(doc, fh, indent=2, default=_default)
        fh.write("\n")


def _default(obj):
    if isinstance(obj, u.Quantity):
        return str(obj)
    try:
        import numpy as np

        if isinstance(obj, np.generic):
            return obj.item()
        if isinstance(obj, np.ndarray):
            return obj.tolist()
    except ImportError:  # pragma: no cover
        pass
    return str(obj)
