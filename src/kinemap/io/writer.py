"""Write a stage's products into a folder: FITS, ECSV, PNG, manifest.json.

This is the only place (with :mod:`.outdir`) that writes files.  It takes a list of
:class:`kinemap.io.products.Product` and extra figures, so stages never know about files.
"""
from __future__ import annotations

import contextlib
import re
import time
import warnings
from pathlib import Path

import numpy as np

from kinemap.errors import KinemapError, ProductWarning
from kinemap.io.fitsmaps import product_header, write_fits
from kinemap.io.manifest import build_manifest, write_json
from kinemap.io.outdir import StagedOutput, writing_into
from kinemap.parallel.store import any_finite

__all__ = ["write_products", "write_results", "empty_products", "drawing_processes",
           "prepare_maps"]


def _has_finite(p) -> bool | None:
    """Whether a product holds any finite value; None when it holds no floating-point
    values at all (masks, counts, status codes, text columns), which cannot be NaN."""
    if p.is_table:
        cols = [np.asarray(p.data[c]) for c in p.data.colnames]
        cols = [c for c in cols if np.issubdtype(c.dtype, np.floating)]
    else:
        cols = [p.data if isinstance(p.data, np.ndarray) else np.asarray(p.data)]
        cols = [c for c in cols if np.issubdtype(c.dtype, np.floating)
                or np.issubdtype(c.dtype, np.complexfloating)]
    if not cols:
        return None
    return any(any_finite(c) for c in cols)


def _listed(results):
    """``(result, its products)`` pairs; a pair passes through (products are made once)."""
    return [r if isinstance(r, tuple) else (r, r.products()) for r in results]


def empty_products(results) -> dict:
    """``{stage name: [keys of products with no finite value]}`` for ``results``.

    A stage none of whose products holds a finite value made nothing that could be right:
    that is a KinemapError (nothing is written).  Single empty products of a stage that made
    others are returned, to be warned about and listed in the manifest.
    """
    out = {}
    for r, products in _listed(results):
        state = {p.key: _has_finite(p) for p in products}
        judged = {k: v for k, v in state.items() if v is not None}
        if judged and not any(judged.values()):
            raise KinemapError(
                f"the {r.name} stage produced no finite value in any of its {len(judged)} "
                f"products ({', '.join(list(judged)[:4])}{', ...' if len(judged) > 4 else ''}); "
                "nothing it made could be right: check the cube with 'kinemap info', the mask "
                "and this stage's options (nothing was written)")
        empty = [k for k, v in judged.items() if v is False]
        if empty:
            out[r.name] = empty
    return out


def write_results(results, folder, *, overwrite: bool = False, plots: bool = True,
                  options: dict | None = None, timings: dict | None = None,
                  execution: dict | None = None, staged: bool = True) -> dict:
    """Write the products, figures and summaries of stage results into ``folder``.

    The one route from results to files, used by ``result.write()``, the config runner
    and the demo.  With ``staged`` (the default) files are written into a staging folder
    and moved in only when all were written (``folder`` must be empty unless
    ``overwrite``); ``staged=False`` writes straight into an already staged folder.

    Returns the manifest (a dict).
    """
    listed = _listed(results)
    if not listed:
        raise ValueError("write_results needs at least one result")
    results = [r for r, _ in listed]
    empty = empty_products(listed)
    meta = next((r.meta for r in results if getattr(r, "meta", None) is not None), None)
    products, figures, summary = [], {}, {}
    for r, made in listed:
        products.extend(made)
        s = r.summary()
        if s or r.name in empty:
            summary[r.name] = dict(s or {})
        if r.name in empty:
            summary[r.name]["empty_products"] = empty[r.name]
        if plots:
            from kinemap.plotting import figures_for

            figures.update(figures_for(r))
    if timings is None:
        timings = {r.name: float(getattr(r, "seconds", 0.0)) for r in results}
    center = next((c for c in (r.systemic_velocity() for r in reversed(results))
                   if c is not None), None)
    kwargs = dict(options=options or {}, timings=timings, figures=figures, plots=plots,
                  center=center, summary=summary, execution=execution)
    keys = [k for ks in empty.values() for k in ks]
    if keys:
        warnings.warn(f"{len(keys)} product(s) hold no finite value and are written as NaN: "
                      f"{', '.join(keys[:6])}{' and more' if len(keys) > 6 else ''} (see "
                      "'empty_products' in the manifest)", ProductWarning, stacklevel=2)
    if not staged:  # the caller staged the folder and names it in errors
        return write_products(folder, meta, products, **kwargs)
    with StagedOutput(folder, overwrite=overwrite) as stage, writing_into(folder):
        return write_products(stage.path, meta, products, **kwargs)


def write_products(folder, meta, products, *, options: dict, timings: dict,
                   figures: dict | None = None, plots: bool = True, center: float | None = None,
                   summary: dict | None = None, execution: dict | None = None) -> dict:
    """Write ``products`` into ``folder`` (normally a staging folder) and return the manifest.

    Parameters
    ----------
    folder : path
    meta : kinemap.io.cube.CubeMeta
        WCS, conventions and provenance for every file.
    products : list of Product
    figures : dict name -> (matplotlib Figure, description)
        Extra plots made by the stages (spectra panels, rotation curves, ...), each a PNG;
        a list of Figures instead of one is written as one multi-page PDF.
    center : float, optional
        Systemic velocity (km/s) at which velocity maps' colour scales are centred.
    execution : dict, optional
        Where and how the blocks ran (scheduler, workers, block size), for the manifest.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    written, figure_list = {}, {}
    with _PngWriter(plots) as png:
        for p in products:
            written[p.key] = _write_product(folder, meta, p, options, center, png, figure_list)
        for key, (fig, description) in (figures or {}).items():
            if png.enabled:
                # a list of figures is a document of pages: one multi-page PDF
                name = f"{key}.pdf" if isinstance(fig, (list, tuple)) else f"{key}.png"
                png.submit(_figure_png, fig, folder / name)
                figure_list[key] = {"path": name, "description": description}
    timings = dict(timings)
    timings["export"] = time.perf_counter() - t0
    doc = build_manifest(meta, written, timings=timings, options=options, figures=figure_list,
                         summary=summary, execution=execution)
    empty = sorted(k for s in (summary or {}).values() if isinstance(s, dict)
                   for k in s.get("empty_products", ()))
    if empty:
        doc["empty_products"] = empty
    write_json(folder / "manifest.json", doc)
    return doc


def _write_product(folder, meta, p, options, center, png, figure_list) -> dict:
    """Write one product's file (and queue its map PNG); its manifest entry."""
    if p.is_table:
        name = f"{p.key}.ecsv"
        p.data.meta["description"] = p.description
        p.data.write(folder / name, format="ascii.ecsv", overwrite=True)
    else:
        arr = p.data if isinstance(p.data, np.ndarray) else np.asarray(p.data)
        name = f"{p.key}.fits"
        header = product_header(p.meta or meta, unit=p.unit, description=p.description, key=p.key,
                                options=options, ndim=arr.ndim, extra=p.extra_header,
                                wcs=p.wcs)
        write_fits(folder / name, arr, header)
        if png.enabled and p.plot and arr.ndim == 2:
            png.submit_map(arr, meta, p, center, folder / f"{p.key}.png")
            figure_list[p.key] = {"path": f"{p.key}.png", "description": p.description}
    return {"path": name, "unit": p.unit, "description": p.description}


_DRAWING = None  # the map-drawing processes started by drawing_processes, if any
_DRAWING_COUNT = 0  # how many


@contextlib.contextmanager
def drawing_processes(enabled: bool = True):
    """Map-drawing processes for the PNGs of the run inside the block.

    Drawing is Python and holds the GIL, so a thread of the run's process overlaps it
    with little (and the plotting stack's import, about a second, slowed the computing
    stages as much as it gained).  Where processes can be forked (Linux) and there is
    more than one core, one process per core but one (up to MAX_PROCESSES) is forked here,
    before the stages run: each imports the plotting stack while the run computes, and the
    writer sends them the map PNGs (the map, reduced to a picture's worth of pixels, and
    a picklable MapFrame).  A map's PNG does not depend on where it is drawn.  Elsewhere
    (and for the stages' own figures, matplotlib objects of this process) a thread draws.
    The processes end with the block.
    """
    global _DRAWING, _DRAWING_COUNT
    pool, n = _start_drawing() if enabled and _DRAWING is None else (None, 0)
    if pool is None:
        yield
        return
    _DRAWING, _DRAWING_COUNT = pool, n
    try:
        yield
    finally:
        _DRAWING, _DRAWING_COUNT = None, 0
        pool.shutdown(wait=True, cancel_futures=True)


MAX_PROCESSES = 4


def _start_drawing():
    import multiprocessing
    import os
    import sys

    # one core stays with the run: on 2 cores one drawing process beat two (2.65 against
    # 2.85 s, best of 6; two slowed the stages with their imports) and a thread (3.31 s)
    n = min(MAX_PROCESSES, (os.cpu_count() or 1) - 1)
    if n < 1 or not sys.platform.startswith("linux"):
        return None, 0
    from concurrent.futures import ProcessPoolExecutor

    try:
        with warnings.catch_warnings():
            # Python 3.12+ notes that a forked child of a process with threads may
            # deadlock on a lock another thread held; these only import and draw
            warnings.simplefilter("ignore", DeprecationWarning)
            pool = ProcessPoolExecutor(n, mp_context=multiprocessing.get_context("fork"),
                                       initializer=_drawing_process, initargs=(os.getpid(),))
            pool.submit(int)  # forks the processes now, so they import beside the stages
    except (OSError, ValueError):
        return None, 0
    return pool, n


def _drawing_process(parent: int):
    """Start of a map-drawing process: it dies with the run's process (a killed run must
    not leave processes holding its output folder's lock and its pipes), leaves Ctrl-C to
    the run (which stops it), and imports the plotting stack."""
    import ctypes
    import os
    import signal

    try:  # Linux: SIGKILL when the process that forked this one ends (PR_SET_PDEATHSIG)
        ctypes.CDLL(None, use_errno=True).prctl(1, int(signal.SIGKILL), 0, 0, 0)
    except (OSError, AttributeError):
        pass
    if os.getppid() != parent:  # it ended before that was set
        os._exit(0)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _warm()


def _warm():
    try:
        from importlib import import_module

        for name in ("astropy.visualization.wcsaxes", "kinemap.plotting.maps"):
            import_module(name)
        from matplotlib.font_manager import FontProperties
        from matplotlib.mathtext import MathTextParser

        MathTextParser("agg").parse(r"$10^\circ15^\prime$", dpi=120, prop=FontProperties())
    except Exception:  # noqa: BLE001 - only a head start: the PNG jobs import for real
        pass


def prepare_maps(meta, shape) -> None:
    """Have the drawing processes lay out a map of ``shape`` on the cube's frame now (the
    layout's measurement, the figure they keep, the frame's picture: the first map's
    extra cost), while the stages compute.  Best effort: a process that misses it does
    that at its first map.  Nothing happens without drawing processes."""
    if _DRAWING is None:
        return
    from kinemap.plotting._display import display_frame

    shown, frame = display_frame(tuple(shape), meta)
    for _ in range(_DRAWING_COUNT):
        _DRAWING.submit(_prepare_map, shown, frame)


def _prepare_map(shape, frame):
    import io

    from kinemap.plotting.maps import save_map

    ramp = np.linspace(0.0, 1.0, shape[0] * shape[1]).reshape(shape)  # not a constant map
    save_map(io.BytesIO(), ramp, frame, title="map", unit="km/s", kind="intensity")


def _map_png(arr, frame, title, unit, kind, center, path):
    from kinemap.plotting.maps import save_map

    save_map(path, arr, frame, title=title, unit=unit, kind=kind, center=center)


def _figure_png(fig, path):
    from kinemap.plotting.maps import save, save_pages

    (save_pages if isinstance(fig, (list, tuple)) else save)(fig, path)


class _PngWriter:
    """Draws and saves PNGs beside the caller's FITS writes.

    Map PNGs go to the drawing processes of :func:`drawing_processes` when the run has
    them, else, with the stages' own figures, to a worker thread.  Each job draws its own
    Figure with the object API on an Agg canvas (no pyplot state), which matplotlib
    supports on any thread; a map's PNG is the same wherever it is drawn.  One thread
    only: two drawing at once failed now and then in mathtext (the tick labels' degree
    signs), whose parser keeps global state.  Leaving the block waits for every PNG and
    raises the first error; a map whose process died is drawn again on the thread.

    Warnings: the PNG code's were always silenced; the warnings filter is global, not
    per thread, so all warnings of the block are recorded and, at its end, those not
    raised by plotting code are issued again (the FITS writes' warnings still show).
    """

    WORKERS = 1
    _PLOTTING = re.compile(r"[/\\](matplotlib|pyparsing|PIL|wcsaxes|plotting)[/\\]")

    def __init__(self, enabled: bool):
        self.enabled = bool(enabled)
        self._pool, self._jobs, self._warnings, self._caught = None, [], None, []

    def __enter__(self):
        if self.enabled:
            from concurrent.futures import ThreadPoolExecutor

            self._warnings = warnings.catch_warnings(record=True)
            self._caught = self._warnings.__enter__()
            warnings.simplefilter("always")
            self._pool = ThreadPoolExecutor(self.WORKERS, thread_name_prefix="kinemap-png")
        return self

    def submit(self, fn, *args):
        """Run ``fn(*args)`` on the thread."""
        self._jobs.append((self._pool.submit(fn, *args), fn, args))

    def submit_map(self, arr, meta, product, center, path):
        """Draw the map ``arr`` of ``product`` into ``path`` (in a drawing process when
        the run has them)."""
        from concurrent.futures.process import BrokenProcessPool

        from kinemap.plotting._display import MapFrame, display_map

        arr, shown = display_map(arr, meta, product.kind)  # a picture's worth of pixels
        args = (np.asarray(arr), MapFrame.of(shown), product.description, product.unit,
                product.kind, center, path)
        if _DRAWING is not None:
            try:
                self._jobs.append((_DRAWING.submit(_map_png, *args), _map_png, args))
                return
            except (BrokenProcessPool, RuntimeError):
                pass
        self.submit(_map_png, *args)

    def __exit__(self, *exc):
        if self._pool is None:
            return False
        from concurrent.futures.process import BrokenProcessPool

        try:
            for job, fn, args in self._jobs:
                if exc[0] is not None:
                    job.cancel()
                    continue
                try:
                    job.result()
                except BrokenProcessPool:
                    self._pool.submit(fn, *args).result()
        finally:
            self._pool.shutdown(wait=True)
            self._warnings.__exit__(None, None, None)
        for w in self._caught:
            if not self._PLOTTING.search(w.filename or ""):
                warnings.warn_explicit(w.message, w.category, w.filename, w.lineno,
                                       source=w.source)
        return False
