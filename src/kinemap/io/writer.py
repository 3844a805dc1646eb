"""Write a stage's products into a folder: FITS, ECSV, PNG, manifest.json.

This is the only place (with :mod:`.outdir`) that writes files.  It takes a list of
:class:`kinemap.io.products.Product` and extra figures, so stages never know about files.
"""
from __future__ import annotations

import time
import warnings
from pathlib import Path

import numpy as np

from kinemap.io.fitsmaps import product_header, write_fits
from kinemap.io.manifest import build_manifest, write_json

__all__ = ["write_products"]


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
        Extra plots made by the stages (spectra panels, rotation curves, ...).
    center : float, optional
        Systemic velocity (km/s) at which velocity maps' colour scales are centred.
    execution : dict, optional
        Where and how the blocks ran (scheduler, workers, block size), for the manifest.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    if plots:  # matplotlib costs a third of a second to import: only when plotting
        from kinemap.plotting.maps import plot_map, save
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
            header = product_header(meta, unit=p.unit, description=p.description, key=p.key,
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
            save(fig, folder / f"{key}.png")
            figure_list[key] = {"path": f"{key}.png", "description": description}
    timings = dict(timings)
    timings["export"] = time.perf_counter() - t0
    doc = build_manifest(meta, written, timings=timings, options=options, figures=figure_list,
                         summary=summary, execution=execution)
    write_json(folder / "manifest.json", doc)
    return doc
