"""Products: what a stage hands to the exporter.

Every stage result offers ``products()``, a list of :class:`Product`.  A product is a 2D
map, a 3D cube or a table, with a manifest key, a unit, a description and a ``kind``
that tells the plotting code how to show it.  The exporter writes whatever it is given,
so adding a product to a stage needs no change in the exporter.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import astropy.units as u
import numpy as np

__all__ = ["Product", "KINDS"]

KINDS = ("intensity", "velocity", "residual", "dispersion", "error", "count", "status", "mask",
         "noise", "ratio", "temperature", "cube", "table", "other")


@dataclass(frozen=True)
class Product:
    """One output of a stage.

    Attributes
    ----------
    key : str
        Manifest key, also the file stem (``moment0`` -> ``moment0.fits``).
    data : ndarray or astropy.table.Table
    unit : Unit
    description : str
    kind : str
        One of :data:`KINDS`; picks the colour map and whether a plot is made.
    plot : bool
        Make a PNG of it.
    extra_header : dict
        FITS keywords specific to this product (e.g. the status code table).
    wcs : astropy.wcs.WCS, optional
        For a cube that does not span the run's channels (a velocity window): its own WCS.
    meta : CubeMeta, optional
        Conventions and provenance of this product when they differ from the run's (a map
        of one line of several has its own rest value).
    """

    key: str
    data: object
    unit: u.UnitBase = u.one
    description: str = ""
    kind: str = "other"
    plot: bool = True
    extra_header: dict = field(default_factory=dict)
    wcs: object = None
    meta: object = None

    @property
    def is_table(self) -> bool:
        return not isinstance(self.data, np.ndarray)
