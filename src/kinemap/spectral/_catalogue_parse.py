"""Reading and validating line-catalogue TOML files (private; see catalogue.py)."""
from __future__ import annotations

import math
import tomllib
from pathlib import Path

from kinemap.errors import KinemapError
from kinemap.spectral import airvac as _airvac

REQUIRED = ("mass_amu", "source")
NUMERIC = (
    "mass_amu",
    "air_wavelength_angstrom",
    "vacuum_wavelength_angstrom",
    "frequency_ghz",
    "frequency_mhz",
    "fine_structure_variance_km2_s2",
)
TEXT = ("source", "mass_source", "species", "fine_structure_source")
KNOWN = set(NUMERIC) | set(TEXT)


def read_toml(text: str, origin: str) -> dict:
    """Parse TOML text; a one-line KinemapError naming ``origin`` on a syntax error."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise KinemapError(
            f"line catalogue {origin} is not valid TOML ({exc}); fix the file's syntax"
        ) from None
    lines = data.get("lines")
    if not isinstance(lines, dict) or not lines:
        raise KinemapError(
            f"line catalogue {origin} has no [lines.<NAME>] tables; "
            "write each line as a table like [lines.Halpha]"
        )
    extra = sorted(set(data) - {"lines"})
    if extra:
        raise KinemapError(
            f"line catalogue {origin} has unknown top-level key(s) {extra}; "
            "put every line under [lines.<NAME>]"
        )
    return lines


def read_file(path) -> tuple[dict, str]:
    """Read a user catalogue file; a one-line KinemapError if it cannot be read."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise KinemapError(
            f"the line catalogue {str(p)!r} does not exist; give the path of a line-catalogue TOML file"
        ) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise KinemapError(
            f"the line catalogue {str(p)!r} could not be read ({exc}); give a readable UTF-8 TOML file"
        ) from None
    return read_toml(text, repr(str(p))), repr(str(p))


def line_fields(name: str, entry, origin: str) -> dict:
    """Validate one [lines.NAME] table and return the keyword arguments for ``Line``."""
    where = f"line '{name}' in {origin}"
    if not isinstance(entry, dict):
        raise KinemapError(f"{where} must be a table ([lines.{name}]), got {entry!r}")
    unknown = sorted(set(entry) - KNOWN)
    if unknown:
        raise KinemapError(
            f"{where} has unknown field(s) {unknown}; allowed fields are {sorted(KNOWN)}"
        )
    for key in REQUIRED:
        if key not in entry:
            hint = "<emitter mass in amu>" if key == "mass_amu" else '"<where the values come from>"'
            raise KinemapError(f"{where} lacks '{key}'; add {key} = {hint}")
    values = {}
    for key in NUMERIC:
        if key not in entry:
            continue
        v = entry[key]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise KinemapError(f"{where}: '{key}' must be a finite number, got {v!r}")
        if key == "fine_structure_variance_km2_s2":
            if v < 0:
                raise KinemapError(f"{where}: '{key}' must be >= 0, got {v!r}")
        elif v <= 0:
            raise KinemapError(f"{where}: '{key}' must be positive, got {v!r}")
        values[key] = float(v)
    for key in TEXT:
        if key in entry and not isinstance(entry[key], str):
            raise KinemapError(f"{where}: '{key}' must be a text string, got {entry[key]!r}")

    has_wave = "air_wavelength_angstrom" in values or "vacuum_wavelength_angstrom" in values
    n_freq = ("frequency_ghz" in values) + ("frequency_mhz" in values)
    if n_freq > 1:
        raise KinemapError(f"{where} gives both frequency_ghz and frequency_mhz; keep one")
    if has_wave and n_freq:
        raise KinemapError(
            f"{where} gives both a wavelength and a frequency; give wavelengths for optical "
            "lines or a frequency for radio lines, not both"
        )
    if not has_wave and not n_freq:
        raise KinemapError(
            f"{where} lacks a rest value; add air_wavelength_angstrom / "
            "vacuum_wavelength_angstrom (optical) or frequency_ghz / frequency_mhz (radio)"
        )

    air = values.get("air_wavelength_angstrom")
    vac = values.get("vacuum_wavelength_angstrom")
    source = entry["source"]
    if has_wave and air is None:
        air = float(_airvac.vacuum_to_air(vac))
        source += "; air wavelength from the vacuum value (Edlen 1966)"
    elif has_wave and vac is None:
        vac = float(_airvac.air_to_vacuum(air))
        source += "; vacuum wavelength from the air value (Edlen 1966)"
    freq = values.get("frequency_ghz")
    if "frequency_mhz" in values:
        freq = values["frequency_mhz"] / 1000.0
    return dict(
        name=name,
        mass_amu=values["mass_amu"],
        source=source,
        air_wavelength_angstrom=air,
        vacuum_wavelength_angstrom=vac,
        frequency_ghz=freq,
        fine_structure_variance_km2_s2=values.get("fine_structure_variance_km2_s2", 0.0),
        species=entry.get("species", ""),
        mass_source=entry.get("mass_source", ""),
        fine_structure_source=entry.get("fine_structure_source", ""),
    )
