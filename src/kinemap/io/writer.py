"""Write a stage's products into a folder: FITS, ECSV, PNG, manifest.json.

This is the only place (with :mod:`.outdir`) that writes files.  It takes a list of
:class:`kinemap.io.products.Product` and extra figures, so stages never know about files.
"""
from __future__ import annotations

import time
import warnings
from pathlib import Path

import numpy as np

from kinemap.errors import KinemapError, ProductWarning
from kinemap.io.fitsmaps import product_header, write_fits
from kinemap.io.manifest import build_manifest, write_json
from kinemap.io.outdir import StagedOutput, writing_into

__all__ = ["write_products", "write_results", "empty_products"]


def _has_finite(p) -> bool | None:
    """Whether a product holds any finite value; None when it holds no floating-point
    values at all (masks, counts, status codes, text columns), which cannot be NaN."""
    if p.is_table:
        cols = [np.asarray(p.data[c]) for c in p.data.colnames]
        cols = [c for c in cols if np.issubdtype(c.dtype, np.floating)]
    else:
        cols = [np.asarray(p.data)]
        cols = [c for c in cols if np.issubdtype(c.dtype, np.floating)
                or np.issubdtype(c.dtype, np.complexfloating)]
    if not cols:
        return None
    return any(bool(np.isfinite(c).any()) for c in cols)


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
    if plots:  # matplotlib costs a third of a second to import: only when plotting
        from kinemap.plotting.maps import plot_map, save, save_pages
    t0 = time.perf_counter()
    written = {}
    figure_list = {}
    for p in products:
        if p.is_table:
            name = f"{p.key}.ecsv"
            p.data.meta["description"] = p.description
            p.data.write(folder / name, format="ascii.ecsv", overwrite=True)
        else:
            arr = np.asarray(p.data)
            name = f"{p.key}.fits"
            header = product_header(p.meta or meta, unit=p.unit, description=p.description, key=p.key,
                                    options=options, ndim=arr.ndim, extra=p.extra_header,
                                    wcs=p.wcs)
            write_fits(folder / name, arr, header)
            if plots and p.plot and arr.ndim == 2:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    fig = plot_map(arr, meta, title=p.description, unit=p.unit, kind=p.kind,
                                   center=center)
                    save(fig, folder / f"{p.key}.png")
                figure_list[p.key] = {"path": f"{p.key}.png", "description": p.description}
        written[p.key] = {"path": name, "unit": p.unit, "description": p.description}
    for key, (fig, description) in (figures or {}).items():
        if plots:
            # a list of figures is a document of pages: one multi-page PDF
            name = f"{key}.pdf" if isinstance(fig, (list, tuple)) else f"{key}.png"
            (save_pages if isinstance(fig, (list, tuple)) else save)(fig, folder / name)
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
