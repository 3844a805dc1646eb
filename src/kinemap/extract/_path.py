"""The path of a position-velocity cut: vertices on the sky, samples along it in pixels."""
from __future__ import annotations

from dataclasses import dataclass

import astropy.units as u
import numpy as np

from kinemap.errors import KinemapError
from kinemap.io.positions import parse_position, position_pixels, show_position
from kinemap.units import to_value

__all__ = ["CutPath", "path_from_points", "path_from_center", "path_from_region", "sample_points"]


@dataclass(frozen=True)
class CutPath:
    """A polyline on the map.  ``x``, ``y``: 0-based pixel positions of the vertices;
    ``lengths``: sky length of each segment (arcsec); ``zero``: the offset (arcsec from the
    start) that is called 0 (the centre of a --center cut, else the start)."""

    x: np.ndarray
    y: np.ndarray
    lengths: np.ndarray
    zero: float
    description: str
    bends: bool = True  # False for a straight --center cut (its centre is no bend)

    @property
    def length(self) -> float:
        return float(self.lengths.sum())


def _vertices(coords, wcs, shape_yx, name):
    xy = [position_pixels(c, wcs, shape_yx, name=name) for c in coords]
    return np.array([p[0] for p in xy]), np.array([p[1] for p in xy])


def _build(coords, wcs, shape_yx, zero_fraction, description, name, bends=True):
    if len(coords) < 2:
        raise KinemapError(f"'{name}' needs at least two positions like 'RA1,DEC1;RA2,DEC2'")
    sky = [parse_position(c, name) for c in coords]
    x, y = _vertices(sky, wcs, shape_yx, name)
    lengths = np.array([a.separation(b).to_value(u.arcsec) for a, b in zip(sky[:-1], sky[1:])])
    if np.any(lengths <= 0):
        raise KinemapError(f"'{name}' repeats a position; give distinct positions")
    return CutPath(x, y, lengths, zero_fraction * float(lengths.sum()), description, bends)


def path_from_points(path, wcs, shape_yx) -> CutPath:
    """'RA1,DEC1;RA2,DEC2[;...]' (or a list of positions): offsets from the first point."""
    coords = [p for p in path.split(";") if p.strip()] if isinstance(path, str) else list(path)
    return _build(coords, wcs, shape_yx, 0.0,
                  "path " + ";".join(show_position(c).strip() for c in coords), "path")


def path_from_center(center, position_angle, length, wcs, shape_yx) -> CutPath:
    """A straight cut of ``length`` (arcsec) through ``center`` towards ``position_angle``
    (deg east of north; positive offsets that way), offset 0 at the centre."""
    if position_angle is None or length is None:
        raise KinemapError("a cut through --center needs --position-angle (--pa) and --length")
    pa = float(to_value(position_angle, u.deg, name="position_angle"))
    ln = float(to_value(length, u.arcsec, name="length"))
    if not (np.isfinite(ln) and ln > 0) or not np.isfinite(pa):
        raise KinemapError(f"'length' must be a positive angle (arcsec), got {length!r}")
    c = parse_position(center, "center")
    half = ln / 2 * u.arcsec
    ends = [c.directional_offset_by((pa + 180.0) * u.deg, half), c,
            c.directional_offset_by(pa * u.deg, half)]
    try:
        return _build(ends, wcs, shape_yx, 0.5, f"cut through {show_position(center)} at PA "
                      f"{pa:g} deg, "
                      f"{ln:g} arcsec long", "center", bends=False)
    except KinemapError:
        raise KinemapError(f"a cut {ln:g} arcsec long through {show_position(center)} at PA "
                           f"{pa:g} deg runs "
                           "off the map; shorten --length or move --center") from None


def path_from_region(path, wcs, shape_yx) -> CutPath:
    """The line regions of a DS9 or CRTF file, in file order, joined into one polyline
    (each line must start where the previous ended)."""
    import os

    import regions

    if not os.path.exists(path):
        raise KinemapError(f"region file not found: {path}")
    try:
        regs = regions.Regions.read(str(path), format="crtf" if open(path, errors="replace").read(
            200).lstrip().startswith("#CRTF") else "ds9")
    except Exception as exc:  # regions raises many types for bad files
        raise KinemapError(f"could not read region file {path}: {exc}") from None
    lines = [r for r in regs if isinstance(r, (regions.LineSkyRegion, regions.LinePixelRegion))]
    if not lines:
        raise KinemapError(f"{path} holds no line region; draw the cut as a line")
    points = []
    for reg in lines:
        if isinstance(reg, regions.LinePixelRegion):
            reg = reg.to_sky(wcs)
        if points and points[-1].separation(reg.start).to_value(u.arcsec) > 1e-3 * 3600:
            raise KinemapError(f"the lines in {path} do not join end to start; draw one "
                               "line or a chain of lines")
        points += [reg.start, reg.end] if not points else [reg.end]
    return _build(points, wcs, shape_yx, 0.0, f"line(s) in {os.path.basename(path)}", "region")


def sample_points(cut: CutPath, step: float, width: float | None):
    """``(offsets, xs, ys)``: offsets (arcsec, 0 at ``cut.zero``) every ``step`` arcsec along
    the cut, including offset 0, and pixel positions of shape (n_across, n_offset): one
    line, or lines ``step`` apart across ``width`` (arcsec) centred on the cut."""
    n_before = int(np.floor(cut.zero / step + 1e-9))
    n_after = int(np.floor((cut.length - cut.zero) / step + 1e-9))
    offsets = np.arange(-n_before, n_after + 1) * step
    s = offsets + cut.zero
    bounds = np.concatenate([[0.0], np.cumsum(cut.lengths)])
    seg = np.clip(np.searchsorted(bounds, s, side="right") - 1, 0, cut.lengths.size - 1)
    t = (s - bounds[seg]) / cut.lengths[seg]
    x = cut.x[seg] + t * (cut.x[seg + 1] - cut.x[seg])
    y = cut.y[seg] + t * (cut.y[seg + 1] - cut.y[seg])
    nacross = 1 if not width else max(1, int(round(width / step)))
    across = (np.arange(nacross) - (nacross - 1) / 2) * step
    dx, dy = cut.x[seg + 1] - cut.x[seg], cut.y[seg + 1] - cut.y[seg]
    norm = np.hypot(dx, dy)
    pix_per_arcsec = norm / cut.lengths[seg]  # the segment's own scale
    nx, ny = -dy / norm * pix_per_arcsec, dx / norm * pix_per_arcsec  # unit normal, per arcsec
    xs = x[None] + across[:, None] * nx[None]
    ys = y[None] + across[:, None] * ny[None]
    return offsets, xs, ys
