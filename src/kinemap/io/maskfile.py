"""Read a user's mask (a 2D or 3D FITS image, non-zero = keep) onto a cube's pixel grid.

A mask written for the whole cube must still fit a cube cut with ``--box``, ``--vrange``
or a region, so the mask is matched by its WCS, not by its shape: every pixel centre of
the cube must fall on a pixel centre of the mask (the same pixel size and projection, an
integer offset), and the mask must cover the cube.  Then the matching part is cut out.
A mask on another grid is refused with what to do (regrid it onto the cube); nothing is
resampled, because a resampled mask no longer says which pixels the user chose.
A mask without a celestial WCS is taken pixel for pixel when its shape is the cube's.
"""
from __future__ import annotations

import os
import warnings

import numpy as np
from astropy.io import fits
from astropy.wcs import WCS, FITSFixedWarning

from kinemap.errors import KinemapError

__all__ = ["read_mask"]

# how far (pixels) a cube pixel centre may fall from a mask pixel centre
_TOLERANCE = 0.01


def read_mask(source, cube) -> np.ndarray:
    """The mask ``source`` on ``cube``'s grid: bool (ny, nx) or (nchan, ny, nx), True = keep.

    Parameters
    ----------
    source : str or path-like
        A FITS file whose first image HDU with data is the mask (2D, or 3D with the cube's
        spectral axis; length-1 axes such as Stokes are dropped).  NaN counts as zero.
    cube : kinemap.io.Cube
    """
    path = os.fspath(source)
    if not os.path.isfile(path):
        raise KinemapError(f"mask file not found: {path}; give an existing FITS file with "
                           "--mask-file")
    try:
        hdul = fits.open(path, memmap=False, mode="readonly")
    except (OSError, ValueError, TypeError):
        raise KinemapError(f"the mask {path} is not a readable FITS file; give a 2D or 3D "
                           "FITS mask with --mask-file") from None
    try:
        hdu = next((h for h in hdul if getattr(h, "is_image", False) and h.data is not None),
                   None)
        if hdu is None:
            raise KinemapError(f"the mask {path} holds no image; give a 2D or 3D FITS mask")
        data, wcs = _squeezed(hdu, path)
    finally:
        hdul.close()
    keep = np.nan_to_num(np.asarray(data, dtype=np.float64), nan=0.0) != 0
    if wcs is None or not wcs.has_celestial:
        return _by_shape(keep, cube, path)
    return _by_wcs(keep, wcs, cube, path)


def _squeezed(hdu, path):
    """(data, WCS) with length-1 axes dropped; numpy order (spectral, y, x) or (y, x)."""
    data = np.asarray(hdu.data)
    keep_axes = [i for i in range(hdu.header.get("NAXIS", data.ndim))
                 if hdu.header.get(f"NAXIS{i + 1}", 1) > 1]  # FITS axis numbers, 0-based
    if len(keep_axes) not in (2, 3):
        raise KinemapError(f"the mask {path} has shape {data.shape}; give a 2D (ny, nx) or "
                           "3D (nchan, ny, nx) mask")
    data = data.squeeze()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FITSFixedWarning)
        try:
            wcs = WCS(hdu.header).sub([i + 1 for i in keep_axes])
        except Exception:  # a header without a usable WCS: matched by shape
            wcs = None
    if wcs is not None and wcs.has_celestial and wcs.wcs.lng > wcs.wcs.lat:
        raise KinemapError(f"the mask {path} has its declination axis first; write it with "
                           "RA (or longitude) as the first FITS axis, as the cube")
    return data, wcs


def _by_shape(keep, cube, path):
    nchan, ny, nx = cube.shape
    if keep.shape in ((ny, nx), (nchan, ny, nx)):
        return keep
    raise KinemapError(f"the mask {path} has no sky coordinates and shape {keep.shape}, the "
                       f"cube ({nchan}, {ny}, {nx}); give a mask of shape ({ny}, {nx}) or "
                       f"({nchan}, {ny}, {nx}), or one with the cube's WCS")


def _offset(mapped, what, path, fix):
    """The integer offset of pixel positions ``mapped`` (rounded), or a clear refusal."""
    mapped = np.atleast_1d(np.asarray(mapped, dtype=float))
    shift = np.round(mapped[0])
    if not np.all(np.isfinite(mapped)) or np.max(np.abs(mapped - np.arange(mapped.size)
                                                      - shift)) > _TOLERANCE:
        raise KinemapError(f"the mask {path} is not on the cube's {what} grid (its pixels do "
                           f"not line up with the cube's); {fix}")
    return int(shift)


def _by_wcs(keep, wcs, cube, path):
    nchan, ny, nx = cube.shape
    fix = "regrid the mask onto the cube's pixels (same WCS) and try again"
    cel = wcs.celestial
    cwcs = cube.meta.wcs
    # pixel centres of the cube's first row and column, in the mask's pixels
    xs = np.arange(nx, dtype=float)
    ys = np.arange(ny, dtype=float)
    row = cel.world_to_pixel(cwcs.pixel_to_world(xs, np.zeros(nx)))
    col = cel.world_to_pixel(cwcs.pixel_to_world(np.zeros(ny), ys))
    x0 = _offset(row[0], "sky", path, fix)
    y0 = _offset(col[1], "sky", path, fix)
    if np.max(np.abs(row[1] - y0)) > _TOLERANCE or np.max(np.abs(col[0] - x0)) > _TOLERANCE:
        raise KinemapError(f"the mask {path} is rotated against the cube's pixels; {fix}")
    my, mx = keep.shape[-2:]
    if x0 < 0 or y0 < 0 or x0 + nx > mx or y0 + ny > my:
        raise KinemapError(f"the mask {path} ({my} x {mx} pixels) does not cover the cube "
                           f"(its pixels {x0}..{x0 + nx - 1}, {y0}..{y0 + ny - 1} of the "
                           f"mask); give a mask that covers the whole cube")
    keep = keep[..., y0:y0 + ny, x0:x0 + nx]
    if keep.ndim == 2:
        return keep
    c0 = _channel_offset(wcs, cube, keep.shape[0], path)
    return keep[c0:c0 + nchan]


def _channel_offset(wcs, cube, nmask, path):
    """First channel of the mask that is the cube's first channel."""
    nchan = cube.shape[0]
    fix = (f"give a mask with the cube's spectral axis ({cube.meta.ctype or 'its CTYPE3'}) "
           "or a 2D mask")
    cwcs = cube.meta.wcs3d
    if not wcs.has_spectral or cwcs is None or not cwcs.has_spectral:
        if nmask == nchan:
            return 0
        raise KinemapError(f"the mask {path} has {nmask} channels and no spectral axis to "
                           f"match, the cube {nchan}; {fix}")
    mspec, cspec = wcs.spectral, cwcs.spectral
    if mspec.wcs.ctype[0][:4] != cspec.wcs.ctype[0][:4]:
        raise KinemapError(f"the mask {path} has a {mspec.wcs.ctype[0]} axis, the cube "
                           f"{cspec.wcs.ctype[0]}; {fix}")
    world = cspec.pixel_to_world_values(np.arange(nchan, dtype=float))
    mapped = mspec.world_to_pixel_values(np.asarray(world))
    c0 = _offset(mapped, "spectral", path, fix)
    if c0 < 0 or c0 + nchan > nmask:
        raise KinemapError(f"the mask {path} does not cover the cube's channels; {fix}")
    return c0
