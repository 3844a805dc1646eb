"""Config-driven runs: wire the stages together, time them, hand products to the exporter.

The flow is one-way: read -> noise -> mask -> per-pixel maps -> (later stages) -> export.
Each stage is a plain function of the :class:`RunState` built so far that returns a result
object with ``products()`` (and optionally ``figures()`` and ``summary()``); the pipeline
only calls them in order and collects what they return.  No stage writes files.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field, replace

import astropy.units as u
import numpy as np

from kinemap.pipeline.config import parse_size
from kinemap.parallel.cluster import open_client
from kinemap.io.reader import read_cube
from kinemap.io.maps import read_map
from kinemap.io.subset import select_channels
from kinemap.errors import KinemapError
from kinemap.io.outdir import StagedOutput, check_output_dir
from kinemap.io.writer import write_products
from kinemap.maps.masks import make_mask
from kinemap.maps.moments import compute_moments
from kinemap.maps.noise import estimate_noise

# The fitting, ring and width stages import scipy.optimize, numba kernels and more; they
# are imported inside their stage functions so a moments-only run starts faster.

__all__ = ["RunState", "run_config", "prepare", "STAGES"]


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

    @property
    def meta(self):
        """Provenance of the run's input: the cube's, or the velocity map's."""
        return self.cube.meta if self.cube is not None else self.velocity_map.meta

    @property
    def max_memory(self) -> int:
        return parse_size(self.config["run"]["max_memory"])

    @property
    def progress(self) -> bool:
        return bool(self.config["run"]["progress"])


def _timed(state, stage, fn, *args, **kwargs):
    t0 = time.perf_counter()
    out = fn(*args, **kwargs)
    state.timings[stage] = state.timings.get(stage, 0.0) + time.perf_counter() - t0
    return out


def _vrange(value):
    if value is None:
        return None
    if isinstance(value, str):
        parts = [p for p in value.replace(" ", "").split(",") if p]
        if len(parts) != 2:
            raise KinemapError(f"'vrange' must be two velocities like '-50,120', got {value!r}")
        return parts
    return list(value)


def _line_free(value):
    if value is None or (isinstance(value, str) and value.strip().lower() == "auto"):
        return None
    if isinstance(value, str):  # "v1,v2;v3,v4"
        try:
            return [tuple(float(x) for x in part.split(",")) for part in value.split(";") if part]
        except ValueError:
            raise KinemapError(f"'line_free' must look like '-300,-200;250,400' (km/s), got {value!r}") from None
    return value


def prepare(cfg: dict, state: RunState | None = None) -> RunState:
    """Read the cube, estimate the noise and build the mask (the shared first stages)."""
    state = state or RunState(config=cfg)
    inp = cfg["input"]
    state.cube = _timed(state, "read", read_cube, inp["cube"], convention=inp["convention"],
                        rest_value=inp["rest_value"], frame=inp["frame"],
                        vrange=_vrange(inp["vrange"]), box=inp["box"], region=inp["region"],
                        beams=inp["beams"], bunit=inp["bunit"], hdu=inp["hdu"])
    response = cfg["maps"]["channel_response"]
    state.noise = _timed(state, "noise", estimate_noise, state.cube,
                         line_free=_line_free(cfg["noise"]["line_free"]),
                         channel_response=response, max_memory=state.max_memory,
                         progress=state.progress, client=state.client)
    m = cfg["mask"]
    state.mask = _timed(state, "mask", make_mask, state.cube, state.noise, method=m["method"],
                        threshold=m["threshold"], grow_threshold=m["grow_threshold"],
                        smooth_beams=m["smooth_beams"], smooth_pixels=m["smooth_pixels"],
                        smooth_channels=m["smooth_channels"], min_pixels=m["min_pixels"],
                        min_channels=m["min_channels"], channel_response=response,
                        max_memory=state.max_memory)
    return state


def _maps_window(state):
    """The cube (and mask) the maps stages see: [maps] vrange cuts a velocity window.
    Cut once per run and kept on the state."""
    if state.window is None:
        window = state.config["maps"]["vrange"]
        if window is None:
            state.window = (state.cube, state.mask)
        else:
            cube, cs = select_channels(state.cube, _vrange(window))
            mask = state.mask
            if mask is not None and mask.mask is not None:
                mask = replace(mask, mask=mask.mask[cs])
            state.window = (cube, mask)
    return state.window


def stage_moments(state: RunState):
    cfg = state.config["maps"]
    cube, mask = _maps_window(state)
    return _timed(state, "moments", compute_moments, cube, mask=mask,
                  noise=state.noise, channel_response=cfg["channel_response"],
                  max_memory=state.max_memory, progress=state.progress, client=state.client)


def stage_fit(state: RunState):
    cfg = state.config["maps"]
    rings_fit = ("rings" in state.config.get("_sections", ())
                 and state.config["rings"]["velocity_field"] == "gauss")
    if cfg["method"] != "gauss" and not rings_fit:
        return None
    from kinemap.linefit.stage import fit_cube, instrument_sigma_from
    sigma_instr = instrument_sigma_from(instrument_sigma=cfg["instrument_sigma"],
                                        resolving_power=cfg["resolving_power"])
    cube, mask = _maps_window(state)
    return _timed(state, "fit", fit_cube, cube, state.noise, mask=mask,
                  components=cfg["components"], baseline=cfg["baseline"],
                  channel_response=cfg["channel_response"], instrument_sigma=sigma_instr,
                  order=cfg["order"], snr_threshold=cfg["snr_threshold"],
                  min_separation=cfg["min_separation"],
                  min_component_snr=cfg["min_component_snr"], max_memory=state.max_memory,
                  progress=state.progress, client=state.client)


@dataclass(frozen=True)
class ModelCubes:
    """Model and residual cubes of the line fits (held in memory: --write-model only)."""

    model: np.ndarray
    residual: np.ndarray
    bunit: object
    meta: object = None

    def products(self):
        from kinemap.io.products import Product

        wcs = None if self.meta is None else self.meta.wcs3d
        return [Product("model", self.model, self.bunit, "model cube of the Gaussian fits", "cube",
                        plot=False, wcs=wcs),
                Product("residual", self.residual, self.bunit, "data minus model cube", "cube",
                        plot=False, wcs=wcs)]


def stage_model(state: RunState):
    fit = state.results.get("fit")
    if fit is None or not state.config["maps"]["write_model"]:
        return None
    from kinemap.parallel.blocks import read_rows

    cube, _ = _maps_window(state)
    data = read_rows(cube, slice(0, cube.shape[1]))
    model = fit.model_cube(cube)
    return ModelCubes(model=model, residual=(data - model).astype(np.float32),
                      bunit=cube.meta.bunit, meta=cube.meta)


def _velocity_field(state):
    """(velocity, error, intensity) for the ring fit: from the maps stage or from FITS maps."""
    if state.velocity_map is not None:
        inp = state.config["input"]
        err = inten = None
        if inp["velocity_err"]:
            err = read_map(inp["velocity_err"], unit="km/s", like=state.velocity_map,
                           name="velocity error map").data
        if inp["intensity"]:
            inten = read_map(inp["intensity"], unit="", like=state.velocity_map,
                             name="intensity map").data
        vmap = state.velocity_map
        v = vmap.data if vmap.unit == u.one else (vmap.data * vmap.unit).to_value(u.km / u.s)
        return v, err, inten
    use_fit = state.config["rings"]["velocity_field"] == "gauss"
    fit = state.results.get("fit") if use_fit else None
    return (fit or state.results["moments"]).velocity_field()


def stage_rings(state: RunState):
    from kinemap.rings.stage import run_rings

    v, err, inten = _velocity_field(state)
    return _timed(state, "rings", run_rings, v, err, inten, state.meta, state.config["rings"],
                  cube=state.cube, progress=state.progress)


def stage_widths(state: RunState):
    from kinemap.linefit.stage import instrument_sigma_from
    from kinemap.widths.stage import run_widths

    w = state.config["widths"]
    maps = state.config["maps"]
    tmap = None
    if w["temperature_map"]:
        tmap = read_map(w["temperature_map"], unit="K", name="temperature map")
        if tmap.data.shape != state.cube.shape[1:]:
            raise KinemapError(f"the temperature map has shape {tmap.data.shape}, the cube's "
                               f"maps {state.cube.shape[1:]}; give a map on the cube's pixel grid")
        if not tmap.unit.is_equivalent(u.K, equivalencies=u.temperature()):
            raise KinemapError(f"the temperature map's BUNIT is {tmap.unit}, not a temperature; "
                               "fix BUNIT (K)")
        tmap = (tmap.data * tmap.unit).to_value(u.K, equivalencies=u.temperature())
    sigma_instr = instrument_sigma_from(instrument_sigma=maps["instrument_sigma"],
                                        resolving_power=maps["resolving_power"])
    return _timed(state, "widths_fit", run_widths, state.cube, state.noise, state.mask, w,
                  temperature_map=tmap, instrument_sigma=sigma_instr,
                  channel_response=maps["channel_response"], max_memory=state.max_memory,
                  progress=state.progress, client=state.client)


# (config section, result name, stage function).  A stage runs when its section is in the
# config; later capabilities add their entry here.
STAGES = [("maps", "moments", stage_moments), ("maps", "fit", stage_fit),
          ("maps", "model", stage_model), ("rings", "rings", stage_rings),
          ("widths", "widths", stage_widths)]


def _options(cfg):
    return {k: v for k, v in cfg.items() if not k.startswith("_")}


def run_config(cfg: dict, *, stage_dir=None) -> RunState:
    """Run every configured stage and write the products.

    ``stage_dir``: write into this (already staged) folder instead of ``[output] dir``;
    used by the demo, which stages several runs into one output.
    """
    out = cfg["output"]
    if stage_dir is None:
        check_output_dir(out["dir"], overwrite=out["overwrite"])
    with open_client(scheduler=cfg["run"]["scheduler"], workers=cfg["run"]["workers"]) as client:
        state = _run_stages(cfg, client)
    products, figures, summary = [], {}, {}
    for name, res in state.results.items():
        products.extend(res.products())
        if hasattr(res, "figures") and out["plots"]:
            figures.update(res.figures(state))
        if hasattr(res, "summary"):
            summary[name] = res.summary()
    center = _systemic(state)
    if stage_dir is not None:
        state.manifest = write_products(stage_dir, state.meta, products,
                                        options=_options(cfg), timings=state.timings,
                                        figures=figures, plots=out["plots"], center=center,
                                        summary=summary, execution=state.execution)
        return state
    with StagedOutput(out["dir"], overwrite=out["overwrite"]) as staged:
        state.manifest = write_products(staged.path, state.meta, products,
                                        options=_options(cfg), timings=state.timings,
                                        figures=figures, plots=out["plots"], center=center,
                                        summary=summary, execution=state.execution)
    return state


def _run_stages(cfg, client) -> RunState:
    sections = set(cfg.get("_sections", ()))
    if cfg["input"]["velocity_map"]:
        state = RunState(config=cfg, client=client)
        state.velocity_map = _timed(state, "read", read_map, cfg["input"]["velocity_map"],
                                    unit="km/s", name="velocity map")
        sections.discard("maps")
    else:
        state = prepare(cfg, RunState(config=cfg, client=client))
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

    info = {"scheduler": cfg["run"]["scheduler"] or ("local cluster" if cfg["run"]["workers"]
                                                      else "in-process threads"),
            "workers": cfg["run"]["workers"], "max_memory_bytes": state.max_memory}
    if state.cube is not None:
        info["block_rows"] = task_rows(state.cube.shape, max_memory=state.max_memory,
                                       factor=2.5, client=state.client)
        info["cube_shape"] = list(state.cube.shape)
    return info


def _systemic(state) -> float | None:
    """Centre for velocity colour scales: the median moment-1 velocity of signal pixels."""
    rings = state.results.get("rings")
    if rings is not None:
        return rings.summary()["v_sys_kms"]
    maps = state.results.get("moments")
    v = getattr(maps, "moment1", None)
    if v is None or not np.isfinite(v).any():
        return None
    return float(np.nanmedian(v))
