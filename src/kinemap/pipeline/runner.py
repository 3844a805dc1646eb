"""Config-driven runs: wire the stages together, time them, hand the results to the writer.

The flow is one-way: read -> noise -> mask -> per-pixel maps -> rotation curve / width
budget -> write.  Each stage here calls the public function of its capability with the
keyword arguments :mod:`kinemap.pipeline.adapters` builds from the config, and keeps the
result; :func:`kinemap.io.writer.write_results` writes them all.  No stage writes files.
"""
from __future__ import annotations

import contextlib
import time
from dataclasses import dataclass, field

import astropy.units as u
import numpy as np

from kinemap.errors import KinemapError
from kinemap.io.maps import read_map
from kinemap.io.outdir import StagedOutput, writing_into
from kinemap.parallel.store import on_disk, scratch_folder
from kinemap.io.reader import read_cube
from kinemap.io.subset import select_channels
from kinemap.io.writer import drawing_processes, prepare_maps, write_results
from kinemap.maps.continuum import line_window_range, subtract_continuum
from kinemap.maps.masks import make_mask
from kinemap.maps.moments import compute_moments, noise_and_moments
from kinemap.maps.noise import estimate_noise
from kinemap.parallel.cluster import open_client
from kinemap.pipeline import adapters as ad
from kinemap.pipeline.config import SCHEMA, only_extracts, parse_size

# The fitting, ring and width stages import scipy.optimize, numba kernels and more; they
# are imported inside their stage functions so a moments-only run starts faster.

__all__ = ["RunState", "run", "run_config", "prepare", "STAGES", "input_paths"]


@dataclass
class RunState:
    """What the stages of one run have produced so far (the wiring's scratch pad)."""

    config: dict
    cube: object = None
    velocity_map: object = None
    noise: object = None
    mask: object = None
    results: dict = field(default_factory=dict)
    timings: dict = field(default_factory=dict)
    client: object = None
    execution: dict = field(default_factory=dict)
    window: tuple | None = None
    manifest: dict | None = None
    moments: object = None  # moment maps made by prepare's fused pass, if it could

    @property
    def meta(self):
        """Provenance of the run's input: the cube's, or the velocity map's."""
        return self.cube.meta if self.cube is not None else self.velocity_map.meta

    @property
    def blocks(self) -> dict:
        """Keyword arguments of every block-wise stage: memory bound, progress, cluster."""
        run = self.config["run"]
        return dict(max_memory=parse_size(run["max_memory"]), progress=bool(run["progress"]),
                    client=self.client)


def _timed(state, stage, fn, *args, **kwargs):
    t0 = time.perf_counter()
    out = fn(*args, **kwargs)
    state.timings[stage] = state.timings.get(stage, 0.0) + time.perf_counter() - t0
    return out


def prepare(cfg: dict, state: RunState | None = None) -> RunState:
    """Read the cube, remove its continuum, estimate the noise and build the mask (the
    shared first stages); later stages see the continuum-subtracted cube."""
    state = state or RunState(config=cfg)
    state.cube = _timed(state, "read", read_cube, cfg["input"]["cube"], **ad.read_kwargs(cfg))
    prepare_maps(state.cube.meta, state.cube.shape[1:])  # the PNGs' layout, while we compute
    continuum = _timed(state, "continuum", subtract_continuum, state.cube,
                       **ad.continuum_kwargs(cfg), **state.blocks)
    state.results["continuum"] = continuum  # its products are empty when nothing was removed
    state.cube = continuum.cube
    if only_extracts(cfg.get("_sections", ())):
        # spectra and cuts need the noise (for errors) but no signal mask
        state.noise = _timed(state, "noise", estimate_noise, state.cube, **ad.noise_kwargs(cfg),
                             **state.blocks)
        return state
    if _can_fuse(cfg):
        # threshold and no mask need only each spectrum's own noise: one read of the cube
        # gives the noise and the moment maps together (stage_moments hands them on)
        state.mask = _timed(state, "mask", make_mask, state.cube, **ad.mask_kwargs(cfg))
        state.noise, state.moments = _timed(
            state, "noise+moments", noise_and_moments, state.cube, mask=state.mask,
            **ad.noise_kwargs(cfg), **state.blocks)
        return state
    state.noise = _timed(state, "noise", estimate_noise, state.cube, **ad.noise_kwargs(cfg),
                         **state.blocks)
    state.mask = _timed(state, "mask", make_mask, state.cube, noise=state.noise,
                        **ad.mask_kwargs(cfg), max_memory=state.blocks["max_memory"],
                        progress=state.blocks["progress"])
    return state


def _can_fuse(cfg) -> bool:
    """Whether the noise and the moments can come from one pass: the mask must not need
    the whole cube (smooth does), and the moments must be of the whole band (a velocity
    window cuts another cube).  The runner always makes moment maps of a cube."""
    return (cfg["mask"]["method"] in ("none", "threshold") and cfg["maps"]["vrange"] is None
            and ad.reference_line(cfg) is None)


def _maps_window(state):
    """The cube (and mask) the maps stages see: [maps] vrange cuts a velocity window.
    Cut once per run and kept on the state."""
    if state.window is None:
        window = state.config["maps"]["vrange"]
        line = ad.reference_line(state.config)  # [maps] line, or a widths run's first line
        if window is None and line:
            continuum = state.results.get("continuum")
            window = line_window_range(state.cube, line, centres=getattr(continuum, "lines", None),
                                       catalogue=state.config["widths"]["catalogue"])
        state.window = _cut(state.cube, state.mask, window)
    return state.window


def _cut(cube, mask, window):
    """``cube`` and ``mask`` cut to the velocity ``window`` (None: as they are)."""
    if window is None:
        return cube, mask
    cut, cs = select_channels(cube, ad.parse_vrange(window))
    if mask is not None:
        mask = mask.channels(cs)
    return cut, mask


def _wants_fit(state) -> bool:
    cfg, sections = state.config, set(state.config.get("_sections", ()))
    if cfg["maps"]["method"] == "gauss":
        return True
    if "turbulence" in sections and cfg["turbulence"]["velocity_field"] == "gauss":
        return True
    if "stack" in sections and cfg["stack"]["velocity_field"] == "gauss" \
            and not cfg["stack"]["velocity_map"]:
        return True
    # the 3D ring fit takes its first guesses from the moments: a Gaussian fit of every
    # pixel would only cost time
    return ("rings" in sections and cfg["rings"]["velocity_field"] == "gauss"
            and cfg["rings"]["model"] != "3d")


def stage_moments(state: RunState):
    if state.moments is not None:  # made with the noise by prepare's fused pass
        return state.moments
    cube, mask = _maps_window(state)
    return _timed(state, "moments", compute_moments, cube, mask=mask, noise=state.noise,
                  **ad.moments_kwargs(state.config), **state.blocks)


def stage_fit(state: RunState):
    if not _wants_fit(state):
        return None
    from kinemap.linefit.stage import fit_cube

    cube, mask = _maps_window(state)
    return _timed(state, "fit", fit_cube, cube, noise=state.noise, mask=mask,
                  **ad.fit_kwargs(state.config), **state.blocks)


def stage_model(state: RunState):
    fit = state.results.get("fit")
    if fit is None or not state.config["maps"]["write_model"]:
        return None
    from kinemap.linefit.stage import model_cubes

    return _timed(state, "model", model_cubes, fit, _maps_window(state)[0])


def stage_lines(state: RunState):
    """[maps] lines: moments (and fits) of each named line on its own velocity axis and
    window, products suffixed with the line's name."""
    lines = state.config["maps"]["lines"]
    if not lines:
        return None
    from kinemap.io.results import PerLine

    per_line = {}
    for line in lines:
        cube = state.cube.with_rest_value(line)
        window = line_window_range(cube, line, catalogue=state.config["widths"]["catalogue"])
        cube, mask = _cut(cube, state.mask, window)
        results = [_timed(state, "moments", compute_moments, cube, mask=mask, noise=state.noise,
                          **ad.moments_kwargs(state.config), **state.blocks)]
        if state.config["maps"]["method"] == "gauss":
            from kinemap.linefit.stage import fit_cube

            results.append(_timed(state, "fit", fit_cube, cube, noise=state.noise, mask=mask,
                                  **ad.fit_kwargs(state.config), **state.blocks))
        per_line[line] = results
    return PerLine(results=per_line, meta=state.cube.meta)


def _velocity_input(state):
    """(velocity, error, intensity, meta) for the ring fit: FITS maps or the maps stage."""
    if state.velocity_map is not None:
        inp = state.config["input"]
        err_path = inp["velocity_err"]
        err = inten = None
        if err_path:
            err = read_map(err_path, unit="km/s", like=state.velocity_map,
                           name="velocity error map").data
        if inp["intensity"]:
            inten = read_map(inp["intensity"], unit="", like=state.velocity_map,
                             name="intensity map").data
        vmap = state.velocity_map  # read_map(unit="km/s") refused any other unit
        v = vmap.data if vmap.unit == u.one else (vmap.data * vmap.unit).to_value(u.km / u.s)
        return v, err, inten, vmap.meta, None
    from kinemap.rings.stage import dispersion_map

    use_fit = state.config["rings"]["velocity_field"] == "gauss"
    source = state.results.get("fit") if use_fit else None
    source = source or state.results["moments"]
    return (*source.velocity_field(), source.meta, dispersion_map(source))


def stage_rings(state: RunState):
    from kinemap.rings.stage import fit_velocity_arrays

    if state.config["rings"]["model"] == "3d":
        if state.cube is None:
            raise KinemapError("--model 3d fits the cube itself: give a cube, not a velocity "
                               "map (or use --model 2d)")
        from kinemap.rings.stage3d import fit_rings_3d

        return _timed(state, "rings3d", fit_rings_3d, state.cube, noise=state.noise,
                      mask=state.mask, progress=state.blocks["progress"],
                      **ad.rings3d_kwargs(state.config))

    v, err, inten, meta, disp = _velocity_input(state)
    return _timed(state, "rings", fit_velocity_arrays, v, err, inten, meta,
                  cube=state.cube, dispersion=disp, progress=state.blocks["progress"],
                  **ad.rings_kwargs(state.config))


def stage_widths(state: RunState):
    from kinemap.widths.stage import line_widths

    kwargs = ad.widths_kwargs(state.config)
    tpath = state.config["widths"]["temperature_map"]
    if tpath:
        if kwargs["temperature"] is not None:
            raise KinemapError("give either --temperature or --temperature-map, not both")
        tmap = read_map(tpath, unit="K", name="temperature map")
        if not tmap.unit.is_equivalent(u.K, equivalencies=u.temperature()):
            raise KinemapError(f"the temperature map's BUNIT is {tmap.unit}, not a temperature; "
                               "fix BUNIT (K)")
        kwargs["temperature"] = (tmap.data * tmap.unit).to(u.K, equivalencies=u.temperature())
    return _timed(state, "widths_fit", line_widths, state.cube, noise=state.noise,
                  mask=state.mask, **kwargs, **state.blocks)


def stage_turbulence(state: RunState):
    from kinemap.turbulence.stage import turbulence_statistics

    kwargs = ad.turbulence_kwargs(state.config)
    use_fit = kwargs["velocity_field"] == "gauss"
    source = (state.results.get("fit") if use_fit else None) or state.results["moments"]
    return _timed(state, "turbulence", turbulence_statistics, source,
                  widths=state.results.get("widths"), **kwargs)


# --- extraction: kinemap spectrum and kinemap pv ---

def stage_spectrum(state: RunState):
    from kinemap.extract.spectrum import extract_spectrum

    return _timed(state, "spectrum", extract_spectrum, state.cube, noise=state.noise,
                  **ad.spectrum_kwargs(state.config))


def stage_pv(state: RunState):
    from kinemap.extract.pv import pv_diagram

    path = state.config["pv"]["rings"]
    if path:
        rings = _ring_model(path, state.cube)
    else:  # a ring fit of the same run (a config with [rings] and [pv]) is drawn
        rings = state.results.get("rings")
        rings = rings if hasattr(rings, "model_velocity_at") else None
    return _timed(state, "pv", pv_diagram, state.cube, rings=rings,
                  **ad.pv_kwargs(state.config))


def _ring_model(path, cube):
    """A ring table written by ``kinemap rings`` (rotation_curve.ecsv) as a model to draw."""
    from kinemap.io.tables import read_ring_table
    from kinemap.rings.model import RingModel

    return RingModel(read_ring_table(path), cube.meta.wcs)


# ---- channel maps and stacking -------------------------------------------------
def stage_channels(state: RunState):
    from kinemap.maps.channels import channel_maps

    return _timed(state, "channels", channel_maps, state.cube, noise=state.noise,
                  **ad.channels_kwargs(state.config))


def _map_on_grid(state: RunState, path, *, name, unit=None):
    """A 2D FITS map that must lie on the cube's pixel grid (one line when it does not)."""
    m = read_map(path, unit=unit, name=name)
    if m.data.shape != state.cube.shape[1:]:
        raise KinemapError(f"the {name} {path} has shape {m.data.shape}, the cube "
                           f"{state.cube.shape[1:]}; give a map on the cube's pixel grid")
    return m


def _stack_bins(state: RunState, velocity):
    """The stacks' bins: deprojected radius (by default out to the farthest pixel with a
    velocity) or the values of a map."""
    from kinemap.stacking.bins import map_bins, radial_bins

    s, meta = state.config["stack"], state.cube.meta
    if s["bins"].strip().lower() != "radius":
        bmap = _map_on_grid(state, s["bins"], name="bin map")
        return map_bins(bmap.data, bmap.unit, s["edges"], name=f"map {s['bins']}")
    beam = meta.beam.major.to_value(u.arcsec) if meta.beam is not None else None
    reach = np.isfinite(velocity)
    if state.cube.footprint is not None:
        reach &= state.cube.footprint
    if not reach.any():
        raise KinemapError("the velocity map has no finite pixel on the cube: nothing to "
                           "stack (check --velocity-map, or the cube's signal for moment 1)")
    g = ad.stack_geometry(state.config, beam, meta.pixel_scale_arcsec)
    return radial_bins(meta.wcs, state.cube.shape[1:], center=g["center"],
                       position_angle=g["position_angle"], inclination=g["inclination"],
                       edges=g["edges"], bin_width=g["bin_width"], footprint=reach)


def stage_stack(state: RunState):
    from kinemap.stacking.stage import stack_spectra

    s = state.config["stack"]
    if s["velocity_map"]:
        vmap = _map_on_grid(state, s["velocity_map"], unit="km/s", name="velocity map")
        velocity = vmap.data if vmap.unit == u.one else (vmap.data * vmap.unit).to_value(u.km / u.s)
    else:
        source = state.results.get("fit") if s["velocity_field"] == "gauss" else None
        source = source or state.results["moments"]
        velocity = source.velocity_field(min_snr=3.0)[0]
    bins = _stack_bins(state, velocity)
    return _timed(state, "stack", stack_spectra, state.cube, velocity, bins, noise=state.noise,
                  components=s["components"],
                  channel_response=state.config["maps"]["channel_response"],
                  max_memory=state.blocks["max_memory"], progress=state.blocks["progress"])


# (config section, result name, stage function).  A stage runs when its section is in the
# config; later capabilities add their entry here.
STAGES = [("maps", "moments", stage_moments), ("maps", "fit", stage_fit),
          ("maps", "model", stage_model), ("maps", "lines", stage_lines),
          ("rings", "rings", stage_rings),
          ("widths", "widths", stage_widths),
          ("turbulence", "turbulence", stage_turbulence),
          ("spectrum", "spectrum", stage_spectrum), ("pv", "pv", stage_pv),
          ("channels", "channels", stage_channels),
          ("stack", "stack", stage_stack)]


def _options(cfg):
    return {k: v for k, v in cfg.items() if not k.startswith("_")}


def input_paths(cfg: dict) -> list[str]:
    """Every file the run reads (the schema's path options outside [output])."""
    return [cfg[sec][key] for sec, keys in SCHEMA.items() if sec != "output"
            for key, opt in keys.items() if opt.path and cfg[sec][key]]


def run_config(cfg: dict, *, stage_dir=None) -> RunState:
    """Run every configured stage and write the products.

    The output folder is checked, locked and staged before anything is computed (see
    :class:`kinemap.io.outdir.StagedOutput`), so a run that cannot write stops at once and
    an interrupted run leaves nothing.  ``stage_dir``: write into this (already staged)
    folder instead of ``[output] dir``; used by the demo, which stages several runs into
    one output.
    """
    out = cfg["output"]
    staged = contextlib.nullcontext(None)
    if stage_dir is None:
        staged = StagedOutput(out["dir"], overwrite=out["overwrite"], inputs=input_paths(cfg))
    # map PNGs are drawn in processes that import matplotlib beside the computing stages
    # (spectra, cuts and channel pages make no map PNGs: their figures are drawn here)
    maps = out["plots"] and not only_extracts(cfg.get("_sections", ()))
    with staged as stage, scratch_folder(stage.path if stage is not None else stage_dir), \
            drawing_processes(maps):
        # maps too large for the memory bound go to (deleted) files beside the products
        with open_client(scheduler=cfg["run"]["scheduler"],
                         workers=cfg["run"]["workers"]) as client:
            state = _run_stages(cfg, client)
        with writing_into(out["dir"] if stage is not None else stage_dir):
            state.manifest = write_results(
                state.results.values(), stage_dir if stage is None else stage.path,
                overwrite=out["overwrite"], plots=out["plots"], options=_options(cfg),
                timings=state.timings, execution=state.execution, staged=False)
    return state


def run(config, *, out=None, overwrite: bool | None = None, plots: bool | None = None,
        progress: bool | None = None) -> RunState:
    """Run the stages a config describes and write their products, as ``kinemap run`` does.

    Parameters
    ----------
    config : str, path-like or dict
        A TOML file (relative paths in it are relative to the file) or a dict with the
        same sections (``{"input": {"cube": "cube.fits"}, "maps": {"method": "gauss"}}``);
        see :mod:`kinemap.pipeline.config` for every section, key and default.
    out, overwrite, plots, progress : optional
        Override ``[output] dir``, ``[output] overwrite``, ``[output] plots`` and
        ``[run] progress``.

    Returns
    -------
    RunState
        ``.results`` maps stage names ('moments', 'fit', 'rings', 'widths') to their
        result objects; ``.manifest`` is what was written; ``.cube`` the cube read.
    """
    from kinemap.pipeline.config import load_config, validate_config

    cfg = validate_config(config) if isinstance(config, dict) else load_config(config)
    for section, key, value in (("output", "dir", out), ("output", "overwrite", overwrite),
                                ("output", "plots", plots), ("run", "progress", progress)):
        if value is not None:
            cfg[section][key] = value if key != "dir" else str(value)
    return run_config(cfg)


# section -> check of its options that needs no data, run before the cube is read
PRECHECKS = {"stack": ad.check_stack}


def _run_stages(cfg, client) -> RunState:
    sections = set(cfg.get("_sections", ()))
    for section, check in PRECHECKS.items():
        if section in sections:
            check(cfg)
    if cfg["input"]["velocity_map"]:
        state = RunState(config=cfg, client=client)
        state.velocity_map = _timed(state, "read", read_map, cfg["input"]["velocity_map"],
                                    unit="km/s", name="velocity map")
        sections.discard("maps")
    else:
        state = prepare(cfg, RunState(config=cfg, client=client))
        if not only_extracts(sections):
            sections.add("maps")
    for section, name, fn in STAGES:
        if section in sections:
            result = fn(state)
            if result is not None:  # a stage may decline (e.g. no fit asked for)
                state.results[name] = result
    state.execution = _execution(cfg, state)
    return state


def _execution(cfg, state) -> dict:
    """How the run was executed, for the manifest."""
    from kinemap.parallel.blocks import task_rows

    blocks = state.blocks
    info = {"scheduler": cfg["run"]["scheduler"] or ("local cluster" if cfg["run"]["workers"]
                                                      else "in-process threads"),
            "workers": cfg["run"]["workers"], "max_memory_bytes": blocks["max_memory"]}
    if state.cube is not None:
        # the moments pass's blocks (factor 1.5 when fused with the noise, see maps.moments)
        info["block_rows"] = task_rows(state.cube.shape, max_memory=blocks["max_memory"],
                                       factor=1.5 if state.moments is not None else 2.5,
                                       client=state.client)
        info["cube_shape"] = list(state.cube.shape)
    moments = state.results.get("moments")
    if moments is not None and hasattr(moments, "arrays"):
        # maps beyond a share of max_memory are kept on disk (kinemap.parallel.store)
        info["maps_on_disk"] = on_disk(moments.arrays["moment0"])
    return info
