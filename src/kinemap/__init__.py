"""kinemap: kinematics from spectral-line cubes.

Data flow (one direction)::

    cube = kinemap.read_cube("cube.fits")                    # path, HDU, SpectralCube, ...
    cube = kinemap.subtract_continuum(cube).cube             # continuum under the lines
    noise = kinemap.estimate_noise(cube)                     # NoiseMap
    mask = kinemap.make_mask(cube, noise=noise)              # SignalMask
    moments = kinemap.compute_moments(cube, mask=mask, noise=noise)     # MomentMaps
    fit = kinemap.fit_cube(cube, noise=noise, mask=mask)     # LineFitMaps
    rings = kinemap.fit_rings(fit, distance="10 Mpc")        # RingFit
    widths = kinemap.line_widths(cube, lines=["13CO_1-0"], temperature="10 K")  # WidthBudget
    turb = kinemap.turbulence_statistics(fit, widths=widths, distance="250 pc")  # TurbulenceStatistics
    moments.moment1                                          # a Projection in km/s
    rings.table                                              # a QTable, one row per ring
    fit.write("out")                                         # FITS, PNG, manifest.json

or the whole run from a TOML file or a dict: ``kinemap.run("config.toml")``.
Conventions (velocities positive receding, dispersion = Gaussian sigma, position angle
east of north to the receding side, ...) are in README.md.  Errors a user can cause raise
:class:`KinemapError`; warnings derive from :class:`KinemapWarning`.

The functions are imported on first use, so ``import kinemap`` stays cheap for the
command line.  Importing kinemap sets ``NUMBA_CACHE_DIR`` (unless set) to a per-user,
per-version folder for the compiled kernels (:mod:`kinemap._kernel_cache`).
"""
from importlib import import_module

from kinemap._kernel_cache import use_user_cache
from kinemap._version import __version__
from kinemap.errors import KinemapError, KinemapWarning

# compiled kernels are cached per user and version, so a re-install does not recompile
use_user_cache(__version__)

# public name -> module that defines it (imported on first access, PEP 562)
_API = {
    "read_cube": "kinemap.io.reader",
    "read_map": "kinemap.io.maps",
    "Cube": "kinemap.io.cube",
    "subtract_continuum": "kinemap.maps.continuum",
    "ContinuumResult": "kinemap.maps.continuum",
    "estimate_noise": "kinemap.maps.noise",
    "NoiseMap": "kinemap.maps.noise",
    "make_mask": "kinemap.maps.masks",
    "SignalMask": "kinemap.maps.masks",
    "compute_moments": "kinemap.maps.moments",
    "MomentMaps": "kinemap.maps.moments",
    "fit_cube": "kinemap.linefit.stage",
    "LineFitMaps": "kinemap.linefit.stage",
    "fit_rings": "kinemap.rings.stage",
    "RingFit": "kinemap.rings.stage",
    "fit_rings_3d": "kinemap.rings.stage3d",
    "RingFit3D": "kinemap.rings.stage3d",
    "line_widths": "kinemap.widths.stage",
    "WidthBudget": "kinemap.widths.stage",
    "turbulence_statistics": "kinemap.turbulence.stage",
    "TurbulenceStatistics": "kinemap.turbulence.stage",
    "extract_spectrum": "kinemap.extract.spectrum",
    "SpectrumResult": "kinemap.extract.spectrum",
    "pv_diagram": "kinemap.extract.pv",
    "PVDiagram": "kinemap.extract.pv",
    "channel_maps": "kinemap.maps.channels",
    "ChannelMaps": "kinemap.maps.channels",
    "stack_spectra": "kinemap.stacking.stage",
    "StackedSpectra": "kinemap.stacking.stage",
    "run": "kinemap.pipeline.runner",
    "Status": "kinemap.status",
}

__all__ = ["__version__", "KinemapError", "KinemapWarning", *_API]


_SUBPACKAGES = ("io", "spectral", "parallel", "maps", "linefit", "rings", "widths",
                "turbulence", "extract", "stacking", "plotting", "pipeline", "datasets", "status",
                "units", "errors")


def __getattr__(name):
    if name in _API:
        value = getattr(import_module(_API[name]), name)
        globals()[name] = value
        return value
    if name in _SUBPACKAGES:
        return import_module(f"kinemap.{name}")
    raise AttributeError(f"module 'kinemap' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_API))
