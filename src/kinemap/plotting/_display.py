"""Maps larger than a picture can show, reduced for their PNG.

A map PNG is about a thousand pixels wide, so drawing a 20000 x 20000 map at full size
costs gigabytes and shows nothing more.  :func:`display_map` averages blocks of f x f
pixels (NaN-aware) until the map is at most ``MAX_SIDE`` pixels on a side, and gives the
WCS of the reduced grid (astropy's ``WCS.slice`` with a step, which puts each new pixel
at the centre of its block).  Maps of categories (status codes, masks, counts) keep one
pixel of each block instead (its first: half a block off, which the picture cannot show),
so their values stay whole.  The FITS files keep every
pixel; the map is read a band at a time, so a map kept on disk is never wholly in memory.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass, replace

import numpy as np

from kinemap.parallel import store

__all__ = ["display_map", "display_frame", "MapFrame", "MAX_SIDE"]

MAX_SIDE = 1024  # pixels on the longer side of a map as drawn (the axes are ~700 wide)
_CATEGORIES = ("status", "mask", "count")


def _reduction(shape, meta, max_side: int):
    """(f, shape, meta) of a map of ``shape`` reduced by blocks of f x f pixels to at most
    ``max_side`` on a side (f = 1: the map and ``meta`` as they are)."""
    f = -(-max(shape) // max_side)
    if f <= 1 or meta is None:
        return 1, tuple(shape), meta
    wcs = meta.wcs.slice((slice(None, None, f), slice(None, None, f)))
    return f, (-(-shape[0] // f), -(-shape[1] // f)), replace(meta, wcs=wcs)


def display_frame(shape, meta, *, max_side: int = MAX_SIDE):
    """``(shape, MapFrame)`` of a map of ``shape`` as :func:`display_map` draws it."""
    _, shown, reduced = _reduction(tuple(shape), meta, max_side)
    return shown, MapFrame.of(reduced)


def display_map(data, meta, kind: str, *, max_side: int = MAX_SIDE):
    """``(map, meta)`` to draw: ``data`` and ``meta`` themselves when the map is at most
    ``max_side`` pixels on a side, else the block-reduced map and a meta with its WCS."""
    ny, nx = np.shape(data)
    f, (my, mx), reduced = _reduction((ny, nx), meta, max_side)
    if f <= 1:
        return data, meta
    out = np.empty((my, mx), dtype=np.float64 if kind not in _CATEGORIES else data.dtype)
    for ys, band in store.bands(data, axis=0, multiple=f):
        i0 = ys.start // f
        if kind in _CATEGORIES:
            small = band[::f, ::f]
        else:
            h = band.shape[0]
            padded = np.full((-(-h // f) * f, mx * f), np.nan)
            padded[:h, :nx] = band
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)  # blocks with no value: NaN
                small = np.nanmean(padded.reshape(-1, f, mx, f), axis=(1, 3))
        out[i0:i0 + small.shape[0]] = small
    return out, reduced


@dataclass(frozen=True)
class MapFrame:
    """What a map's picture takes from the cube's metadata: the celestial WCS, the beam
    and the pixel scale.  Unlike the metadata (which may hold an open file), it pickles,
    so a map can be drawn in another process."""

    wcs: object
    beam: object = None
    pixel_scale_arcsec: float | None = None

    @classmethod
    def of(cls, meta) -> "MapFrame":
        return cls(meta.wcs, getattr(meta, "beam", None),
                   getattr(meta, "pixel_scale_arcsec", None))
