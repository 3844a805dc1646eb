"""Orientation and scale of a celestial pixel grid, as the tilted-ring fitter needs them.

A position angle is measured on the sky (degrees east of north), but the fitter works on a
pixel grid.  :class:`SkyGrid` holds the local 2x2 matrix that turns a pixel offset
``(dx, dy)`` into a sky offset ``(east, north)`` in arcsec, so that position angles are
right on any map: north up or rotated, east left (the usual sky view, CDELT1 < 0) or
mirrored, square or slightly non-square pixels.
"""
from __future__ import annotations

from dataclasses import dataclass

import astropy.units as u
import numpy as np

from kinemap.units import to_value
from kinemap.errors import KinemapError

__all__ = ["SkyGrid"]


@dataclass(frozen=True, eq=False)
class SkyGrid:
    """Local sky geometry of a 2-D pixel grid.

    Attributes
    ----------
    jacobian : tuple of tuple of float
        ``((dE/dx, dE/dy), (dN/dx, dN/dy))`` in arcsec per pixel: a pixel offset
        ``(dx, dy)`` (x = column, y = row) moves ``E`` arcsec east and ``N`` arcsec north.
        Treated as constant over the map (a flat-sky approximation, fine for maps of a
        few degrees or less).

    Notes
    -----
    Build one with :meth:`from_scale` (north angle + handedness) or :meth:`from_wcs`.
    """

    jacobian: tuple[tuple[float, float], tuple[float, float]]

    def __post_init__(self):
        jac = np.asarray(self.jacobian, dtype=float)
        if jac.shape != (2, 2) or not np.all(np.isfinite(jac)):
            raise KinemapError(
                f"'jacobian' must be a finite 2x2 matrix in arcsec per pixel, got {self.jacobian!r}"
            )
        if abs(np.linalg.det(jac)) <= 1e-12 * max(np.abs(jac).max(), 1e-300) ** 2:
            raise KinemapError("'jacobian' is singular: the pixel grid has no area on the sky; check the WCS")
        object.__setattr__(self, "jacobian", tuple(tuple(float(v) for v in row) for row in jac))

    # ------------------------------------------------------------------ constructors
    @classmethod
    def from_scale(
        cls,
        pixel_scale,
        *,
        north_angle=0.0 * u.deg,
        east_left: bool = True,
    ) -> "SkyGrid":
        """Square pixels of side ``pixel_scale`` with north at ``north_angle``.

        Parameters
        ----------
        pixel_scale : `~astropy.units.Quantity` or float
            Angular side of a pixel (plain numbers are arcsec).
        north_angle : `~astropy.units.Quantity` or float, optional
            Angle of the north direction on the pixel grid, measured from the +y axis
            counter-clockwise (towards -x) as the map is displayed with ``origin='lower'``.
            0 means north is up (plain numbers are degrees).
        east_left : bool, optional
            True (default) when east is 90 deg counter-clockwise from north on the grid,
            i.e. east is to the left when north is up: the normal sky view (CDELT1 < 0).
            False for a mirrored grid (east to the right).
        """
        scale = to_value(pixel_scale, u.arcsec, name="pixel_scale")
        if not np.isscalar(scale) and np.ndim(scale) != 0:
            raise KinemapError(f"'pixel_scale' must be one angle, got {pixel_scale!r}")
        scale = float(scale)
        if not np.isfinite(scale) or scale <= 0:
            raise KinemapError(f"'pixel_scale' must be a positive angle per pixel, got {pixel_scale!r}")
        phi = np.deg2rad(float(to_value(north_angle, u.deg, name="north_angle")))
        north = np.array([-np.sin(phi), np.cos(phi)])  # unit vector of north on the grid
        east = np.array([-np.cos(phi), -np.sin(phi)]) if east_left else np.array([np.cos(phi), np.sin(phi)])
        # north and east are orthonormal on the grid, so E = s (d . east), N = s (d . north)
        return cls(jacobian=(tuple(scale * east), tuple(scale * north)))

    @classmethod
    def from_wcs(cls, wcs, *, shape: tuple[int, int] | None = None) -> "SkyGrid":
        """Derive the grid geometry from a celestial (or cube) `~astropy.wcs.WCS`.

        The matrix is measured numerically at the map centre (``shape`` given, as
        ``(ny, nx)``) or at the reference pixel, by converting pixel offsets of +-0.5 to
        sky coordinates and taking true angular offsets in ICRS.  Position angles
        therefore refer to ICRS north even for maps in galactic coordinates.
        """
        try:
            cel = wcs.celestial
        except AttributeError:
            raise KinemapError(f"'wcs' must be an astropy WCS, got {type(wcs).__name__}") from None
        if cel.naxis != 2 or not cel.has_celestial:
            raise KinemapError("'wcs' has no celestial axes; pass a WCS with RA/Dec (or lon/lat) axes")
        if shape is not None:
            ny, nx = shape[-2], shape[-1]
            xc, yc = (nx - 1) / 2.0, (ny - 1) / 2.0
        else:
            xc, yc = cel.wcs.crpix[0] - 1.0, cel.wcs.crpix[1] - 1.0
        h = 0.5
        xs = np.array([xc - h, xc + h, xc, xc])
        ys = np.array([yc, yc, yc - h, yc + h])
        try:
            coords = cel.pixel_to_world(xs, ys).icrs
        except Exception as exc:  # noqa: BLE001 - wcslib raises many kinds
            raise KinemapError(f"'wcs' could not convert pixels to sky coordinates ({exc}); check the header") from None
        centre = cel.pixel_to_world(xc, yc).icrs
        dlon, dlat = centre.spherical_offsets_to(coords)
        e = dlon.to_value(u.arcsec)
        n = dlat.to_value(u.arcsec)
        jac = ((e[1] - e[0]) / (2 * h), (e[3] - e[2]) / (2 * h)), ((n[1] - n[0]) / (2 * h), (n[3] - n[2]) / (2 * h))
        return cls(jacobian=jac)

    # ------------------------------------------------------------------ derived values
    @property
    def matrix(self) -> np.ndarray:
        """The Jacobian as a (2, 2) float array (arcsec per pixel)."""
        return np.array(self.jacobian, dtype=float)

    @property
    def pixel_scale(self) -> u.Quantity:
        """Geometric-mean side of a pixel, sqrt(|det J|), in arcsec."""
        return float(np.sqrt(abs(np.linalg.det(self.matrix)))) * u.arcsec

    @property
    def pixel_area(self) -> u.Quantity:
        """Solid angle of one pixel in arcsec^2."""
        return float(abs(np.linalg.det(self.matrix))) * u.arcsec**2

    @property
    def east_left(self) -> bool:
        """True when east is counter-clockwise from north on the grid (normal sky view)."""
        return bool(np.linalg.det(self.matrix) < 0)

    @property
    def north_angle(self) -> u.Quantity:
        """Angle of north on the grid from +y, counter-clockwise (towards -x), in deg."""
        north_pix = np.linalg.solve(self.matrix, [0.0, 1.0])
        return float(np.rad2deg(np.arctan2(-north_pix[0], north_pix[1]))) * u.deg

    def sky_offsets(self, dx, dy):
        """(east, north) offsets in arcsec of pixel offsets ``(dx, dy)``."""
        j = self.jacobian
        return j[0][0] * dx + j[0][1] * dy, j[1][0] * dx + j[1][1] * dy

    def pixel_offsets(self, east, north):
        """Pixel offsets ``(dx, dy)`` of sky offsets (arcsec east, arcsec north)."""
        inv = np.linalg.inv(self.matrix)
        return inv[0, 0] * east + inv[0, 1] * north, inv[1, 0] * east + inv[1, 1] * north

    def ring_ellipse(self, x0, y0, pa_deg, incl_deg, radius, n: int = 181):
        """Pixel coordinates (x, y) of a circle of ``radius`` arcsec in a disk centred on
        pixel (x0, y0) with position angle and inclination in degrees (for drawing)."""
        from kinemap.rings._geometry import ring_ellipse

        return ring_ellipse(np.linalg.inv(self.matrix), x0, y0, pa_deg, incl_deg, radius, n)

    def __repr__(self) -> str:
        return (
            f"SkyGrid(pixel_scale={self.pixel_scale.value:.6g} arcsec, "
            f"north_angle={self.north_angle.value:.4g} deg, east_left={self.east_left})"
        )


def as_grid(grid) -> SkyGrid:
    """Accept a SkyGrid or a pixel scale (north up, east left)."""
    if isinstance(grid, SkyGrid):
        return grid
    if grid is None:
        raise KinemapError("'grid' is required: pass a SkyGrid or the pixel scale, e.g. 2 * u.arcsec")
    return SkyGrid.from_scale(grid)
