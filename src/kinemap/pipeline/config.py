"""Run configuration: one schema for TOML files and command-line options.

A configuration is a dict of sections.  ``kinemap run CONFIG.toml`` reads one from TOML;
the other commands build the same dict from their options, so every route runs the same
stages with the same validation.  Unknown sections or keys are errors (a typo must not be
silently ignored).

Sections and keys (defaults in brackets)::

    [input]   cube (required unless velocity_map), convention, rest_value, frame,
              vrange = [v1, v2], box, region, beams ["common"], bunit, hdu;
              velocity_map, velocity_error, intensity (2D FITS maps for [rings])
    [noise]   line_free ["auto"] or [[v1, v2], ...]
    [mask]    method ["smooth"] | "threshold" | "none", threshold, grow_threshold [2.0],
              smooth_beams [1.5], smooth_pixels [3.0], smooth_channels [3], min_pixels,
              min_channels [2]
    [maps]    method ["moments"] | "gauss", channel_response ["tophat"] | "hanning" | "none";
              for gauss: components [1] | 2 | 3 | "auto", baseline ["none"] | "constant" |
              "linear", instrument_sigma (km/s) or resolving_power, order ["flux"] |
              "velocity", snr_threshold [3], min_separation [1] (sigma),
              min_component_snr [3], write_model [false], vrange (velocity window of the
              moments and fits only; other stages see the whole cube)
    [rings]   center ("RA,DEC"), pa, inclination, vsys, ring_width (arcsec), distance
              (Mpc), weighting ["cos"] | "cos2" | "uniform", exclude_minor_axis [20] (deg),
              stages [[1, 2, 3]], final_geometry ["median"] | "polynomial" | "rings" |
              "global", fix [[]], min_points [20], bootstrap [0], seed [0],
              expansion_in_geometry [false], pv_diagram [true]
    [widths]  lines (names from the catalogue, brightest first), temperature ("1e4 K") or
              temperature_map (FITS, K), temperature_err, mu [2.33], free_velocity [false],
              ratios [{"NII_6583/NII_6548" = 3.0}], catalogue (extra TOML file),
              snr_threshold [3]; the instrument comes from [maps] instrument_sigma /
              resolving_power, the channel response from [maps] channel_response
    [output]  dir ["kinemap-out"], overwrite [false], plots [true]
    [run]     max_memory [a quarter of the machine's memory], progress [true],
              scheduler ["tcp://host:port" of a dask scheduler], workers [N local processes]

Velocities may be written as numbers (km/s) or strings with units ("1500 km/s").
"""
from __future__ import annotations

import copy
import difflib
import os
import tomllib

from kinemap.errors import KinemapError

__all__ = ["SCHEMA", "default_config", "load_config", "validate_config", "parse_size"]

# section -> key -> (allowed python types, default)
SCHEMA: dict[str, dict[str, tuple]] = {
    "input": {
        "cube": ((str, type(None)), None), "convention": ((str, type(None)), None),
        "rest_value": ((str, type(None)), None), "frame": ((str, type(None)), None),
        "vrange": ((list, tuple, str, type(None)), None), "box": ((list, tuple, str, type(None)), None),
        "region": ((str, type(None)), None), "beams": ((str,), "common"),
        "bunit": ((str, type(None)), None), "hdu": ((int, str, type(None)), None),
        "velocity_map": ((str, type(None)), None), "velocity_error": ((str, type(None)), None),
        "intensity": ((str, type(None)), None),
    },
    "noise": {"line_free": ((str, list, tuple, type(None)), "auto")},
    "mask": {
        "method": ((str,), "smooth"), "threshold": ((int, float, type(None)), None),
        "grow_threshold": ((int, float), 2.0), "smooth_beams": ((int, float), 1.5),
        "smooth_pixels": ((int, float), 3.0), "smooth_channels": ((int,), 3),
        "min_pixels": ((int, type(None)), None), "min_channels": ((int,), 2),
    },
    "maps": {"method": ((str,), "moments"), "channel_response": ((str,), "tophat"),
             "components": ((int, str), 1), "baseline": ((str,), "none"),
             "instrument_sigma": ((int, float, str, type(None)), None),
             "resolving_power": ((int, float, type(None)), None), "order": ((str,), "flux"),
             "snr_threshold": ((int, float), 3.0), "min_separation": ((int, float), 1.0),
             "min_component_snr": ((int, float), 3.0), "write_model": ((bool,), False),
             "vrange": ((list, tuple, str, type(None)), None)},
    "rings": {
        "center": ((str, type(None)), None), "pa": ((int, float, str, type(None)), None),
        "inclination": ((int, float, str, type(None)), None),
        "vsys": ((int, float, str, type(None)), None),
        "ring_width": ((int, float, str, type(None)), None),
        "distance": ((int, float, str, type(None)), None), "weighting": ((str,), "cos"),
        "exclude_minor_axis": ((int, float, str), 20.0), "stages": ((list,), [1, 2, 3]),
        "final_geometry": ((str,), "median"), "fix": ((list,), []), "min_points": ((int,), 20),
        "bootstrap": ((int,), 0), "seed": ((int,), 0), "expansion_in_geometry": ((bool,), False),
        "pv_diagram": ((bool,), True),
    },
    "widths": {
        "lines": ((list, str), []), "temperature": ((int, float, str, type(None)), None),
        "temperature_map": ((str, type(None)), None),
        "temperature_err": ((int, float, str, type(None)), None), "mu": ((int, float), 2.33),
        "free_velocity": ((bool,), False), "ratios": ((dict, list, type(None)), None),
        "catalogue": ((str, type(None)), None), "snr_threshold": ((int, float), 3.0),
    },
    "output": {"dir": ((str,), "kinemap-out"), "overwrite": ((bool,), False),
               "plots": ((bool,), True)},
    "run": {"max_memory": ((str, int, float, type(None)), None), "progress": ((bool,), True),
            "scheduler": ((str, type(None)), None), "workers": ((int, type(None)), None)},
}


def default_config() -> dict:
    return {sec: {k: copy.deepcopy(v[1]) for k, v in keys.items()} for sec, keys in SCHEMA.items()}


def _suggest(word, choices):
    close = difflib.get_close_matches(word, list(choices), n=1)
    return f" (did you mean '{close[0]}'?)" if close else ""


def validate_config(user: dict, *, base_dir: str | None = None) -> dict:
    """Merge ``user`` over the defaults, checking every section, key and type."""
    cfg = default_config()
    for sec, values in user.items():
        if sec not in SCHEMA:
            raise KinemapError(f"unknown config section [{sec}]{_suggest(sec, SCHEMA)}; "
                               f"known sections: {', '.join(SCHEMA)}")
        if not isinstance(values, dict):
            raise KinemapError(f"config section [{sec}] must be a table of keys")
        for key, value in values.items():
            if key not in SCHEMA[sec]:
                raise KinemapError(f"unknown key '{key}' in [{sec}]{_suggest(key, SCHEMA[sec])}; "
                                   f"known keys: {', '.join(SCHEMA[sec])}")
            types = SCHEMA[sec][key][0]
            if isinstance(value, bool) and bool not in types:
                ok = False
            else:
                ok = isinstance(value, types) or (float in types and isinstance(value, int))
            if not ok:
                names = "/".join(t.__name__ for t in types if t is not type(None))
                raise KinemapError(f"[{sec}] {key} must be {names}, got {value!r}")
            cfg[sec][key] = value
    if not cfg["input"]["cube"] and not cfg["input"]["velocity_map"]:
        raise KinemapError("the config needs [input] cube = \"path/to/cube.fits\" (or "
                           "velocity_map = \"map.fits\" for a rotation curve from a map)")
    if cfg["input"]["velocity_map"] and "rings" not in user:
        raise KinemapError("[input] velocity_map is only used by [rings]; add a [rings] section "
                           "or give a cube")
    if base_dir:
        for sec, key in (("input", "cube"), ("input", "region"), ("output", "dir"),
                         ("input", "velocity_map"), ("input", "velocity_error"),
                         ("input", "intensity"), ("widths", "temperature_map"),
                         ("widths", "catalogue")):
            v = cfg[sec][key]
            if v and not os.path.isabs(v):
                cfg[sec][key] = os.path.normpath(os.path.join(base_dir, v))
    cfg["_sections"] = sorted(set(user) | {"input", "noise", "mask", "output", "run"})
    return cfg


def load_config(path) -> dict:
    """Read and validate a TOML configuration; relative paths are relative to the file."""
    path = os.fspath(path)
    if not os.path.exists(path):
        raise KinemapError(f"config file not found: {path}")
    try:
        with open(path, "rb") as fh:
            raw = tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise KinemapError(f"{path} is not valid TOML: {exc}") from None
    return validate_config(raw, base_dir=os.path.dirname(os.path.abspath(path)))


_SIZE_UNITS = (("TIB", 1 << 40), ("GIB", 1 << 30), ("MIB", 1 << 20), ("KIB", 1 << 10),
               ("TB", 10 ** 12), ("GB", 10 ** 9), ("MB", 10 ** 6), ("KB", 10 ** 3), ("B", 1))


def default_max_memory() -> int:
    """A quarter of the machine's memory (psutil comes with dask.distributed)."""
    try:
        import psutil

        return int(psutil.virtual_memory().total // 4)
    except (ImportError, OSError):
        return 2 * 10 ** 9


def parse_size(value) -> int:
    """'1GB', '512 MB', '2GiB' or a number of bytes -> bytes; None -> the default."""
    if value is None:
        return default_max_memory()
    n = -1
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        n = int(value)
    else:
        text = str(value).strip().upper().replace(" ", "")
        mult = 1
        for suffix, m in _SIZE_UNITS:
            if text.endswith(suffix):
                text, mult = text[: -len(suffix)], m
                break
        try:
            n = int(float(text) * mult)
        except ValueError:
            n = -1
    if n <= 0:
        raise KinemapError(f"'max_memory' must be a size like '1GB' or '512MB', got {value!r}")
    return n
