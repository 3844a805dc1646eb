"""What every stage result shares: its products as Projections, and ``write()``.

A stage result (moment maps, line fits, rings, width budget) lists its outputs as
:class:`~kinemap.io.products.Product` objects.  :class:`StageResult` turns them into what
a notebook user wants: each product key is an attribute, a 2D map is a
``spectral_cube.Projection`` (a Quantity with its unit, the cube's celestial WCS, its
beam and meta), a table stays an astropy table, and ``write(folder)`` writes the same
FITS/ECSV/PNG/manifest files the command writes.
"""
from __future__ import annotations

from dataclasses import dataclass, replace
from typing import ClassVar

import numpy as np

from kinemap.io.products import Product

__all__ = ["StageResult", "PerLine", "to_projection", "radio_beam_of"]


def radio_beam_of(meta):
    """The cube's beam as a ``radio_beam.Beam`` (what spectral-cube expects), or None."""
    beam = getattr(meta, "beam", None)
    if beam is None:
        return None
    from radio_beam import Beam

    return Beam(major=beam.major, minor=beam.minor, pa=beam.pa)


def to_projection(product: Product, meta):
    """A ``spectral_cube.Projection`` of a 2D product: values in ``product.unit``, the
    cube's celestial WCS and beam, and the conventions in ``.meta``."""
    from spectral_cube import Projection

    info = {"key": product.key, "description": product.description}
    if meta is not None:
        info.update(convention=meta.convention, frame=meta.frame, source=meta.source,
                    rest_value=meta.rest_value)
    data = np.asarray(product.data)
    if data.dtype.kind in "biu":  # counts, status codes, masks: keep them whole numbers
        data = data.astype(np.float32)
    return Projection(data, unit=product.unit, wcs=None if meta is None else meta.wcs,
                      beam=radio_beam_of(meta), meta=info, copy=False)


class StageResult:
    """Mixin for frozen result dataclasses that have ``meta`` and ``products()``.

    Subclasses set ``name`` (the manifest's summary key; :mod:`kinemap.plotting` draws
    the result's figures by it) and implement :meth:`products`; they may override
    :meth:`summary` and :meth:`systemic_velocity`.
    """

    name: ClassVar[str] = ""  # summary key in the manifest; picks the plotting module

    def products(self) -> list[Product]:  # pragma: no cover - abstract
        raise NotImplementedError

    def summary(self) -> dict:
        return {}

    def systemic_velocity(self) -> float | None:
        """Velocity (km/s) at which the plots centre velocity colour scales, if known."""
        return None

    def _product_map(self) -> dict:
        cache = self.__dict__.get("_products_cache")
        if cache is None:
            cache = {p.key: p for p in self.products()}
            object.__setattr__(self, "_products_cache", cache)  # frozen: a private cache
        return cache

    @property
    def keys(self) -> list[str]:
        """The product keys, as in ``manifest.json`` and the file names."""
        return list(self._product_map())

    def __getattr__(self, name):
        if name.startswith("_"):
            raise AttributeError(name)
        products = self._product_map()
        if name not in products:
            raise AttributeError(f"{type(self).__name__} has no attribute or product {name!r}; "
                                 f"products: {', '.join(products)}")
        p = products[name]
        if p.is_table or np.ndim(p.data) != 2:
            return p.data
        return to_projection(p, p.meta or getattr(self, "meta", None))

    def __dir__(self):
        return sorted(set(super().__dir__()) | set(self._product_map()))

    def write(self, folder, *, overwrite: bool = False, plots: bool = True) -> dict:
        """Write this result's products (FITS maps, ECSV tables, PNGs, manifest.json) into
        ``folder``, as the command does.  Returns the manifest."""
        from kinemap.io.writer import write_results

        return write_results([self], folder, overwrite=overwrite, plots=plots)


@dataclass(frozen=True)
class PerLine(StageResult):
    """Results of the same stages for several lines of one cube.

    ``results`` maps a line name to that line's results (moment maps, fits); every product
    key gets the suffix ``_<LINE>`` (``moment1_Halpha``) and keeps its line's rest value in
    its header.  ``results['Halpha'][0]`` is the line's first result itself.
    """

    name: ClassVar[str] = "lines"

    results: dict
    meta: object = None

    def products(self) -> list[Product]:
        out = []
        for line, results in self.results.items():
            for r in results:
                for p in r.products():
                    if p.key == "noise":  # the same for every line: written once, unsuffixed
                        continue
                    out.append(replace(p, key=f"{p.key}_{line}",
                                       description=f"{p.description} ({line})", meta=r.meta))
        return out

    def summary(self) -> dict:
        return {line: {r.name: r.summary() for r in results if r.summary()}
                for line, results in self.results.items()}
