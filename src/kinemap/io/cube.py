"""The reader's result: a cube that knows its velocity axis, conventions and provenance."""
from __future__ import annotations

from dataclasses import dataclass, field, replace

import astropy.units as u
import numpy as np
from astropy.wcs import WCS

__all__ = ["Cube", "CubeMeta"]


@dataclass(frozen=True)
class CubeMeta:
    """Everything later stages and the exporter need to know about where data came from.

    Attributes
    ----------
    wcs : astropy.wcs.WCS
        Celestial (2D) WCS of the (possibly subset) cube.
    bunit : astropy.units.UnitBase
        Unit of the cube values (``dimensionless_unscaled`` when the header has none,
        flagged by ``bunit_missing``).
    convention : str
        Velocity convention of :attr:`Cube.velocity` ('radio', 'optical', 'relativistic').
    rest_value : Quantity or None
        Rest frequency or wavelength used for velocities (in the cube's medium).
    frame : str
        Spectral reference frame of :attr:`Cube.velocity` (FITS SPECSYS value).
    beam : kinemap.io.beams.Beam or None
    medium : 'air', 'vacuum' or None
    ctype_original : str
        Spectral CTYPE as written in the file, before any repair.
    ctype : str
        Spectral CTYPE after wcslib's repairs.
    native_convention : str
        The convention implied by the axis itself.
    repairs : tuple of str
        Header repairs astropy/wcslib (and kinemap) made on reading.
    source : str
        Input file name.  ``checksum`` is its SHA-256 (computed in a background thread
        while the stages run; reading the property waits for it).
    spectral_unit : Unit
        Unit of :attr:`Cube.spectral`.
    subset : dict
        How the cube was cut (channel and pixel ranges, region file).
    memmapped : bool
        False when the file cannot be memory-mapped (scaled integers, compression).
    wcs3d : astropy.wcs.WCS
        Full WCS of the subset cube, axes (x, y, spectral) as in the file's spectral type,
        for writing cubes (masks, models) that line up with the input.
    """

    wcs: WCS
    bunit: u.UnitBase
    convention: str
    rest_value: u.Quantity | None
    frame: str
    beam: object | None
    medium: str | None
    ctype_original: str
    ctype: str
    native_convention: str
    repairs: tuple = ()
    source: str = ""
    checksum_job: object = None
    bunit_missing: bool = False
    spectral_unit: u.UnitBase = u.one
    subset: dict = field(default_factory=dict)
    memmapped: bool = True
    wcs3d: WCS | None = None

    @property
    def checksum(self) -> str:
        job = self.checksum_job
        if job is None:
            return ""
        return job.result() if hasattr(job, "result") else str(job)

    @property
    def pixel_scale_arcsec(self) -> float:
        """Mean pixel size in arcsec (from the celestial WCS)."""
        from astropy.wcs.utils import proj_plane_pixel_scales

        return float(np.mean(proj_plane_pixel_scales(self.wcs)) * 3600.0)


@dataclass(frozen=True)
class Cube:
    """A spectral-line cube ready for the later stages.

    Attributes
    ----------
    data : array-like
        Values, shape (nchan, ny, nx): a numpy memory-map view where the file allows
        (read from disk only when sliced), else an in-memory array; a dask array works
        too.  NaN means no data.  Walk it in blocks (``cube._blocks.map_blocks``).
    velocity : ndarray
        Channel-centre velocities, float64 km/s, in ``meta.convention`` and ``meta.frame``.
    spectral : Quantity
        Channel-centre spectral coordinates as on the file's axis (Hz, m or m/s).
    footprint : ndarray of bool or None
        Spatial selection (True = inside the user's region); None means everything.
    source : kinemap.io._source.FileSource or None
        How to read rows straight from the file (bounded memory, other processes); None
        when the data live only in memory (e.g. after convolution to a common beam).
    meta : CubeMeta
    """

    data: object
    velocity: np.ndarray
    spectral: u.Quantity
    meta: CubeMeta
    footprint: np.ndarray | None = None
    source: object = None

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(int(n) for n in self.data.shape)

    @property
    def nchan(self) -> int:
        return self.shape[0]

    @property
    def channel_width(self) -> np.ndarray:
        """Absolute channel width per channel in km/s (from neighbouring centres)."""
        v = self.velocity
        if v.size < 2:
            return np.ones_like(v)
        return np.abs(np.gradient(v))

    def with_rest_value(self, rest_value) -> "Cube":
        """The same cube with velocities measured from another rest value (a quantity or
        a catalogue line name, taken in the cube's medium), in the same convention and
        frame.  The velocities go through frequency or wavelength with the old rest value,
        so a frame change made on reading is kept."""
        from kinemap.errors import KinemapError
        from kinemap.spectral.axes import from_velocity, to_velocity
        from kinemap.spectral.catalogue import resolve_rest_value

        rest = resolve_rest_value(rest_value, self.meta.ctype)
        old = self.meta.rest_value
        if old is None:
            raise KinemapError("the cube's axis is a velocity axis with no rest value, so "
                               "velocities cannot be moved to another line; give the cube's "
                               "rest value with --rest-value")
        physical = from_velocity(self.velocity, convention=self.meta.convention,
                                 rest_value=old, unit=old.unit)
        velocity = to_velocity(physical.to(rest.unit, equivalencies=u.spectral()),
                               convention=self.meta.convention, rest_value=rest)
        return replace(self, velocity=velocity, meta=replace(self.meta, rest_value=rest))

    def with_changes(self, **kwargs) -> "Cube":
        """A copy with fields replaced; new data drop the file source (it no longer applies)."""
        if "data" in kwargs and "source" not in kwargs:
            kwargs["source"] = None
        return replace(self, **kwargs)
