"""One source of defaults: the keyword defaults of the public functions equal the config
schema's defaults for the same keys, so a Python call, a TOML file and the command with
nothing given run the same stage."""
from __future__ import annotations

import inspect

import pytest

import kinemap
from kinemap.pipeline.config import SCHEMA, option_default

# public function -> config sections whose keys it takes (in this order of precedence)
FUNCTIONS = {
    "read_cube": ("input",),
    "subtract_continuum": ("continuum", "noise"),
    "estimate_noise": ("noise", "maps"),
    "make_mask": ("mask", "maps"),
    "compute_moments": ("maps",),
    "fit_cube": ("maps",),
    "fit_rings": ("rings",),
    "line_widths": ("widths", "maps"),
    "turbulence_statistics": ("turbulence",),
    "extract_spectrum": ("spectrum",),
    "pv_diagram": ("pv",),
}
# keys whose schema value is a parsed form of the function's (or set by the run, not the
# function): checked elsewhere
SKIP = {("make_mask", "method"), ("line_widths", "snr_threshold")}


def _norm(value):
    if isinstance(value, tuple):
        return [_norm(v) for v in value]
    if isinstance(value, list):
        return [_norm(v) for v in value]
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    if isinstance(value, (int, float)):
        return float(value)
    return value


@pytest.mark.parametrize("name", sorted(FUNCTIONS))
def test_function_defaults_equal_the_schema(name):
    fn = getattr(kinemap, name)
    sections = FUNCTIONS[name]
    checked = 0
    for p in inspect.signature(fn).parameters.values():
        if p.default is inspect.Parameter.empty or (name, p.name) in SKIP:
            continue
        section = next((s for s in sections if p.name in SCHEMA[s]), None)
        if section is None:
            continue
        expected = option_default(section, p.name, sections=(section,))
        assert _norm(p.default) == _norm(expected), (name, p.name, p.default, expected)
        checked += 1
    assert checked >= 1, f"{name} shares no option with the schema"


def test_mask_defaults():
    """make_mask's 'smooth' is the schema default of a maps run; a widths run uses 'none'
    (the widths fit has its own S/N threshold)."""
    sig = inspect.signature(kinemap.make_mask)
    assert sig.parameters["method"].default == option_default("mask", "method", sections=("maps",))
    assert option_default("mask", "method", sections=("widths",)) == "none"
