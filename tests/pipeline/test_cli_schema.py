"""The command's options come from the config schema: same defaults, same allowed values,
same validated config as the equivalent TOML file; values may start with a minus."""
import argparse
import json
import re
import shlex
from pathlib import Path

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits

from conftest import gaussian_cube, make_header, run_cli, write_cube
from kinemap.cli import COMMANDS, build_parser, command_options, config_from_args, main
from kinemap.errors import KinemapError
from kinemap.io.beams import parse_beam
from kinemap.pipeline.config import SCHEMA, load_config, option_default, validate_config

README = Path(__file__).resolve().parents[2] / "README.md"


def _subparsers():
    parser = build_parser()
    action = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return parser, action.choices


@pytest.fixture
def small_cube(tmp_path):
    """A velocity-axis cube from -350 to 440 km/s (10 km/s channels), line at +50 km/s."""
    h = make_header("VRAD", nchan=80, ny=8, nx=8, crval=-350.0, cdelt=10.0, cunit="km/s")
    data = gaussian_cube(80, 8, 8, centre_chan=40, sigma_chan=3.0, noise=0.05, seed=4)
    return write_cube(tmp_path / "cube.fits", data, h)


@pytest.fixture
def velocity_map(tmp_path):
    h = make_header("VRAD", nchan=1, ny=8, nx=8, crval=0.0, cdelt=1.0, cunit="km/s")
    for k in ("NAXIS3", "CTYPE3", "CRVAL3", "CDELT3", "CRPIX3", "CUNIT3"):
        del h[k]
    h["NAXIS"] = 2
    h["BUNIT"] = "km/s"
    path = tmp_path / "vmap.fits"
    fits.PrimaryHDU(np.zeros((8, 8), np.float32), h).writeto(path)
    return str(path)


def test_every_command_option_follows_the_schema():
    _, commands = _subparsers()
    offered = set()
    for command, (_, (positional, _), sections, _) in COMMANDS.items():
        p = commands[command]
        for action in p._actions:
            if isinstance(action, argparse._HelpAction) or action.dest == positional:
                continue
            # no option lives only in the CLI: every one is a schema key
            section, key = action.dest.split("__")
            opt = SCHEMA[section][key]
            offered.add((section, key))
            assert action.default is argparse.SUPPRESS, action.option_strings
            default = option_default(section, key, sections)
            if action.option_strings[0] == opt.flag(key):
                assert set(opt.aliases) <= set(action.option_strings)
                if opt.choices is not None and list not in opt.types:
                    assert tuple(action.choices) == opt.choices, action.option_strings
                else:
                    assert action.choices is None
                shown = ",".join(map(str, default)) if isinstance(default, list) else default
                if shown not in (None, True, False, ""):
                    assert f"default: {shown}" in action.help, (command, action.help)
            else:  # a shortcut flag sets an allowed value
                assert (action.option_strings[0], action.const) in opt.shortcuts
                assert action.const in opt.choices
    with_flag = {(s, k) for s, keys in SCHEMA.items() for k, o in keys.items() if o.cli}
    assert offered == with_flag


@pytest.mark.parametrize("command", ["info", "maps", "widths", "rings"])
def test_a_bare_command_gets_the_schema_defaults(command, small_cube):
    parser, _ = _subparsers()
    argv = [command, small_cube] + (["--lines", "Halpha"] if command == "widths" else [])
    cfg = config_from_args(parser.parse_args(argv))
    sections = COMMANDS[command][2]
    for section, key in command_options(command):
        if (section, key) == ("widths", "lines"):
            continue
        assert cfg[section][key] == option_default(section, key, sections), (section, key)


def test_the_defaults_that_used_to_disagree(small_cube):
    """widths' mask and rings' velocity field: one default for the command and the file."""
    parser, _ = _subparsers()
    cli = config_from_args(parser.parse_args(["widths", small_cube, "--lines", "Halpha"]))
    toml = validate_config({"input": {"cube": small_cube}, "widths": {"lines": ["Halpha"]}})
    assert cli["mask"]["method"] == toml["mask"]["method"] == "none"
    maps = validate_config({"input": {"cube": small_cube}})
    assert maps["mask"]["method"] == "smooth"
    rings = config_from_args(parser.parse_args(["rings", small_cube]))
    toml = validate_config({"input": {"cube": small_cube}, "rings": {}})
    assert rings["rings"]["velocity_field"] == toml["rings"]["velocity_field"] == "gauss"
    assert rings["maps"]["method"] == toml["maps"]["method"] == "moments"


def _cases(cube, vmap, out):
    return [
        (["maps", cube, "--method", "gauss", "--components", "auto", "--vrange", "-50,120",
          "--line-free", "-300,-200;250,400", "--no-mask", "--out", out, "--no-plots",
          "--max-memory", "1GB", "--beam", "30arcsec,20arcsec,45deg", "--order", "velocity"],
         f"""[input]\ncube = "{cube}"\nvrange = [-50, 120]\nbeam = "30arcsec,20arcsec,45deg"
[noise]\nline_free = [[-300, -200], [250, 400]]\n[mask]\nmethod = "none"
[maps]\nmethod = "gauss"\ncomponents = "auto"\norder = "velocity"
[output]\ndir = "{out}"\nplots = false\n[run]\nmax_memory = "1GB"\n"""),
        (["rings", vmap, "--pa", "60", "--vsys", "900 km/s", "--velocity-error", vmap,
          "--fix", "center,inclination", "--stages", "1,3", "--bootstrap", "5",
          "--exclude-minor-axis", "15", "--out", out],
         f"""[input]\nvelocity_map = "{vmap}"\nvelocity_err = "{vmap}"
[rings]\nposition_angle = 60\nv_sys = "900 km/s"\nfix = ["center", "inclination"]
stages = [1, 3]\nbootstrap = 5\nexclude_minor_axis = 15\n[output]\ndir = "{out}"\n"""),
        (["rings", cube, "--velocity-field", "moments", "--v-sys=-40", "--out", out],
         f"""[input]\ncube = "{cube}"\n[rings]\nvelocity_field = "moments"\nv_sys = -40
[output]\ndir = "{out}"\n"""),
        (["widths", cube, "--lines", "Halpha,NII_6583", "--temperature", "1e4 K",
          "--ratio", "NII_6583/NII_6548=2.9", "--mu", "0.6", "--resolving-power", "12000",
          "--out", out],
         f"""[input]\ncube = "{cube}"\n[maps]\nresolving_power = 12000
[widths]\nlines = ["Halpha", "NII_6583"]\ntemperature = "1e4 K"\nmu = 0.6
ratios = {{ "NII_6583/NII_6548" = 2.9 }}\n[output]\ndir = "{out}"\n"""),
    ]


@pytest.mark.parametrize("case", range(4), ids=["maps", "rings-map", "rings-cube", "widths"])
def test_a_toml_file_and_the_same_command_give_the_same_config(case, small_cube, velocity_map,
                                                               tmp_path):
    argv, text = _cases(small_cube, velocity_map, str(tmp_path / "o"))[case]
    path = tmp_path / "c.toml"
    path.write_text(text)
    parser, _ = _subparsers()
    from_cli = config_from_args(parser.parse_args(argv))
    from_toml = load_config(path)
    assert from_cli == from_toml
    # and the values are the canonical ones, not the text as typed
    if case == 0:
        assert from_cli["input"]["vrange"] == [-50, 120]
        assert from_cli["noise"]["line_free"] == [[-300, -200], [250, 400]]
    if case == 1:
        assert from_cli["rings"]["position_angle"] == 60 and from_cli["rings"]["stages"] == [1, 3]
    if case == 3:
        assert from_cli["widths"]["ratios"] == {"NII_6583/NII_6548": 2.9}


def test_schema_choices_are_the_ones_the_stages_accept():
    from kinemap.io.beams import BEAM_POLICIES
    from kinemap.linefit import BASELINES, RESPONSES
    from kinemap.linefit.fit import ORDERS
    from kinemap.maps.masks import MASK_METHODS
    from kinemap.rings._validate import FINAL_GEOMETRY, FIXABLE, WEIGHTINGS

    def same(a, b):
        return set(a) == set(b)

    assert same(SCHEMA["mask"]["method"].choices, MASK_METHODS)
    assert same(SCHEMA["input"]["beams"].choices, BEAM_POLICIES)
    assert same(SCHEMA["maps"]["channel_response"].choices, RESPONSES)
    assert same(SCHEMA["maps"]["baseline"].choices, BASELINES)
    assert same(SCHEMA["maps"]["order"].choices, ORDERS)
    assert same(SCHEMA["rings"]["weighting"].choices, WEIGHTINGS)
    assert same(SCHEMA["rings"]["final_geometry"].choices, FINAL_GEOMETRY)
    assert same(SCHEMA["rings"]["fix"].choices, FIXABLE + ("center",))


@pytest.mark.parametrize("user,match", [
    ({"maps": {"method": "wavelets"}}, "must be one of moments, gauss"),
    ({"rings": {"pa": 60}}, "now called position_angle"),
    ({"rings": {"vsys": 900}}, "now called v_sys"),
    ({"input": {"velocity_error": "e.fits"}}, "now called velocity_err"),
    ({"rings": {"fix": ["center", "warp"]}}, "got 'warp'"),
    ({"rings": {"stages": "1,x"}}, "stage numbers"),
    ({"input": {"vrange": [1, 2, 3]}}, "two velocities"),
    ({"input": {"beam": "46"}}, "angle units"),
    ({"widths": {}}, "needs lines"),
    ({"run": {"max_memory": "lots"}}, "max_memory"),
])
def test_bad_toml_values_are_refused(user, match):
    user = {**user, "input": {"cube": "c.fits", **user.get("input", {})}}
    with pytest.raises(KinemapError, match=match):
        validate_config(user)


def test_parse_beam():
    b = parse_beam("30arcsec,20arcsec,45deg")
    assert b.major.to_value(u.arcsec) == pytest.approx(30.0)
    assert b.minor.to_value(u.arcsec) == pytest.approx(20.0)
    assert b.pa.to_value(u.deg) == pytest.approx(45.0)
    c = parse_beam("46arcsec")
    assert c.major == c.minor and c.minor.to_value(u.arcsec) == pytest.approx(46.0)
    assert c.pa.to_value(u.deg) == 0.0
    assert parse_beam("0.01 deg").major.to_value(u.arcsec) == pytest.approx(36.0)
    for bad in ("46", "abc", "30arcsec,20arcsec", "20arcsec,30arcsec,0deg", "-3arcsec",
                "5 km/s"):
        with pytest.raises(KinemapError, match="'beam'"):
            parse_beam(bad)


def test_bad_beam_on_the_command_line(small_cube, tmp_path):
    out = tmp_path / "o"
    code, _, err = run_cli("maps", small_cube, "--beam", "30arcsec,20", "--out", str(out))
    assert code == 2 and "Traceback" not in err
    lines = [ln for ln in err.strip().splitlines() if not ln.startswith("kinemap: warning")]
    assert len(lines) == 1 and "'beam' must look like" in lines[0], err
    assert not out.exists()


def _readme_example(option):
    """The example of ``option`` exactly as the README's options table writes it."""
    m = re.search(rf"^\| `({re.escape(option)} [^`]+)` \|", README.read_text(), re.M)
    assert m, f"README has no example for {option}"
    return shlex.split(m.group(1))


def test_readme_negative_value_examples_run(small_cube, tmp_path):
    vrange = _readme_example("--vrange")
    line_free = _readme_example("--line-free")
    assert vrange == ["--vrange", "-50,120"] and line_free[1].startswith("-")

    code, out, err = run_cli("info", small_cube, *vrange)
    assert code == 0, err
    assert "-50.0000 to 120.0000 km/s" in out
    code, out, err = run_cli("info", small_cube, *line_free)
    assert code == 0, err
    assert "(line-free ranges)" in out
    # the --opt=value form keeps working
    code, out, err = run_cli("info", small_cube, "=".join(vrange))
    assert code == 0 and "-50.0000 to 120.0000 km/s" in out, err

    o = tmp_path / "o"
    code, _, err = run_cli("maps", small_cube, *vrange, "--out", str(o),
                           "--no-plots", "--no-progress", "--no-mask")
    assert code == 0, err
    assert fits.getdata(o / "nchan.fits").max() == 18  # -50..120 km/s in 10 km/s channels
    o2 = tmp_path / "o2"
    code, _, err = run_cli("maps", small_cube, *line_free, "--out", str(o2), "--no-plots",
                           "--no-progress")
    assert code == 0, err
    # the noise from the line-free channels is the injected 0.05
    assert np.median(fits.getdata(o2 / "noise.fits")) == pytest.approx(0.05, rel=0.15)
    options = json.loads((o2 / "manifest.json").read_text())["options"]
    assert options["noise"]["line_free"] == [[-300, -200], [250, 400]]


def test_negative_values_of_plain_numbers_and_bad_numbers(small_cube, tmp_path):
    assert main(["maps", small_cube, "--vrange", "-50 km/s,120 km/s", "--no-mask",
                 "--out", str(tmp_path / "o"), "--no-plots", "--no-progress"]) == 0
    code, _, err = run_cli("maps", small_cube, "--smooth-channels", "three")
    assert code == 2 and "--smooth-channels" in err and "whole number" in err
    code, _, err = run_cli("maps", small_cube, "--vrange", "-50")
    assert code == 2 and "two velocities" in err
