"""Option values: text and numbers given for an option -> the canonical Python value.

Each parser or check here raises ValueError with the reason (the schema's
:meth:`~kinemap.pipeline.config.Option` turns it into one line naming the option), except
:func:`parse_size`, which callers outside the schema use and which raises KinemapError.
"""
from __future__ import annotations

import math

from kinemap.errors import KinemapError

def text_value(text: str, types: tuple):
    numeric = int in types or float in types
    t = text.strip()
    if numeric:
        try:
            return int(t)
        except ValueError:
            pass
        if float in types:
            try:
                return float(t)
            except ValueError:
                pass
    if str in types:
        return text
    raise ValueError(f"must be {'a number' if float in types else 'a whole number'}, got {text!r}")


def number_or_text(text: str):
    return text_value(text, (int, float, str))


def two(value, what: str):
    """'a,b' or [a, b] -> [a, b]; entries may carry units ('-50 km/s')."""
    parts = ([p.strip() for p in value.split(",")] if isinstance(value, str) else list(value))
    if len(parts) != 2 or any(p == "" for p in parts):
        raise ValueError(f"must be two {what}, got {value!r}")
    return [number_or_text(p) if isinstance(p, str) else p for p in parts]


def number_pair(value):
    """'-50,120' or [-50, 120] (km/s) -> [-50, 120]."""
    return two(value, "velocities like '-50,120' (km/s)")


def range_list(value):
    """'auto', '-300,-200;250,400' or [[-300, -200], [250, 400]] -> 'auto' or a list of pairs."""
    if isinstance(value, str):
        if value.strip().lower() == "auto":
            return "auto"
        value = [part for part in value.split(";") if part.strip()]
    try:
        out = [number_pair(p) for p in value]
    except (ValueError, TypeError):
        out = []
    if not out:
        raise ValueError(f"must be 'auto' or velocity ranges like '-300,-200;250,400' (km/s), "
                         f"got {value!r}")
    return out


def name_list(value):
    """'a,b' or ['a', 'b'] -> ['a', 'b']."""
    if isinstance(value, str):
        return [p.strip() for p in value.split(",") if p.strip()]
    return list(value)


def stage_numbers(value):
    items = name_list(value)
    try:
        return [int(s) for s in items]
    except (TypeError, ValueError):
        raise ValueError(f"must be stage numbers like '1,2,3', got {value!r}") from None


def ratios(value):
    """{'NII_6583/NII_6548': 3.0}, ['NII_6583/NII_6548=3.0', ...] or that text -> dict."""
    if isinstance(value, dict):
        items = list(value.items())
    else:
        texts = name_list(value) if isinstance(value, str) else [str(v) for v in value]
        items = [t.split("=", 1) if "=" in t else (t, "") for t in texts]
    out = {}
    for key, ratio in items:
        names = [p.strip() for p in str(key).split("/")]
        try:
            r = float(ratio)
        except (TypeError, ValueError):
            r = None
        if len(names) != 2 or not all(names) or r is None:
            raise ValueError(f"must be flux ratios like 'NII_6583/NII_6548=3.0', got "
                             f"{key!r}={ratio!r}")
        out["/".join(names)] = r
    return out


def lag_pair(value):
    """'90,600' or [90, 600] (arcsec) -> [90, 600]."""
    return two(value, "lags like '90,600' (arcsec)")


def check_lag_range(value):
    from kinemap.turbulence.stage import check_lag_range

    check_lag_range(value)


def check_distance_pc(value):
    from kinemap.turbulence.stage import check_distance

    check_distance(value)


def check_beam(value):
    from kinemap.io.beams import parse_beam

    parse_beam(value)


def check_size(value):
    parse_size(value)


def number_list(value):
    """'3,6,12' or [3, 6, 12] -> [3.0, 6.0, 12.0]."""
    items = name_list(value) if isinstance(value, str) else list(value)
    try:
        out = [float(x) for x in items]
    except (TypeError, ValueError):
        out = []
    if not out:
        raise ValueError(f"must be numbers like '3,6,12', got {value!r}")
    return out


def components(value):
    """1, 2, '1', '2' or 'auto' -> 1, 2 or 'auto'."""
    text = str(value).strip().lower()
    return text if text == "auto" else text_value(text, (int,))


def check_every(value):
    if value < 1:
        raise ValueError(f"must be a whole number of channels >= 1, got {value}")
def kelvin(value, *, allow_zero: bool):
    """A temperature given as a number (K) or text with a unit, checked to be finite and
    positive (or zero for an error); raises ValueError with the reason."""
    import astropy.units as u
    import numpy as np

    try:
        q = u.Quantity(value) if isinstance(value, str) else u.Quantity(value, u.K)
        if q.unit == u.one:
            q = q.value * u.K
        k = float(q.to_value(u.K, equivalencies=u.temperature()))
    except (TypeError, ValueError, u.UnitsError):
        raise ValueError(f"must be a temperature like '1e4 K', got {value!r}") from None
    if not np.isfinite(k) or k < 0 or (k == 0 and not allow_zero):
        bound = "at least 0 K" if allow_zero else "above 0 K"
        raise ValueError(f"must be a finite temperature {bound}, got {value!r}")


def check_temperature(value):
    kelvin(value, allow_zero=False)


def check_temperature_err(value):
    kelvin(value, allow_zero=True)


def check_continuum(value):
    from kinemap.maps.continuum import parse_method

    parse_method(value)


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
    n = -1.0
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        n = float(value)
    else:
        text = str(value).strip().upper().replace(" ", "")
        mult = 1
        for suffix, m in _SIZE_UNITS:
            if text.endswith(suffix):
                text, mult = text[: -len(suffix)], m
                break
        try:
            n = float(text) * mult
        except ValueError:
            n = -1.0
    if not (math.isfinite(n) and n >= 1):  # inf, nan, zero and negative sizes
        raise KinemapError(f"'max_memory' must be a finite positive size like '1GB' or "
                           f"'512MB', got {value!r}")
    return int(n)
