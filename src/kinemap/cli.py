"""The ``kinemap`` command.

Every subcommand builds the same configuration dict a TOML file would give
(:mod:`kinemap.pipeline.config`) and hands it to :mod:`kinemap.pipeline.runner`.  User mistakes end with
one line on stderr and exit code 2 (``--debug`` shows the traceback).
"""
from __future__ import annotations

import argparse
import sys
import warnings

from kinemap._version import __version__
from kinemap.errors import KinemapError, KinemapWarning

__all__ = ["main", "build_parser"]

EXIT_USAGE = 2


class _Parser(argparse.ArgumentParser):
    """argparse, but a usage error is one line (and exit code 2)."""

    def error(self, message):
        self.exit(EXIT_USAGE, f"kinemap: error: {message} (see '{self.prog} --help')\n")


def _add_cube_options(p):
    g = p.add_argument_group("reading the cube")
    g.add_argument("--convention", choices=["radio", "optical", "relativistic"],
                   help="velocity convention (default: radio for frequency axes, optical for "
                        "wavelength axes, a velocity axis keeps its own)")
    g.add_argument("--rest-value", metavar="QUANTITY",
                   help="rest frequency or wavelength, e.g. '1420.405751768 MHz' (overrides "
                        "the header)")
    g.add_argument("--frame", metavar="SPECSYS",
                   help="spectral frame of the output velocities (TOPOCENT, BARYCENT, LSRK); "
                        "default: the cube's")
    g.add_argument("--vrange", metavar="V1,V2", help="keep channels in this velocity range (km/s)")
    g.add_argument("--box", metavar="X0:X1,Y0:Y1", help="pixel box (0-based, end exclusive)")
    g.add_argument("--region", metavar="FILE", help="DS9 or CRTF region file")
    g.add_argument("--beams", choices=["common", "refuse"], default="common",
                   help="cube with a beam per channel: convolve to a common beam or refuse")
    g.add_argument("--bunit", help="unit of the cube values when BUNIT is missing or wrong")
    g.add_argument("--line-free", metavar="V1,V2[;V3,V4]",
                   help="line-free velocity ranges (km/s) for the noise; default: automatic")


def _add_output_options(p):
    g = p.add_argument_group("output")
    g.add_argument("--out", default="kinemap-out", metavar="DIR", help="output folder")
    g.add_argument("--overwrite", action="store_true", help="write into a non-empty folder")
    g.add_argument("--no-plots", action="store_true", help="skip PNG plots")
    g.add_argument("--no-progress", action="store_true", help="no progress bars")
    g = p.add_argument_group("execution")
    g.add_argument("--max-memory", metavar="SIZE",
                   help="working-set bound of the block-wise stages, e.g. 1GB (default: a "
                        "quarter of the machine's memory)")
    g.add_argument("--scheduler", metavar="ADDRESS",
                   help="run the blocks on a running dask.distributed scheduler (tcp://host:port)")
    g.add_argument("--workers", type=int, metavar="N",
                   help="start a local cluster of N worker processes for this run")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="kinemap", description="Kinematics from spectral-line cubes.")
    parser.add_argument("--version", action="version", version=f"kinemap {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    p = sub.add_parser("info", help="show what the reader understood about a cube")
    p.add_argument("cube")
    _add_cube_options(p)

    p = sub.add_parser("maps", help="intensity, velocity and dispersion maps")
    p.add_argument("cube")
    p.add_argument("--method", choices=["moments", "gauss"], default="moments",
                   help="moments: moment maps with analytic errors; gauss: also a Gaussian fit "
                        "of every spectrum")
    p.add_argument("--channel-response", choices=["tophat", "hanning", "none"], default="tophat",
                   help="how channels sample the spectrum (sets noise correlation)")
    g = p.add_argument_group("Gaussian fits (--method gauss)")
    g.add_argument("--components", default="1", choices=["1", "2", "3", "auto"],
                   help="Gaussian components per spectrum; auto chooses 1-3 by BIC")
    g.add_argument("--baseline", choices=["none", "constant", "linear"], default="none",
                   help="baseline fitted with the lines (default none: cubes are usually "
                        "continuum-subtracted, and a free baseline trades off against the wings "
                        "of lines that fill the band)")
    g.add_argument("--instrument-sigma", metavar="VELOCITY",
                   help="Gaussian instrumental sigma, e.g. '5 km/s'")
    g.add_argument("--resolving-power", type=float, metavar="R",
                   help="instrumental resolution R (FWHM = c/R)")
    g.add_argument("--order", choices=["flux", "velocity"], default="flux",
                   help="component order: brightest first (default) or by velocity")
    g.add_argument("--snr-threshold", type=float, default=3.0,
                   help="spectra with a lower peak S/N are not fitted (default 3)")
    g.add_argument("--write-model", action="store_true", help="also write model and residual cubes")
    g = p.add_argument_group("signal mask")
    g.add_argument("--mask", choices=["smooth", "threshold"], default="smooth",
                   help="smooth-and-mask (default) or a plain S/N threshold")
    g.add_argument("--no-mask", action="store_true", help="use every finite channel")
    g.add_argument("--threshold", type=float, help="S/N threshold (default 5 smooth, 3 plain)")
    g.add_argument("--grow-threshold", type=float, default=2.0,
                   help="smooth mask grows into voxels above this smoothed S/N")
    g.add_argument("--smooth-channels", type=int, default=3)
    g.add_argument("--min-pixels", type=int, help="smallest island footprint kept (pixels)")
    _add_cube_options(p)
    _add_output_options(p)

    p = sub.add_parser("rings", help="rotation curve: tilted-ring fit of a velocity field")
    p.add_argument("input", help="a velocity map (2D FITS, km/s) or a cube")
    g = p.add_argument_group("geometry (first guesses are automatic when not given)")
    g.add_argument("--center", metavar="RA,DEC", help="centre, degrees or sexagesimal")
    g.add_argument("--pa", metavar="DEG", help="position angle, east of north to the receding side")
    g.add_argument("--inclination", metavar="DEG", help="0 face-on, 90 edge-on")
    g.add_argument("--vsys", metavar="VELOCITY", help="systemic velocity (km/s or with a unit)")
    g.add_argument("--fix", metavar="NAMES", help="comma-separated parameters held fixed: "
                   "center, position_angle, inclination, v_sys, v_exp")
    g = p.add_argument_group("rings")
    g.add_argument("--ring-width", metavar="ARCSEC", help="default: about one beam")
    g.add_argument("--distance", metavar="DIST", help="e.g. '10 Mpc': radii in kpc and M(<R)")
    g.add_argument("--weighting", choices=["uniform", "cos", "cos2"], default="cos",
                   help="angular weight |cos theta| (default), cos^2 theta, or none")
    g.add_argument("--exclude-minor-axis", default="20", metavar="DEG",
                   help="half-width of the wedge around the minor axis left out (default 20)")
    g.add_argument("--stages", default="1,2,3", help="stages to run (default 1,2,3)")
    g.add_argument("--final-geometry", choices=["median", "polynomial", "rings", "global"],
                   default="median", help="stage 3: how the ring geometry is smoothed")
    g.add_argument("--bootstrap", type=int, default=0, metavar="N", help="bootstrap resamples")
    g.add_argument("--method", choices=["gauss", "moments"], default="gauss",
                   help="for a cube input: velocity field from Gaussian fits (default) or moment 1")
    g.add_argument("--velocity-error", metavar="FITS", help="error map for a velocity-map input")
    g.add_argument("--intensity", metavar="FITS", help="intensity map for a velocity-map input")
    _add_cube_options(p)
    _add_output_options(p)

    p = sub.add_parser("widths", help="line-width budget: instrumental, thermal, non-thermal")
    p.add_argument("cube")
    g = p.add_argument_group("lines and physics")
    g.add_argument("--lines", required=True, metavar="NAME[,NAME...]",
                   help="catalogue names, brightest first (e.g. Halpha,NII_6583,NII_6548)")
    g.add_argument("--temperature", metavar="T", help="assumed temperature, e.g. '1e4 K'")
    g.add_argument("--temperature-err", metavar="T", help="its 1-sigma error")
    g.add_argument("--temperature-map", metavar="FITS", help="assumed temperature per pixel (K)")
    g.add_argument("--mu", type=float, default=2.33,
                   help="mean particle mass / m_H for the sound speed (2.33 molecular, 0.6 ionized)")
    g.add_argument("--free-velocity", action="store_true", help="a velocity per line")
    g.add_argument("--ratio", action="append", metavar="STRONG/WEAK=R",
                   help="fixed flux ratio (default NII_6583/NII_6548=3.0); repeatable")
    g.add_argument("--catalogue", metavar="TOML", help="extra lines (same schema as the built-in)")
    g.add_argument("--instrument-sigma", metavar="VELOCITY", help="instrumental sigma, e.g. '5 km/s'")
    g.add_argument("--resolving-power", type=float, metavar="R", help="FWHM = c/R")
    g.add_argument("--channel-response", choices=["tophat", "hanning", "none"], default="tophat")
    g.add_argument("--snr-threshold", type=float, default=3.0)
    g = p.add_argument_group("signal mask")
    g.add_argument("--mask", choices=["smooth", "threshold", "none"], default="none",
                   help="which pixels to fit (default none: every pixel above the S/N threshold)")
    _add_cube_options(p)
    _add_output_options(p)

    p = sub.add_parser("run", help="run the stages described in a TOML config")
    p.add_argument("config")
    p.add_argument("--out", help="override [output] dir")
    p.add_argument("--overwrite", action="store_true")

    p = sub.add_parser("demo", help="make the invented demo cubes and run everything on them")
    p.add_argument("--out", default="kinemap-demo", metavar="DIR")
    p.add_argument("--overwrite", action="store_true")
    p.add_argument("--no-progress", action="store_true")
    return parser


def config_from_args(args) -> dict:
    from kinemap.pipeline.config import validate_config

    cube = getattr(args, "cube", None)
    velocity_map = None
    if getattr(args, "command", None) == "rings":
        from kinemap.io.maps import is_2d_image

        if is_2d_image(args.input):
            velocity_map = args.input
        else:
            cube = args.input
    user = {
        "input": {"cube": cube, "convention": args.convention, "rest_value": args.rest_value,
                  "frame": args.frame, "vrange": args.vrange, "box": args.box,
                  "region": args.region, "beams": args.beams, "bunit": args.bunit},
        "noise": {"line_free": args.line_free or "auto"},
    }
    if getattr(args, "command", None) == "rings":
        user["input"].update({"velocity_map": velocity_map, "velocity_error": args.velocity_error,
                              "intensity": args.intensity})
        try:
            stages = [int(x) for x in args.stages.split(",") if x.strip()]
        except ValueError:
            raise KinemapError(f"'stages' must look like '1,2,3', got {args.stages!r}") from None
        user["rings"] = {"center": args.center, "pa": args.pa, "inclination": args.inclination,
                         "vsys": args.vsys, "ring_width": args.ring_width,
                         "distance": args.distance, "weighting": args.weighting,
                         "exclude_minor_axis": args.exclude_minor_axis, "stages": stages,
                         "final_geometry": args.final_geometry, "bootstrap": args.bootstrap,
                         "fix": [f.strip() for f in (args.fix or "").split(",") if f.strip()]}
        user["output"] = {"dir": args.out, "overwrite": args.overwrite, "plots": not args.no_plots}
        user["run"] = _run_options(args)
        if cube is not None:
            user["maps"] = {"method": args.method}
    if getattr(args, "command", None) == "widths":
        user["widths"] = {"lines": args.lines, "temperature": args.temperature,
                          "temperature_err": args.temperature_err,
                          "temperature_map": args.temperature_map, "mu": args.mu,
                          "free_velocity": args.free_velocity, "ratios": args.ratio,
                          "catalogue": args.catalogue, "snr_threshold": args.snr_threshold}
        user["maps"] = {"instrument_sigma": args.instrument_sigma,
                        "resolving_power": args.resolving_power,
                        "channel_response": args.channel_response}
        user["mask"] = {"method": args.mask}
        user["output"] = {"dir": args.out, "overwrite": args.overwrite, "plots": not args.no_plots}
        user["run"] = _run_options(args)
    if getattr(args, "command", None) == "maps":
        mask = {"method": "none" if args.no_mask else args.mask, "threshold": args.threshold,
                "grow_threshold": args.grow_threshold, "smooth_channels": args.smooth_channels,
                "min_pixels": args.min_pixels}
        user["mask"] = mask
        user["maps"] = {"method": args.method, "channel_response": args.channel_response,
                        "components": args.components if args.components == "auto"
                        else int(args.components), "baseline": args.baseline,
                        "instrument_sigma": args.instrument_sigma,
                        "resolving_power": args.resolving_power, "order": args.order,
                        "snr_threshold": args.snr_threshold, "write_model": args.write_model}
        user["output"] = {"dir": args.out, "overwrite": args.overwrite, "plots": not args.no_plots}
        user["run"] = _run_options(args)
    return validate_config(user)


def _run_options(args) -> dict:
    from kinemap.pipeline.config import parse_size

    if args.max_memory is not None:
        parse_size(args.max_memory)  # fail early on a bad size
    return {"max_memory": args.max_memory, "progress": not args.no_progress,
            "scheduler": args.scheduler, "workers": args.workers}


def _cmd_info(args) -> int:
    from kinemap.pipeline.info import describe

    print(describe(config_from_args(args)))
    return 0


def _cmd_maps(args) -> int:
    from kinemap.pipeline.runner import run_config

    state = run_config(config_from_args(args))
    _report(state, args.out)
    return 0


def _cmd_rings(args) -> int:
    from kinemap.pipeline.runner import run_config

    state = run_config(config_from_args(args))
    _report(state, args.out)
    s = state.results["rings"].summary()
    print(f"kinemap: PA {s['position_angle_deg']:.1f} deg, inclination {s['inclination_deg']:.1f} "
          f"deg, v_sys {s['v_sys_kms']:.1f} km/s; {s['rings_fitted']} rings fitted, "
          f"{s['rings_failed']} could not be fitted (see rotation_curve.ecsv, column status)")
    return 0


def _cmd_widths(args) -> int:
    from kinemap.pipeline.runner import run_config

    state = run_config(config_from_args(args))
    _report(state, args.out)
    s = state.results["widths"].summary()
    parts = [f"median non-thermal sigma {s['median_nonthermal_dispersion_kms']:.3g} km/s"
             if s.get("median_nonthermal_dispersion_kms") is not None else "no valid pixel",
             f"median Mach number {s['median_mach_number']:.3g}"
             if s.get("median_mach_number") is not None else ""]
    print("kinemap: " + ", ".join(p for p in parts if p))
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
    n = len(state.manifest["products"])
    total = sum(state.manifest["timings"].values())
    print(f"kinemap: wrote {n} products to {out} in {total:.1f} s "
          f"(velocities: {state.meta.convention} convention, frame "
          f"{state.meta.frame or 'unknown'})")


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
    if not args.debug:
        # Library chatter (spectral-cube, astropy) is not for the user of a command.
        warnings.filterwarnings("ignore", module="spectral_cube")
        warnings.filterwarnings("ignore", category=RuntimeWarning)
    handler = {"info": _cmd_info, "maps": _cmd_maps, "rings": _cmd_rings, "widths": _cmd_widths,
               "run": _cmd_run, "demo": _cmd_demo}
    try:
        return handler[args.command](args)
    except KinemapError as exc:
        if args.debug:
            raise
        print(f"kinemap: error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print("kinemap: interrupted; nothing was written", file=sys.stderr)
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
