"""The ``kinemap`` command.

Every subcommand builds the same configuration dict a TOML file would give
(:mod:`kinemap.pipeline.config`) and hands it to :mod:`kinemap.pipeline.runner`.  The
options are built from the config schema: their flags, help, units, allowed values and
defaults all come from :data:`kinemap.pipeline.config.SCHEMA`, and an option not given on
the command line is left out of the dict, so the schema's default applies exactly as it
would for a TOML file.  User mistakes end with one line on stderr and exit code 2
(``--debug`` shows the traceback).
"""
from __future__ import annotations

import argparse
import re
import signal
import sys
import warnings

from kinemap._version import __version__
from kinemap.errors import KinemapError, KinemapWarning
from kinemap.pipeline.config import SCHEMA

__all__ = ["main", "build_parser", "config_from_args", "COMMANDS"]

EXIT_USAGE = 2

# A value that starts with a minus and a digit or point ("-50,120", "-300,-200;250,400",
# "-.5") is a value, never an option: no kinemap option looks like that.
_NEGATIVE_VALUE = re.compile(r"^-\.?\d")


class _Parser(argparse.ArgumentParser):
    """argparse, but a usage error is one line (and exit code 2), and an option's value may
    start with a minus (``--vrange -50,120``; argparse alone only accepts plain negative
    numbers there)."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self._value_flags: set[str] = set()

    def add_argument(self, *args, **kwargs):
        return self._note(super().add_argument(*args, **kwargs))

    def _note(self, action):
        """Remember the flags of an option that takes one value."""
        if action.option_strings and action.nargs is None and action.const is None:
            self._value_flags.update(action.option_strings)
        return action

    def parse_known_args(self, args=None, namespace=None):
        args = list(sys.argv[1:] if args is None else args)
        out = []
        i = 0
        while i < len(args):
            a = args[i]
            if a == "--":
                out += args[i:]
                break
            if (a in self._value_flags and i + 1 < len(args)
                    and _NEGATIVE_VALUE.match(args[i + 1])):
                out.append(f"{a}={args[i + 1]}")
                i += 2
                continue
            out.append(a)
            i += 1
        return super().parse_known_args(out, namespace)

    def error(self, message):
        self.exit(EXIT_USAGE, f"kinemap: error: {message} (see '{self.prog} --help')\n")


def _group(p: _Parser, title):
    """An option group whose options the parser remembers too (a group's add_argument does
    not go through the parser's)."""
    g = p.add_argument_group(title)
    base = g.add_argument
    g.add_argument = lambda *args, **kwargs: p._note(base(*args, **kwargs))
    return g


_READING = ("reading the cube",
            [("input", k) for k in ("convention", "rest_value", "frame", "vrange", "box",
                                    "region", "beams", "beam", "bunit", "unit")]
            + [("noise", "line_free")])
_CONTINUUM = ("continuum under the lines",
              [("continuum", k) for k in ("method", "line_window", "write_continuum")])
_OUTPUT = ("output", [("output", "dir"), ("output", "overwrite"), ("output", "plots"),
                      ("run", "progress")])
_EXECUTION = ("execution", [("run", "max_memory"), ("run", "scheduler"), ("run", "workers")])

# command -> (help, positional argument and its help, config sections the command runs,
# option groups as (title, [(section, key), ...])).  Which options a command offers is
# decided here; everything about an option itself is in the schema.
COMMANDS = {
    "info": ("show what the reader understood about a cube", ("cube", "the cube (FITS)"), (),
             [_READING, ("continuum under the lines", [("continuum", "method"),
                                                       ("continuum", "line_window")])]),
    "maps": ("intensity, velocity and dispersion maps", ("cube", "the cube (FITS)"), ("maps",),
             [("maps", [("maps", "method"), ("maps", "line"), ("maps", "lines"),
                        ("maps", "channel_response")]),
              ("Gaussian fits (--method gauss)",
               [("maps", k) for k in ("components", "baseline", "instrument_sigma",
                                      "resolving_power", "order", "snr_threshold",
                                      "write_model")]),
              ("signal mask", [("mask", k) for k in ("method", "threshold", "grow_threshold",
                                                     "smooth_channels", "min_pixels", "file",
                                                     "mode")]),
              _READING, _CONTINUUM, _OUTPUT, _EXECUTION]),
    "rings": ("rotation curve: tilted-ring fit of a velocity field",
              ("input", "a velocity map (2D FITS, km/s) or a cube"), ("rings",),
              [("geometry (first guesses are automatic when not given)",
                [("rings", k) for k in ("center", "position_angle", "inclination", "v_sys",
                                        "fix")]),
               ("model", [("rings", "model")]),
               ("rings", [("rings", k) for k in ("ring_width", "distance", "weighting",
                                                 "exclude_minor_axis", "stages",
                                                 "final_geometry", "bootstrap")]),
               ("velocity field", [("rings", "velocity_field"), ("input", "velocity_err"),
                                   ("input", "intensity")]),
               ("signal mask (cube input)", [("mask", "file"), ("mask", "mode")]),
               _READING, _CONTINUUM, _OUTPUT, _EXECUTION]),
    "widths": ("line-width budget: instrumental, thermal, non-thermal", ("cube", "the cube (FITS)"),
               ("widths",),
               [("lines and physics",
                 [("widths", k) for k in ("lines", "temperature", "temperature_err",
                                          "temperature_map", "mu", "free_velocity", "ratios",
                                          "catalogue")]
                 + [("maps", "instrument_sigma"), ("maps", "resolving_power"),
                    ("maps", "channel_response"), ("widths", "snr_threshold"),
                    ("widths", "baseline")]),
                ("signal mask", [("mask", "method"), ("mask", "file"), ("mask", "mode")]),
                _READING, _CONTINUUM, _OUTPUT, _EXECUTION]),
    "turbulence": ("structure function, size-linewidth, sonic scale, velocity gradients",
                   ("cube", "the cube (FITS)"), ("turbulence",),
                   [("turbulence", [("turbulence", k) for k in (
                       "velocity_field", "distance", "lag_range", "nlags", "weighting",
                       "gradient_window")]),
                    ("line widths (--lines adds sigma_nt and the sonic scale)",
                     [("widths", k) for k in ("lines", "temperature", "temperature_err",
                                              "temperature_map", "mu")]),
                    ("Gaussian fits", [("maps", k) for k in ("components", "snr_threshold",
                                                             "channel_response")]),
                    ("signal mask", [("mask", "method"), ("mask", "threshold"), ("mask", "file"),
                                     ("mask", "mode")]),
                    _READING, _CONTINUUM, _OUTPUT, _EXECUTION]),
    # --- extraction: kinemap spectrum and kinemap pv ---
    "spectrum": ("a spectrum at a position, in a region or over the whole map, with errors",
                 ("cube", "the cube (FITS)"), ("spectrum",),
                 [("where (one of --at, --region, --global)",
                   [("spectrum", "at"), ("spectrum", "radius"), ("input", "region"),
                    ("spectrum", "global")]),
                  ("reading the cube", [item for item in _READING[1]
                                        if item != ("input", "region")]),
                  _CONTINUUM, _OUTPUT, _EXECUTION]),
    "pv": ("position-velocity diagram along a cut", ("cube", "the cube (FITS)"), ("pv",),
           [("the cut (one of --path, --center with --pa and --length, --region)",
             [("pv", k) for k in ("path", "center", "position_angle", "length", "region",
                                  "width")]),
            ("ring model", [("pv", "rings")]),
            ("reading the cube", [item for item in _READING[1] if item != ("input", "region")]),
            _CONTINUUM, _OUTPUT, _EXECUTION]),
    # ---- channel maps and stacking ----
    "channels": ("channel maps: a grid of panels with contours and the beam, paged into "
                 "PNGs and one PDF", ("cube", "the cube (FITS)"), ("channels",),
                 [("channel maps", [("channels", "every"), ("channels", "levels")]),
                  _READING, _CONTINUUM, _OUTPUT, _EXECUTION]),
    "stack": ("stack spectra shifted by their velocity, per radius or map bin, and fit "
              "their widths", ("cube", "the cube (FITS)"), ("stack",),
              [("velocities", [("stack", "velocity_map"), ("stack", "velocity_field")]),
               ("bins", [("stack", k) for k in ("bins", "edges", "bin_width", "center",
                                                "position_angle", "inclination", "rings")]),
               ("fit", [("stack", "components"), ("maps", "channel_response")]),
               _READING, _CONTINUUM, _OUTPUT, _EXECUTION]),
}


def _dest(section: str, key: str) -> str:
    return f"{section}__{key}"


def command_options(command: str):
    """``(section, key)`` of every schema option the command offers."""
    return [item for _, items in COMMANDS[command][3] for item in items]


def _value_type(section, key):
    opt = SCHEMA[section][key]

    def convert(text):
        try:
            return opt.canonical(text)
        except (ValueError, TypeError) as exc:
            raise argparse.ArgumentTypeError(str(exc)) from None

    convert.__name__ = key
    return convert


def _add_option(g, section, key, sections):
    opt = SCHEMA[section][key]
    flag = opt.flag(key)
    if flag is None:
        raise ValueError(f"[{section}] {key} has no command-line flag")  # a bug in COMMANDS
    dest = _dest(section, key)
    kw = {"dest": dest, "default": argparse.SUPPRESS, "help": opt.help_text(sections)}
    if bool in opt.types:
        g.add_argument(flag, *opt.aliases, action="store_const", const=not opt.default, **kw)
        return
    if opt.repeat:
        g.add_argument(flag, *opt.aliases, action="append", metavar=opt.metavar, **kw)
        return
    listed = list in opt.types
    if opt.choices is not None and not listed:
        kw["choices"] = opt.choices
    else:
        kw["metavar"] = opt.metavar
    if opt.required and section in sections:  # optional where the section is an extra
        kw["required"] = True
    g.add_argument(flag, *opt.aliases, type=_value_type(section, key), **kw)
    for short, value in opt.shortcuts:
        g.add_argument(short, dest=dest, action="store_const", const=value,
                       default=argparse.SUPPRESS, help=f"same as {flag} {value}")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="kinemap", description="Kinematics from spectral-line cubes.")
    parser.add_argument("--version", action="version", version=f"kinemap {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    for command, (help_, (pos, pos_help), sections, groups) in COMMANDS.items():
        p = sub.add_parser(command, help=help_)
        p.add_argument(pos, help=pos_help)
        for title, items in groups:
            g = _group(p, title)
            for section, key in items:
                _add_option(g, section, key, sections)

    p = sub.add_parser("run", help="run the stages described in a TOML config")
    p.add_argument("config")
    p.add_argument("--out", help="override [output] dir")
    p.add_argument("--overwrite", action="store_true", help="override [output] overwrite")

    p = sub.add_parser("demo", help="make the invented demo cubes and run everything on them")
    p.add_argument("--out", default="kinemap-demo", metavar="DIR")
    p.add_argument("--overwrite", action="store_true")
    p.add_argument("--no-progress", action="store_true")
    return parser


def user_config_from_args(args) -> dict:
    """The config dict (before validation) a command's options describe: the command's
    sections, and only the keys given on the command line."""
    _, (pos, _), sections, _ = COMMANDS[args.command]
    user: dict = {"input": {}}
    for section in sections:
        user.setdefault(section, {})
    given = vars(args)
    for section, key in command_options(args.command):
        dest = _dest(section, key)
        if dest in given:
            user.setdefault(section, {})[key] = given[dest]
    target = getattr(args, pos)
    key = "cube"
    if args.command == "rings":
        from kinemap.io.maps import is_2d_image

        if is_2d_image(target):
            key = "velocity_map"
    user["input"][key] = target
    return user


def config_from_args(args) -> dict:
    from kinemap.pipeline.config import validate_config

    return validate_config(user_config_from_args(args))


def _cmd_info(args) -> int:
    from kinemap.pipeline.info import describe

    print(describe(config_from_args(args)))
    return 0


def _run(args):
    """Run the command's stages, write the products and say what was written; the config
    and the run's state (for the command's own summary line)."""
    from kinemap.pipeline.runner import run_config

    cfg = config_from_args(args)
    state = run_config(cfg)
    _report(state, cfg["output"]["dir"])
    return cfg, state


def _cmd_maps(args) -> int:
    _run(args)
    return 0


def _cmd_rings(args) -> int:
    cfg, state = _run(args)
    s = state.results["rings"].summary()
    if state.cube is not None:
        print(f"kinemap: model {cfg['rings']['model']} "
              + ("(disk model fitted to the cube)" if cfg["rings"]["model"] == "3d" else
                 "(tilted rings on the velocity field; --model 3d fits the cube)"))
    print(f"kinemap: PA {s['position_angle_deg']:.1f} deg, inclination {s['inclination_deg']:.1f} "
          f"deg, v_sys {s['v_sys_kms']:.1f} km/s; {s['rings_fitted']} rings fitted, "
          f"{s['rings_failed']} could not be fitted (see rotation_curve.ecsv, column status)")
    return 0


def _cmd_widths(args) -> int:
    _, state = _run(args)
    s = state.results["widths"].summary()
    parts = [f"median non-thermal sigma {s['median_nonthermal_dispersion_kms']:.3g} km/s"
             if s.get("median_nonthermal_dispersion_kms") is not None else "no valid pixel",
             f"median Mach number {s['median_mach_number']:.3g}"
             if s.get("median_mach_number") is not None else ""]
    print("kinemap: " + ", ".join(p for p in parts if p))
    return 0


def _cmd_turbulence(args) -> int:
    _, state = _run(args)
    s = state.results["turbulence"].summary()

    def show(key, fmt):
        value, err = s.get(key), s.get(key.replace("_slope", "_slope_err"))
        return "n/a" if value is None else format(value, fmt) + (
            f" +- {err:{fmt}}" if err is not None and key.endswith("slope") else "")
    grad = next(k for k in s if k.startswith("gradient_kms"))
    parts = [f"structure function slope {show('structure_function_slope', '.2f')}",
             f"size-linewidth slope {show('size_linewidth_slope', '.2f')} (centroids "
             f"{show('size_linewidth_centroid_slope', '.2f')})",
             f"gradient {show(grad, '.3g')} "
             f"{'km/s/pc' if grad.endswith('_pc') else 'km/s/arcsec'} "
             f"towards PA {show('gradient_position_angle_deg', '.0f')} deg"]
    if "sonic_scale_note" in s:
        parts.append(f"sonic scale {s['sonic_scale_arcsec']:.0f} arcsec" if
                     s["sonic_scale_reached"] else "sonic scale " + s["sonic_scale_note"])
    print("kinemap: " + "; ".join(parts))
    return 0


def _cmd_spectrum(args) -> int:
    _, state = _run(args)
    s = state.results["spectrum"].summary()
    fit = (f"Gaussian at {s['fit_centre_kms']:.2f} km/s, dispersion "
           f"{s['fit_dispersion_kms']:.2f} km/s" if s["fit_status"] == "ok"
           else f"no Gaussian fit ({s['fit_status']})")
    unit = s["unit"] or "no unit (the cube has no BUNIT)"
    print(f"kinemap: spectrum of {s['aperture']}: {s['n_pixels']} pixels, {unit}; integral "
          f"{s['integrated']:.4g} +- {s['integrated_err']:.2g} {s['unit']} km/s".replace("  ", " ")
          + f"; {fit}")
    return 0


def _cmd_pv(args) -> int:
    _, state = _run(args)
    s = state.results["pv"].summary()
    print(f"kinemap: {s['cut']}: {s['n_offset']} positions over {s['length_arcsec']:.1f} arcsec"
          + (f", averaged over {s['width_arcsec']:g} arcsec" if s["width_arcsec"] else "")
          + ("; ring model drawn" if s["ring_model"] else ""))
    return 0


def _cmd_channels(args) -> int:
    _, state = _run(args)
    s = state.results["channels"].summary()
    print(f"kinemap: {s['panels']} channel maps ({s['channels_per_panel']} channel(s) each) on "
          f"{s['pages']} page(s): channel_maps_p1.png ... and channel_maps.pdf")
    return 0


def _cmd_stack(args) -> int:
    _, state = _run(args)
    s = state.results["stack"].summary()
    print(f"kinemap: {s['spectra_stacked']} spectra stacked into {s['bins']} bins of "
          f"{s['binned_by']}; {s['bins_fitted']} fitted (see stack_fits.ecsv)")
    return 0


def _cmd_run(args) -> int:
    from kinemap.pipeline.config import load_config
    from kinemap.pipeline.runner import run_config

    cfg = load_config(args.config)
    if args.out:
        cfg["output"]["dir"] = args.out
    if args.overwrite:
        cfg["output"]["overwrite"] = True
    state = run_config(cfg)
    _report(state, cfg["output"]["dir"])
    return 0


def _cmd_demo(args) -> int:
    from kinemap.datasets.demo import run_demo

    index = run_demo(args.out, overwrite=args.overwrite, progress=not args.no_progress)
    print(f"kinemap demo: wrote {index}")
    return 0


def _report(state, out):
    continuum = state.results.get("continuum")
    if continuum is not None and continuum.requested != "none":
        print(f"kinemap: {continuum.message}")
    n = len(state.manifest["products"])
    empty = len(state.manifest.get("empty_products", ()))
    total = sum(state.manifest["timings"].values())
    print(f"kinemap: wrote {n} product{'' if n == 1 else 's'}"
          + (f" ({empty} of them all NaN)" if empty else "")
          + f" to {out} in {total:.1f} s (velocities: {state.meta.convention} convention, "
          f"frame {state.meta.frame or 'unknown'})")


def _terminate(signum, frame):
    """SIGTERM ends a run as Ctrl-C does: the same clean-up, nothing half-written."""
    raise KeyboardInterrupt


def _interrupted() -> str:
    from kinemap.io.outdir import published

    done = published()
    if done:
        return (f"kinemap: interrupted after the products were written; {done[-1]} is "
                "complete")
    return "kinemap: interrupted; nothing was written"


def _one_line_warnings(message, category, filename, lineno, file=None, line=None):
    if issubclass(category, KinemapWarning):
        return f"kinemap: warning: {message}\n"
    return f"kinemap: warning ({category.__name__}): {message}\n"


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_USAGE
    warnings.formatwarning = _one_line_warnings
    signal.signal(signal.SIGTERM, _terminate)
    if hasattr(signal, "SIGXFSZ"):  # past a file-size limit a write fails (EFBIG), no core dump
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    if not args.debug:
        # Library chatter (spectral-cube, astropy) is not for the user of a command.
        warnings.filterwarnings("ignore", module="spectral_cube")
        warnings.filterwarnings("ignore", category=RuntimeWarning)
    handler = {"info": _cmd_info, "maps": _cmd_maps, "rings": _cmd_rings, "widths": _cmd_widths,
               "turbulence": _cmd_turbulence, "run": _cmd_run, "demo": _cmd_demo,
               "spectrum": _cmd_spectrum, "pv": _cmd_pv,
               "channels": _cmd_channels, "stack": _cmd_stack}
    try:
        return handler[args.command](args)
    except KinemapError as exc:
        if args.debug:
            raise
        print(f"kinemap: error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print(_interrupted(), file=sys.stderr)
        return 130
    except MemoryError:
        if args.debug:
            raise
        print("kinemap: error: out of memory; lower --max-memory or cut the cube with --box or "
              "--vrange", file=sys.stderr)
        return 1
    except Exception as exc:  # an internal bug: short message, traceback on request
        if args.debug:
            raise
        print(f"kinemap: internal error: {type(exc).__name__}: {exc} (rerun with --debug for "
              "the traceback and please report it)", file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())


def entry() -> int:
    """The ``kinemap`` console script: :func:`main`, then an exit without the
    interpreter's last garbage collection.

    That collection walks every object astropy, numba and matplotlib made (about half a
    second, after the work is done and its files are closed); frozen (``gc.freeze``), the
    objects are freed by reference counting alone.  The exit is otherwise as usual: exit
    handlers run, threads are joined, output is flushed.  Only for the command: a caller
    of :func:`main` in a longer-lived process keeps its garbage collection.
    """
    import gc

    code = main()
    gc.freeze()
    return code
