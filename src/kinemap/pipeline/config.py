"""Run configuration: one schema for TOML files and command-line options.

A configuration is a dict of sections.  ``kinemap run CONFIG.toml`` reads one from TOML;
the other commands build the same dict from their options, so every route runs the same
stages with the same validation.  Unknown sections or keys are errors (a typo must not be
silently ignored).

:data:`SCHEMA` is the one place that says, for every key: its types, its default, its
allowed values, its help text and unit, and its command-line flag (the ``kinemap``
command builds its options from it).  Values given as text (every command-line value, and
TOML strings) are turned into one canonical form here, so ``--vrange -50,120`` and
``vrange = [-50, 120]`` give the same config.  ``kinemap widths`` and a TOML file with a
[widths] section share the widths' mask default through :attr:`Option.default_when`.

Sections and keys (defaults in brackets)::

    [input]   cube (required unless velocity_map), convention, rest_value, frame,
              vrange = [v1, v2], box, region, beams ["common"], beam ("46arcsec" or
              "30arcsec,20arcsec,45deg"), bunit, unit ("K" | "Jy/beam": convert the
              values), hdu;
              velocity_map, velocity_err, intensity (2D FITS maps for [rings])
    [continuum] method ["auto"] | "none" | "constant" | "linear" | "poly:N", line_window
              [200] (km/s), clip [3.0] (sigma), write_continuum [false]
    [noise]   line_free ["auto"] or [[v1, v2], ...] (also the channels the continuum may
              be fitted on)
    [mask]    method ["smooth"; "none" when the config has [widths]] | "threshold",
              threshold, grow_threshold [2.0], smooth_beams [1.5], smooth_pixels [3.0],
              smooth_channels [3], min_pixels, min_channels [2], file (a 2D or 3D FITS
              mask, non-zero = keep), mode ["and"] | "replace" (combine file with the
              signal mask, or let it replace it)
    [maps]    method ["moments"] | "gauss", channel_response ["tophat"] | "hanning" | "none";
              for gauss: components [1] | 2 | 3 | "auto", baseline ["none"] | "constant" |
              "linear", instrument_sigma (km/s) or resolving_power, order ["flux"] |
              "velocity", snr_threshold [3], min_separation [1] (sigma),
              min_component_snr [3], write_model [false], vrange (velocity window of the
              moments and fits only; other stages see the whole cube), line (a catalogue
              line: rest value and a default vrange up to the neighbouring lines),
              lines [[]] (maps of each named line, keys suffixed with its name)
    [rings]   center ("RA,DEC"), position_angle, inclination, v_sys, ring_width (arcsec),
              distance (Mpc), weighting ["cos"] | "cos2" | "uniform", exclude_minor_axis
              [20] (deg), stages [[1, 2, 3]], final_geometry ["median"] | "polynomial" |
              "rings" | "global", fix [[]], min_points [20], bootstrap [0], seed [0],
              expansion_in_geometry [false], pv_diagram [true], velocity_field ["gauss"] |
              "moments" (for a cube input: Gaussian fits or moment 1), model ["2d"] | "3d"
              (3d fits a disk model to the cube), scale_height [0] (arcsec, 3d),
              loss ["chi2"] | "absolute" (3d), smoothing ["auto"] | weight (3d),
              surface_normalisation ["rings"] | "pixels" (3d)
    [widths]  lines (required; names from the catalogue, brightest first), temperature
              ("1e4 K") or temperature_map (FITS, K), temperature_err, mu [2.33],
              free_velocity [false], ratios [{"NII_6583/NII_6548" = 3.0}], catalogue (extra
              TOML file), snr_threshold [3], baseline ["none"] | "constant" | "linear";
              the instrument comes from [maps]
              instrument_sigma / resolving_power, the channel response from [maps]
              channel_response
    [turbulence] velocity_field ["gauss"] | "moments", distance (pc), lag_range (arcsec,
              fit range of the structure function), nlags [12], weighting ["errors"] |
              "uniform", gradient_window (arcsec), nsizes [10], jackknife_blocks [3]; with a
              [widths] section the budget gives sigma_nt and the sonic scale
    [spectrum] at ("RA,DEC"), radius (arcsec), global [false], snr_threshold [3] (with
              [input] region: the spectrum of the regions)
    [pv]      path ("RA1,DEC1;RA2,DEC2"), or center ("RA,DEC") + position_angle (deg) +
              length (arcsec), or region (a line in a region file); width (arcsec), rings
              (rotation_curve.ecsv whose model is drawn)
    [channels] every [1] (channels per panel), levels [[-3, 3, 6, 12, 24, 48]] (x noise)
    [stack]   velocity_map (FITS) or velocity_field ["moments"] | "gauss", bins ["radius"] |
              a map (FITS), edges, bin_width (arcsec), center, position_angle, inclination,
              rings (a rotation_curve.ecsv), components ["auto"] | 1 | 2
    [output]  dir ["kinemap-out"], overwrite [false], plots [true]
    [run]     max_memory [a quarter of the machine's memory], progress [true],
              scheduler ["tcp://host:port" of a dask scheduler], workers [N local processes]

Velocities may be written as numbers (km/s) or strings with units ("1500 km/s").
"""
from __future__ import annotations

import copy
import difflib
import math
import os
import tomllib
from dataclasses import dataclass
from typing import Any, Callable

from kinemap.errors import KinemapError
from kinemap.pipeline.values import (check_beam, check_continuum, check_distance_pc, check_every,
                                     check_lag_range, check_size, check_temperature,
                                     check_temperature_err, components, lag_pair, name_list,
                                     number_list, number_pair, parse_size, range_list, ratios,
                                     stage_numbers, text_value)

__all__ = ["SCHEMA", "Option", "default_config", "load_config", "validate_config",
           "parse_size", "option_default"]

_NONE = type(None)


@dataclass(frozen=True)
class Option:
    """One configuration key: what it accepts, its default, and how the command offers it.

    types : the Python types a value may have (``NoneType`` when it may be left unset).
    default : the default (deep-copied before use).
    help : one line for ``--help``; the unit and the default are appended by :meth:`help_text`.
    choices : the allowed values (for a list-valued key: of each entry).
    metavar, unit : how ``--help`` writes the value, and its unit.
    cli : True for ``--key-with-dashes``, a string for another flag name, False for a
        TOML-only key.  A boolean defaulting to True becomes ``--no-<name>``.
    aliases : further flags accepted on the command line (older spellings).
    shortcuts : ``(flag, value)`` flags that set a fixed value (``--no-mask``).
    parse : turns a value (text from the command line or a TOML value) into the canonical
        form; raises ValueError with the reason.  Without it, text becomes a whole number or
        a number when the key accepts numbers, and stays text otherwise.
    check : validates a canonical value; raises KinemapError or ValueError.
    default_when : ``(section, value)`` pairs: the default when the config has that section
        (the first that matches wins).
    required : the key must be given when its section is in the config.
    repeat : the flag may be repeated; its values are collected into a list.
    path : a file path; relative paths in a TOML file are relative to the file.
    """

    types: tuple
    default: Any = None
    help: str = ""
    choices: tuple | None = None
    metavar: str | None = None
    unit: str | None = None
    cli: bool | str = True
    aliases: tuple = ()
    shortcuts: tuple = ()
    parse: Callable | None = None
    check: Callable | None = None
    default_when: tuple = ()
    required: bool = False
    repeat: bool = False
    path: bool = False

    def flag(self, key: str) -> str | None:
        """The main command-line flag of this option (None for a TOML-only key)."""
        if self.cli is False:
            return None
        name = (key if self.cli is True else self.cli).replace("_", "-")
        if bool in self.types and self.default is True:
            return f"--no-{name}"
        return f"--{name}"

    def resolved_default(self, sections=()):
        for section, value in self.default_when:
            if section in sections:
                return copy.deepcopy(value)
        return copy.deepcopy(self.default)

    def canonical(self, value):
        """``value`` in canonical form (ValueError with the reason when it cannot be)."""
        if value is None:
            return None
        if self.parse is not None:
            return self.parse(value)
        if not isinstance(value, str):
            return value
        return text_value(value, self.types)

    def help_text(self, sections=()) -> str:
        text = self.help
        if self.choices is not None and list in self.types:
            text += f"; any of {_show(self.choices)}"
        if self.unit:
            text += f"; numbers in {self.unit}"
        default = self.resolved_default(sections)
        if default is not None and not isinstance(default, bool) and default != []:
            if isinstance(default, list):
                default = ",".join(str(d) for d in default)
            text += f"; default: {default}"
        return text.replace("%", "%%")  # argparse formats help text with %


SCHEMA: dict[str, dict[str, Option]] = {
    "input": {
        "cube": Option((str, _NONE), help="the spectral-line cube (FITS)", cli=False, path=True),
        "convention": Option(
            (str, _NONE), choices=("radio", "optical", "relativistic"),
            help="velocity convention (default: radio for frequency axes, optical for "
                 "wavelength axes, a velocity axis keeps its own)"),
        "rest_value": Option(
            (str, _NONE), metavar="QUANTITY|LINE",
            help="rest frequency or wavelength, e.g. '1420.405751768 MHz', or a catalogue line "
                 "name such as Halpha (taken in the cube's medium); overrides the header"),
        "frame": Option(
            (str, _NONE), metavar="SPECSYS",
            help="spectral frame of the output velocities (TOPOCENT, BARYCENT, LSRK); "
                 "default: the cube's"),
        "vrange": Option((list, tuple, str, _NONE), parse=number_pair, metavar="V1,V2", unit="km/s",
                         help="keep channels in this velocity range"),
        "box": Option((list, tuple, str, _NONE), metavar="X0:X1,Y0:Y1",
                      help="pixel box (0-based, end exclusive)"),
        "region": Option((str, _NONE), metavar="FILE", help="DS9 or CRTF region file", path=True),
        "beams": Option((str,), "common", choices=("common", "refuse"),
                        help="cube with a beam per channel: convolve to a common beam or refuse"),
        "beam": Option((str, _NONE), metavar="MAJOR[,MINOR,PA]", check=check_beam,
                       help="the cube's beam when the header has none or a wrong one: "
                            "'46arcsec' (circular) or '30arcsec,20arcsec,45deg' (FWHM major, "
                            "minor, position angle)"),
        "bunit": Option((str, _NONE), metavar="UNIT", help="unit of the cube values when BUNIT is missing or wrong"),
        "unit": Option((str, _NONE), choices=("K", "Jy/beam"),
                       help="convert the cube and its products to brightness temperature or "
                            "Jy/beam (needs the beam and, for a velocity axis, the rest "
                            "frequency)"),
        "hdu": Option((int, str, _NONE), cli=False, help="the HDU that holds the cube"),
        "velocity_map": Option((str, _NONE), cli=False, path=True,
                               help="a velocity map (2D FITS, km/s) instead of a cube, for [rings]"),
        "velocity_err": Option((str, _NONE), metavar="FITS", aliases=("--velocity-error",),
                               path=True, help="error map for a velocity-map input"),
        "intensity": Option((str, _NONE), metavar="FITS", path=True,
                            help="intensity map for a velocity-map input"),
    },
    "continuum": {
        "method": Option((str,), "auto", cli="continuum", check=check_continuum,
                         metavar="auto|none|constant|linear|poly:N",
                         help="continuum under the lines, fitted per spectrum on line-free "
                              "channels and subtracted before noise and masks; auto: only "
                              "when a significant continuum is there"),
        "line_window": Option((int, float, str), 200.0, metavar="VELOCITY", unit="km/s",
                              help="how far beyond a line's emission (seen in the mean "
                                   "spectrum) the window masked around every catalogue line "
                                   "in the band for the continuum fit reaches"),
        "clip": Option((int, float), 3.0, cli=False,
                       help="sigma-clipping threshold of the per-spectrum continuum fit"),
        "write_continuum": Option((bool,), False,
                                  help="also write the fitted continuum cube"),
    },
    "noise": {
        "line_free": Option((str, list, tuple, _NONE), "auto", parse=range_list,
                            metavar="V1,V2[;V3,V4]", unit="km/s",
                            help="line-free velocity ranges for the noise, or auto"),
    },
    "mask": {
        "method": Option((str,), "smooth", choices=("smooth", "threshold", "none"), cli="mask",
                         default_when=(("widths", "none"),), shortcuts=(("--no-mask", "none"),),
                         help="signal mask: smooth-and-mask, a plain S/N threshold, or none "
                              "(every finite channel; the default for line widths, whose fit "
                              "has its own S/N threshold)"),
        "threshold": Option((int, float, _NONE), metavar="SNR",
                            help="S/N threshold (default 5 smooth, 3 plain)"),
        "grow_threshold": Option((int, float), 2.0, metavar="SNR",
                                 help="smooth mask grows into voxels above this smoothed S/N"),
        "smooth_beams": Option((int, float), 1.5, cli=False,
                               help="spatial smoothing of the smooth mask (beams FWHM)"),
        "smooth_pixels": Option((int, float), 3.0, cli=False,
                                help="spatial smoothing when the cube has no beam (pixels FWHM)"),
        "smooth_channels": Option((int,), 3, metavar="N",
                                  help="spectral boxcar of the smooth mask (channels)"),
        "min_pixels": Option((int, _NONE), metavar="N",
                             help="smallest island footprint kept (pixels)"),
        "min_channels": Option((int,), 2, cli=False,
                               help="smallest island spectral extent kept (channels)"),
        "file": Option((str, _NONE), metavar="FITS", cli="mask_file", path=True,
                       help="your own mask: a 2D or 3D FITS image on the cube's pixels "
                            "(non-zero = keep)"),
        "mode": Option((str,), "and", choices=("and", "replace"), cli="mask_mode",
                       help="and: use voxels both the signal mask and --mask-file keep; "
                            "replace: --mask-file alone decides"),
    },
    "maps": {
        "method": Option((str,), "moments", choices=("moments", "gauss"),
                         help="moments: moment maps with analytic errors; gauss: also a "
                              "Gaussian fit of every spectrum"),
        "channel_response": Option((str,), "tophat", choices=("tophat", "hanning", "none"),
                                   help="how channels sample the spectrum (sets noise "
                                        "correlation)"),
        "components": Option((int, str), 1, choices=(1, 2, 3, "auto"),
                             help="Gaussian components per spectrum; auto chooses 1-3 by BIC"),
        "baseline": Option((str,), "none", choices=("none", "constant", "linear"),
                           help="baseline fitted with the lines (none: cubes are usually "
                                "continuum-subtracted, and a free baseline trades off against "
                                "the wings of lines that fill the band)"),
        "instrument_sigma": Option((int, float, str, _NONE), metavar="VELOCITY", unit="km/s",
                                   help="Gaussian instrumental sigma, e.g. '5 km/s'"),
        "resolving_power": Option((int, float, _NONE), metavar="R",
                                  help="instrumental resolution R (FWHM = c/R)"),
        "order": Option((str,), "flux", choices=("flux", "velocity"),
                        help="component order: brightest first or by velocity"),
        "snr_threshold": Option((int, float), 3.0, metavar="SNR",
                                help="spectra with a lower peak S/N are not fitted"),
        "min_separation": Option((int, float), 1.0, cli=False, unit="sigma",
                                 help="closest two components may be"),
        "min_component_snr": Option((int, float), 3.0, cli=False,
                                    help="weakest component kept (peak S/N)"),
        "write_model": Option((bool,), False, help="also write model and residual cubes"),
        "line": Option((str, _NONE), metavar="NAME",
                       help="catalogue line to map (e.g. Halpha): sets the rest value in the "
                            "cube's medium and a velocity window that stops short of the "
                            "neighbouring catalogue lines"),
        "vrange": Option((list, tuple, str, _NONE), parse=number_pair, cli=False, unit="km/s",
                         help="velocity window of the moments and fits only"),
        "lines": Option((list, str), [], parse=name_list, metavar="NAME[,NAME...]",
                        help="catalogue lines to map one by one (e.g. Halpha,NII_6583): "
                             "moment (and fit) maps of each on its own velocity axis and "
                             "window, keys suffixed with the line's name"),
    },
    "rings": {
        "center": Option((str, _NONE), metavar="RA,DEC",
                         help="centre, degrees or sexagesimal; guessed when not given"),
        "position_angle": Option((int, float, str, _NONE), metavar="ANGLE", unit="deg",
                                 aliases=("--pa",),
                                 help="position angle, east of north to the receding side; "
                                      "guessed when not given"),
        "inclination": Option((int, float, str, _NONE), metavar="ANGLE", unit="deg",
                              help="0 face-on, 90 edge-on; guessed when not given"),
        "v_sys": Option((int, float, str, _NONE), metavar="VELOCITY", unit="km/s",
                        aliases=("--vsys",),
                        help="systemic velocity (a number or with a unit); guessed when not "
                             "given"),
        "ring_width": Option((int, float, str, _NONE), metavar="WIDTH", unit="arcsec",
                             help="ring width; default: about one beam"),
        "distance": Option((int, float, str, _NONE), metavar="DIST", unit="Mpc",
                           help="e.g. '10 Mpc': radii in kpc and M(<R)"),
        "weighting": Option((str,), "cos", choices=("uniform", "cos", "cos2"),
                            help="angular weight |cos theta|, cos^2 theta, or none (uniform)"),
        "exclude_minor_axis": Option((int, float, str), 20.0, metavar="ANGLE", unit="deg",
                                     help="half-width of the wedge around the minor axis "
                                          "left out"),
        "stages": Option((list, str), [1, 2, 3], parse=stage_numbers, choices=(1, 2, 3),
                         metavar="N[,N...]", help="stages to run"),
        "final_geometry": Option((str,), "median",
                                 choices=("median", "polynomial", "rings", "global"),
                                 help="stage 3: how the ring geometry is smoothed"),
        "fix": Option((list, str), [], parse=name_list, metavar="NAMES",
                      choices=("center", "x_center", "y_center", "position_angle",
                               "inclination", "v_sys", "v_exp"),
                      help="comma-separated parameters held fixed"),
        "min_points": Option((int,), 20, cli=False, help="fewest points a ring needs"),
        "bootstrap": Option((int,), 0, metavar="N",
                            help="number of bootstrap resamples for the errors (0: formal)"),
        "seed": Option((int,), 0, cli=False, help="seed of the bootstrap resampling"),
        "expansion_in_geometry": Option((bool,), False, cli=False,
                                        help="fit v_exp in the geometry stages too"),
        "pv_diagram": Option((bool,), True, cli=False,
                             help="plot the position-velocity diagram of a cube input"),
        "model": Option((str,), "2d", choices=("2d", "3d"),
                        help="2d: rings on a velocity field; 3d: fit a disk model to the cube "
                             "(beam smearing and pressure support; needs a cube)"),
        "scale_height": Option((int, float, str), 0.0, metavar="H", unit="arcsec", cli=False,
                               help="3d: sech^2 scale height of the disk, held fixed"),
        "loss": Option((str,), "chi2", choices=("chi2", "absolute"), cli=False,
                       help="3d: minimise chi^2 or a soft absolute residual"),
        "smoothing": Option((int, float, str), "auto", cli=False,
                            help="3d: weight of the penalty on second differences of v_rot "
                                 "and dispersion between rings ('auto': from the beam's "
                                 "overlap of neighbouring rings; 0: none)"),
        "surface_normalisation": Option((str,), "rings", choices=("rings", "pixels"), cli=False,
                                        help="3d: tie the model's intensity to moment 0 ring "
                                             "by ring or pixel by pixel"),
        "velocity_field": Option((str,), "gauss", choices=("gauss", "moments"),
                                 aliases=("--method",),
                                 help="for a cube input: velocity field from Gaussian fits "
                                      "or moment 1"),
    },
    "widths": {
        "lines": Option((list, str), [], parse=name_list, metavar="NAME[,NAME...]", required=True,
                        help="catalogue names, brightest first (e.g. Halpha,NII_6583,NII_6548)"),
        "temperature": Option((int, float, str, _NONE), metavar="T", unit="K",
                              check=check_temperature,
                              help="assumed temperature, e.g. '1e4 K'"),
        "temperature_map": Option((str, _NONE), metavar="FITS", path=True,
                                  help="assumed temperature per pixel (K)"),
        "temperature_err": Option((int, float, str, _NONE), metavar="T", unit="K",
                                  check=check_temperature_err, help="1-sigma error of the assumed temperature"),
        "mu": Option((int, float), 2.33, metavar="MU",
                     help="mean particle mass / m_H for the sound speed (2.33 molecular, "
                          "0.6 ionized)"),
        "free_velocity": Option((bool,), False, help="a velocity per line"),
        "ratios": Option((dict, list, str, _NONE), parse=ratios, cli="ratio", repeat=True,
                         metavar="STRONG/WEAK=R",
                         help="fixed flux ratio (NII_6583/NII_6548=3.0 always applies unless "
                              "given another value); repeatable"),
        "catalogue": Option((str, _NONE), metavar="TOML", path=True,
                            help="extra lines (same schema as the built-in)"),
        "snr_threshold": Option((int, float), 3.0, metavar="SNR",
                                help="spectra with a lower peak S/N are not fitted"),
        "baseline": Option((str,), "none", choices=("none", "constant", "linear"),
                           help="baseline fitted with the lines for residual continuum "
                                "(none after continuum subtraction; constant or linear when "
                                "a continuum is left under the lines)"),
    },
    "turbulence": {
        "velocity_field": Option((str,), "gauss", choices=("gauss", "moments"),
                                 aliases=("--method",),
                                 help="velocity field from Gaussian fits or moment 1"),
        "distance": Option((int, float, str, _NONE), metavar="DIST", unit="pc",
                           check=check_distance_pc,
                           help="e.g. '250 pc': sizes in pc and gradients in km/s/pc"),
        "lag_range": Option((list, tuple, str, _NONE), parse=lag_pair, metavar="L1,L2",
                            check=check_lag_range,
                            unit="arcsec",
                            help="lags of the structure function's power-law fit "
                                 "(default: two beams to the largest lag)"),
        "nlags": Option((int,), 12, metavar="N",
                        help="logarithmic lag bins from one pixel to a third of the map"),
        "weighting": Option((str,), "errors", choices=("errors", "uniform"),
                            help="pixel weights of the structure function: 1/sigma_v^2 or "
                                 "equal"),
        "gradient_window": Option((int, float, str, _NONE), metavar="SIZE", unit="arcsec",
                                  help="diameter of the local-gradient window (default three "
                                       "beams)"),
        "nsizes": Option((int,), 10, cli=False, help="aperture sizes of the size-linewidth "
                                                     "relation"),
        "jackknife_blocks": Option((int,), 3, cli=False,
                                   help="blocks per side of the structure function's "
                                        "jackknife errors"),
    },
    # --- extraction: kinemap spectrum and kinemap pv (stages in kinemap.extract) ---
    "spectrum": {
        "at": Option((str, _NONE), metavar="RA,DEC",
                     help="spectrum at this position (degrees or sexagesimal); with --radius "
                          "a circle, else the one pixel there"),
        "radius": Option((int, float, str, _NONE), metavar="RADIUS", unit="arcsec",
                         help="radius of the circle at --at"),
        "global": Option((bool,), False,
                         help="the global profile: every pixel of the map (inside --region, "
                              "when given)"),
        "snr_threshold": Option((int, float), 3.0, cli=False,
                                help="the Gaussian is fitted when the peak exceeds this many "
                                     "times its error"),
    },
    "pv": {
        "path": Option((str, list, _NONE), metavar="RA1,DEC1;RA2,DEC2[;...]",
                       help="cut along this path (a polyline, offsets from its first point)"),
        "center": Option((str, _NONE), metavar="RA,DEC",
                         help="straight cut through this position (offset 0 there), with "
                              "--pa and --length"),
        "position_angle": Option((int, float, str, _NONE), metavar="ANGLE", unit="deg",
                                 aliases=("--pa",),
                                 help="direction of a --center cut, east of north (positive "
                                      "offsets that way)"),
        "length": Option((int, float, str, _NONE), metavar="LENGTH", unit="arcsec",
                         help="length of a --center cut"),
        "width": Option((int, float, str, _NONE), metavar="WIDTH", unit="arcsec",
                        help="average over this width across the cut (default: one line of "
                             "samples)"),
        "region": Option((str, _NONE), metavar="FILE", path=True,
                         help="DS9 or CRTF file whose line (or lines joined end to start) is "
                              "the cut"),
        "rings": Option((str, _NONE), metavar="ECSV", path=True,
                        help="rotation_curve.ecsv of a ring fit of this cube: draw its model "
                             "on the diagram"),
    },
    # ---- channel maps and stacking -------------------------------------------
    "channels": {
        "every": Option((int,), 1, metavar="N", check=check_every,
                        help="channels averaged into one panel"),
        "levels": Option((list, str), [-3.0, 3.0, 6.0, 12.0, 24.0, 48.0], parse=number_list,
                         metavar="L1,L2,...",
                         help="contour levels in multiples of the panel noise (negative "
                              "ones dashed)"),
    },
    "stack": {
        "velocity_map": Option((str, _NONE), metavar="FITS", path=True,
                               help="velocity of every spectrum (2D FITS on the cube's grid, "
                                    "km/s); default: from the cube (--velocity-field)"),
        "velocity_field": Option((str,), "moments", choices=("moments", "gauss"),
                                 help="without --velocity-map: moment 1 (where moment 0 has "
                                      "S/N >= 3) or Gaussian-fit velocities of the cube"),
        "bins": Option((str,), "radius", metavar="radius|MAP.fits",
                       help="stack by deprojected radius or by the values of a 2D FITS map "
                            "on the cube's grid (with --edges)"),
        "edges": Option((list, str, _NONE), parse=number_list, metavar="E1,E2,...",
                        help="bin edges: arcsec for radius bins, the map's unit for a map"),
        "bin_width": Option((int, float, str, _NONE), metavar="WIDTH", unit="arcsec",
                            help="radius bins of this width from the centre (default: one "
                                 "beam, else 4 pixels)"),
        "center": Option((str, _NONE), metavar="RA,DEC",
                         help="disk centre for radius bins, degrees or sexagesimal"),
        "position_angle": Option((int, float, str, _NONE), metavar="ANGLE", unit="deg",
                                 aliases=("--pa",),
                                 help="position angle for radius bins, east of north to the "
                                      "receding side"),
        "inclination": Option((int, float, str, _NONE), metavar="ANGLE", unit="deg",
                              help="inclination for radius bins, 0 face-on"),
        "rings": Option((str, _NONE), metavar="ECSV", path=True,
                        help="take centre, PA, inclination and the ring edges from a "
                             "rotation_curve.ecsv of 'kinemap rings'"),
        "components": Option((int, str), "auto", choices=(1, 2, "auto"),
                             parse=components,
                             help="Gaussians fitted to each stacked spectrum (auto: 1 or 2 "
                                  "by BIC)"),
    },
    "output": {
        "dir": Option((str,), "kinemap-out", cli="out", metavar="DIR", path=True,
                      help="output folder"),
        "overwrite": Option((bool,), False, help="write into a non-empty folder"),
        "plots": Option((bool,), True, help="skip PNG plots"),
    },
    "run": {
        "max_memory": Option((str, int, float, _NONE), metavar="SIZE", check=check_size,
                             help="working-set bound of the block-wise stages, e.g. 1GB "
                                  "(default: a quarter of the machine's memory)"),
        "progress": Option((bool,), True, help="no progress bars"),
        "scheduler": Option((str, _NONE), metavar="ADDRESS",
                            help="run the blocks on a running dask.distributed scheduler "
                                 "(tcp://host:port)"),
        "workers": Option((int, _NONE), metavar="N",
                          help="start a local cluster of N worker processes for this run"),
    },
}


# keys renamed so that one concept has one name everywhere: old (section, key) -> new key
RENAMED = {("rings", "pa"): "position_angle", ("rings", "vsys"): "v_sys",
           ("input", "velocity_error"): "velocity_err"}


def option_default(section: str, key: str, sections=()):
    """The default of ``[section] key`` in a config that has ``sections``."""
    return SCHEMA[section][key].resolved_default(sections)


def default_config() -> dict:
    return {sec: {k: opt.resolved_default() for k, opt in keys.items()}
            for sec, keys in SCHEMA.items()}


def _suggest(word, choices):
    close = difflib.get_close_matches(word, list(choices), n=1)
    return f" (did you mean '{close[0]}'?)" if close else ""


def _show(choices) -> str:
    return ", ".join(str(c) for c in choices)


def check_value(sec: str, key: str, value):
    """``value`` for ``[sec] key`` in canonical form, or a KinemapError naming the problem."""
    opt = SCHEMA[sec][key]
    where = f"[{sec}] {key}"
    if value is not None and not (isinstance(value, bool) and bool in opt.types):
        try:
            value = opt.canonical(value)
        except (ValueError, TypeError) as exc:
            raise KinemapError(f"{where} {exc}") from None
    types = opt.types
    if isinstance(value, bool) and bool not in types:
        ok = False
    else:
        ok = isinstance(value, types) or (float in types and isinstance(value, int))
    if not ok:
        names = "/".join(t.__name__ for t in types if t is not _NONE)
        raise KinemapError(f"{where} must be {names}, got {value!r}")
    if opt.choices is not None and value is not None:
        for v in (value if isinstance(value, list) else [value]):
            if v not in opt.choices or isinstance(v, bool):
                raise KinemapError(f"{where} must be one of {_show(opt.choices)}, got {v!r}")
    if opt.check is not None and value is not None:
        try:
            opt.check(value)
        except ValueError as exc:
            raise KinemapError(f"{where} {exc}") from None
    return value


def validate_config(user: dict, *, base_dir: str | None = None) -> dict:
    """Merge ``user`` over the defaults, checking every section, key, type and value."""
    for sec, values in user.items():
        if sec not in SCHEMA:
            raise KinemapError(f"unknown config section [{sec}]{_suggest(sec, SCHEMA)}; "
                               f"known sections: {', '.join(SCHEMA)}")
        if not isinstance(values, dict):
            raise KinemapError(f"config section [{sec}] must be a table of keys")
    sections = set(user)
    cfg = {sec: {k: opt.resolved_default(sections) for k, opt in keys.items()}
           for sec, keys in SCHEMA.items()}
    for sec, values in user.items():
        for key, value in values.items():
            if (sec, key) in RENAMED:
                raise KinemapError(f"[{sec}] {key} is now called {RENAMED[sec, key]}; "
                                   f"rename the key")
            if key not in SCHEMA[sec]:
                raise KinemapError(f"unknown key '{key}' in [{sec}]{_suggest(key, SCHEMA[sec])}; "
                                   f"known keys: {', '.join(SCHEMA[sec])}")
            cfg[sec][key] = check_value(sec, key, value)
    for sec in sections:
        for key, opt in SCHEMA[sec].items():
            if opt.required and not cfg[sec][key]:
                flag = opt.flag(key)
                raise KinemapError(f"[{sec}] needs {key}" + (f" ({flag})" if flag else "")
                                   + f": {opt.help}")
    if not cfg["input"]["cube"] and not cfg["input"]["velocity_map"]:
        raise KinemapError("the config needs [input] cube = \"path/to/cube.fits\" (or "
                           "velocity_map = \"map.fits\" for a rotation curve from a map)")
    if cfg["input"]["velocity_map"] and cfg["mask"]["file"]:
        raise KinemapError("--mask-file masks a cube, and the input is a velocity map; leave "
                           "it out (blank the map's pixels instead) or give the cube")
    if cfg["input"]["velocity_map"] and "rings" not in user:
        raise KinemapError("[input] velocity_map is only used by [rings]; add a [rings] section "
                           "or give a cube")
    if base_dir:
        for sec, keys in SCHEMA.items():
            for key, opt in keys.items():
                v = cfg[sec][key]
                if opt.path and v and not os.path.isabs(v):
                    cfg[sec][key] = os.path.normpath(os.path.join(base_dir, v))
    _check_input_paths(cfg)
    if "widths" in sections and cfg["widths"]["ratios"]:
        _check_ratio_lines(cfg["widths"])
    # a cube gets the maps stages (moment maps come with every cube run) unless the run
    # only extracts (a spectrum, a PV cut or channel maps are not a reason to make maps)
    cfg["_sections"] = sorted(sections | {"input", "continuum", "noise", "mask", "output", "run"}
                              | ({"maps"} if cfg["input"]["cube"] and not only_extracts(sections)
                                 else set()))
    return cfg


# sections whose stages need no maps: a config of only these (and the shared sections)
# makes no moment maps
EXTRACTION_SECTIONS = ("spectrum", "pv", "channels")
_SHARED = {"input", "continuum", "noise", "mask", "output", "run"}


def only_extracts(sections) -> bool:
    """Whether the stages of ``sections`` are extraction only (no [maps], no later stage)."""
    stages = set(sections) - _SHARED
    return bool(stages) and stages <= set(EXTRACTION_SECTIONS)


def _check_input_paths(cfg: dict) -> None:
    """A folder given where a file is read is one line here, before anything is read
    (missing files are the readers' to name)."""
    for sec, keys in SCHEMA.items():
        for key, opt in keys.items():
            v = cfg[sec][key]
            if opt.path and sec != "output" and v and os.path.isdir(v):
                raise KinemapError(f"[{sec}] {key} {v!r} is a folder (directory), not a file; "
                                   "give the path of a file")


def _check_ratio_lines(widths: dict) -> None:
    """Every line a flux ratio names must be a catalogue line (an unknown name would be
    silently ignored), and the ratio finite and positive."""
    from kinemap.spectral.catalogue import load_catalogue

    known = load_catalogue(widths["catalogue"])
    for pair, ratio in widths["ratios"].items():
        if not (math.isfinite(ratio) and ratio > 0):
            raise KinemapError(f"[widths] ratios: {pair} must be a finite positive flux ratio, "
                               f"got {ratio!r}")
        for name in pair.split("/"):
            if name not in known:
                raise KinemapError(
                    f"[widths] ratios: {pair!r} names '{name}', which is not a catalogue line"
                    f"{_suggest(name, known)}; use catalogue names (or add the line with "
                    "--catalogue)")


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
