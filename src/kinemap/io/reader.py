"""Read a FITS spectral-line cube into a :class:`~kinemap.io.cube.Cube`."""
from __future__ import annotations

import os
import warnings
from concurrent.futures import ThreadPoolExecutor

import astropy.units as u
import numpy as np
from astropy.coordinates import SkyCoord
from astropy.io import fits
from astropy.wcs.utils import pixel_to_skycoord

from kinemap.units import parse_quantity
from kinemap.spectral.airvac import fits_vacuum_to_air
from kinemap.errors import KinemapError, KinemapWarning
from kinemap.io._header import build_wcs, find_cube_hdu, open_fits, parse_bunit, sha256
from kinemap.io.beams import Beam, check_policy, read_beam
from kinemap.io._source import FileSource
from kinemap.io.cube import Cube, CubeMeta
from kinemap.spectral.frames import change_frame, normalise_frame
from kinemap.spectral.axes import axis_kind, check_convention, check_rest_value, to_velocity
from kinemap.io.subset import channel_range, parse_box, region_footprint

__all__ = ["read_cube"]

# FITS BITPIX -> big-endian numpy type of the stored values
_BITPIX = {8: "u1", 16: ">i2", 32: ">i4", 64: ">i8", -32: ">f4", -64: ">f8"}
_WARNED: set = set()


class _SectionArray:
    """An HDU's lazy ``section`` with the array attributes dask asks for."""

    def __init__(self, section, shape):
        self.section, self.shape, self.ndim = section, tuple(shape), len(shape)
        self.dtype = np.asarray(section[(slice(0, 1),) * self.ndim]).dtype

    def __getitem__(self, item):
        return np.asarray(self.section[item])


def _warn_not_memmapped(path, why):
    """Once per file and session: this cube is read through astropy, not memory-mapped."""
    if path in _WARNED:
        return
    _WARNED.add(path)
    warnings.warn(f"{os.path.basename(path)} holds {why} data, which cannot be memory-mapped; "
                  "blocks are decoded as they are read (slower than a plain float cube)",
                  KinemapWarning, stacklevel=3)

# hashlib releases the GIL, so the input's checksum is computed while the stages run.
_CHECKSUMS = ThreadPoolExecutor(max_workers=1, thread_name_prefix="kinemap-sha256")


def read_cube(path, *, convention: str | None = None, rest_value=None, frame: str | None = None,
              vrange=None, box=None, region=None, beams: str = "common", bunit=None,
              hdu=None, checksum: bool = True) -> Cube:
    """Open a FITS cube lazily and work out its velocity axis.

    Parameters
    ----------
    path : str or path-like
        FITS file with two celestial axes and one spectral axis (plus, optionally, a
        length-1 Stokes axis).  Spectral axes in frequency (FREQ), vacuum or air wavelength
        (WAVE, AWAV) or velocity (VRAD, VOPT, VELO, and legacy VELO-xxx/FELO-xxx types,
        which wcslib translates; every translation is recorded in ``meta.repairs``).
    convention : {'radio', 'optical', 'relativistic'}, optional
        Velocity convention of the output velocities.  Default: radio for a frequency axis,
        optical for a wavelength axis, the axis' own for a velocity axis.
    rest_value : Quantity or str, optional
        Rest frequency or wavelength; overrides RESTFRQ/RESTFREQ/RESTWAV.  For an AWAV
        axis it must be an air wavelength.  A header's RESTWAV is a vacuum wavelength
        (FITS WCS Paper III) and is converted to air for AWAV axes.
    frame : str, optional
        Spectral frame for the velocities (TOPOCENT, BARYCENT, LSRK, ...).  Default: the
        cube's SPECSYS.  A change needs the observer's location and time in the header.
    vrange : pair of Quantity/str/float (km/s), optional
        Keep only channels with centre velocities in this range.
    box : str or 4-sequence, optional
        Pixel box 'x0:x1,y0:y1' (0-based, end exclusive).
    region : str, optional
        DS9 or CRTF region file; the cube is cut to the regions' bounding box and
        ``footprint`` marks the pixels inside.
    beams : {'common', 'refuse'}
        For a cube with a beam per channel: convolve every channel to the smallest common
        beam, or stop with a message.
    bunit : str or Unit, optional
        Overrides BUNIT.
    checksum : bool
        Compute the SHA-256 of the file for provenance.

    Returns
    -------
    Cube
        Lazily read data (a numpy memory map where the file allows), shape
        (nchan, ny, nx).
    """
    path = os.fspath(path)
    hdul = open_fits(path)
    hdu_obj = find_cube_hdu(hdul, path, hdu)
    header = hdu_obj.header
    wcs, repairs = build_wcs(header, path)
    spec = wcs.wcs.spec
    if spec < 0:
        raise KinemapError(f"{path} has no spectral axis (CTYPE values "
                           f"{list(wcs.wcs.ctype)}); give a spectral-line cube")
    if not wcs.has_celestial:
        raise KinemapError(f"{path} has no celestial axes (CTYPE values {list(wcs.wcs.ctype)})")
    ctype_original = str(header.get(f"CTYPE{spec + 1}", wcs.wcs.ctype[spec]))
    ctype = wcs.wcs.ctype[spec]
    kind = axis_kind(ctype)
    lon, lat = wcs.wcs.lng, wcs.wcs.lat

    # --- data: drop length-1 extra axes (Stokes), order as (spectral, lat, lon) ---------
    naxis = wcs.naxis
    shape_wcs = [int(header.get(f"NAXIS{i + 1}", 1)) for i in range(naxis)]
    for i in range(naxis):
        if i not in (spec, lon, lat) and shape_wcs[i] != 1:
            raise KinemapError(
                f"{path} has a fourth axis {wcs.wcs.ctype[i]!r} of length {shape_wcs[i]}; "
                "kinemap reads one Stokes plane: cut the cube to one plane first")
    # Scaled integers and compressed images cannot be memory-mapped: astropy would scale
    # the whole array into memory on access.  They are read lazily through the HDU's
    # section instead (and scaled integers block by block straight from the file).
    bscale = float(header.get("BSCALE", 1.0))
    bzero = float(header.get("BZERO", 0.0))
    blank = header.get("BLANK")
    compressed = isinstance(hdu_obj, fits.CompImageHDU)
    memmapped = not (compressed or bscale != 1.0 or bzero != 0.0)
    raw_shape = tuple(int(header[f"NAXIS{naxis - i}"]) for i in range(naxis))
    raw_dtype = _BITPIX.get(int(header.get("BITPIX", 0)))
    if memmapped:
        raw = hdu_obj.data  # a memory map: lazy through squeeze/transpose/slicing views
        if raw is None:
            raise KinemapError(f"{path}: the cube HDU holds no data")
    else:
        _warn_not_memmapped(path, "compressed" if compressed else "scaled integers (BSCALE/BZERO)")
        import dask.array as da

        # astropy refuses sections of scaled data from a memory-mapped file: reopen without
        hdu_index = next(i for i, h in enumerate(hdul) if h is hdu_obj)
        plain = fits.open(path, memmap=False, mode="readonly")[hdu_index]
        raw = da.from_array(_SectionArray(plain.section, raw_shape),
                            chunks=(-1,) * (naxis - 2) + (8, -1), asarray=True)
    arr = raw
    # numpy axis order is the reverse of the WCS order
    np_axis = {i: naxis - 1 - i for i in range(naxis)}
    drop = [np_axis[i] for i in range(naxis) if i not in (spec, lon, lat)]
    arr = arr.squeeze(axis=tuple(drop)) if drop else arr
    keep = sorted(np_axis[i] for i in (spec, lon, lat))
    pos = {ax: k for k, ax in enumerate(keep)}
    order = (pos[np_axis[spec]], pos[np_axis[lat]], pos[np_axis[lon]])
    arr = arr.transpose(order)
    wcs2d = wcs.celestial
    if lon > lat:  # keep x = longitude, y = latitude
        wcs2d = wcs2d.sub([2, 1])

    # --- spectral axis -> velocity --------------------------------------------------------
    nchan = arr.shape[0]
    spec_wcs = wcs.sub([spec + 1])
    spec_unit = u.Unit(spec_wcs.wcs.cunit[0]) if spec_wcs.wcs.cunit[0] else u.one
    spectral = u.Quantity(spec_wcs.pixel_to_world_values(np.arange(nchan, dtype=float)),
                          spec_unit).ravel()
    if rest_value is not None:
        rest = check_rest_value(parse_quantity(rest_value, name="rest_value"))
    elif wcs.wcs.restfrq > 0:
        rest = wcs.wcs.restfrq * u.Hz
    elif wcs.wcs.restwav > 0:
        rest = wcs.wcs.restwav * u.m
        if kind.medium == "air":
            # RESTWAV is a vacuum wavelength (FITS WCS Paper III); the AWAV axis needs the
            # air value, converted with the dispersion formula wcslib uses.
            air = float(fits_vacuum_to_air(rest.to_value(u.AA))) * u.AA
            repairs.append(f"RESTWAV {rest.to(u.AA):.3f} (vacuum) read as {air:.3f} in air "
                           "for the AWAV axis")
            rest = air
    else:
        rest = None
    if kind.medium == "air" and rest is not None and not rest.unit.is_equivalent(u.m):
        raise KinemapError(
            "the cube's axis is in air wavelength (AWAV), so the rest value must be an air "
            f"wavelength, got {rest}; give --rest-value in Angstrom (air)")
    conv = check_convention(convention) if convention else kind.convention
    if kind.physical in ("frequency", "wavelength") and rest is None:
        raise KinemapError(
            f"no rest value: the {ctype} axis needs one to give velocities and the header "
            "has no RESTFRQ/RESTFREQ/RESTWAV; give one with --rest-value (for example "
            "'1420.405751768 MHz' or '6562.80 Angstrom')")

    specsys = normalise_frame(wcs.wcs.specsys) if wcs.wcs.specsys else ""
    target_frame = normalise_frame(frame) if frame else specsys
    if frame and target_frame != specsys:
        if kind.medium == "air":
            raise KinemapError("frame changes of air-wavelength (AWAV) cubes are not supported; "
                               "convert the axis to vacuum wavelength first or drop --frame")
        physical = spectral
        if kind.physical == "velocity":
            if rest is None:
                raise KinemapError("no rest value: a frame change of a velocity axis needs one; "
                                   "give --rest-value")
            physical = spectral.to(rest.unit, equivalencies=getattr(
                u, f"doppler_{kind.convention}")(rest))
        ny, nx = arr.shape[1:]
        centre = pixel_to_skycoord((nx - 1) / 2, (ny - 1) / 2, wcs2d)
        physical = change_frame(physical, header=header, target=SkyCoord(centre),
                                from_frame=specsys, to_frame=target_frame)
        repairs.append(f"kinemap converted the spectral frame from {specsys} to {target_frame}")
        velocity = to_velocity(physical, convention=conv, rest_value=rest)
    else:
        velocity = to_velocity(spectral, convention=conv, rest_value=rest,
                               native_convention=kind.convention)

    # --- beams ----------------------------------------------------------------------------
    policy = check_policy(beams)
    beam, beam_list = read_beam(hdul, header, radio_like=kind.physical != "wavelength")
    if beam_list is not None:
        if policy == "refuse":
            raise KinemapError(
                f"{path} has a different beam per channel; rerun with --beams common to "
                "convolve every channel to the smallest common beam")
        arr, beam = _convolve_to_common(hdul, hdu_obj, beam_list)
        repairs.append(f"kinemap convolved all channels to the common beam {beam}")

    bunit_value, bunit_missing = parse_bunit(header, bunit)

    # --- subsets --------------------------------------------------------------------------
    cs = channel_range(velocity, vrange)
    ys, xs = parse_box(box, arr.shape[1:])
    footprint = None
    if region is not None:
        fp_full = region_footprint(region, wcs2d, arr.shape[1:])
        fp_full[: ys.start] = False
        fp_full[ys.stop:] = False
        fp_full[:, : xs.start] = False
        fp_full[:, xs.stop:] = False
        yy, xx = np.nonzero(fp_full)
        if yy.size == 0:
            raise KinemapError("the region and the box do not overlap")
        ys, xs = slice(int(yy.min()), int(yy.max()) + 1), slice(int(xx.min()), int(xx.max()) + 1)
        footprint = fp_full[ys, xs]
    arr = arr[cs, ys, xs]
    source = None
    if beam_list is None and not compressed and raw_dtype is not None:
        hdu_index = next(i for i, h in enumerate(hdul) if h is hdu_obj)
        source = FileSource(path=os.path.abspath(path),
                            offset=int(hdul.fileinfo(hdu_index)["datLoc"]),
                            raw_shape=raw_shape, dtype=raw_dtype, drop=tuple(drop),
                            order=tuple(order), channels=(cs.start, cs.stop),
                            rows=(ys.start, ys.stop), cols=(xs.start, xs.stop),
                            bscale=bscale, bzero=bzero,
                            blank=None if blank is None or raw_dtype[1] == "f" else int(blank))
    wcs2d = wcs2d.slice((ys, xs))
    wcs3d = wcs.sub([lon + 1, lat + 1, spec + 1]).slice((cs, ys, xs))
    subset = {}
    if (cs.start, cs.stop) != (0, nchan):
        subset["channels"] = [cs.start, cs.stop]
    if box is not None or region is not None:
        subset["box_x"] = [xs.start, xs.stop]
        subset["box_y"] = [ys.start, ys.stop]
    if region is not None:
        subset["region"] = os.path.basename(str(region))

    meta = CubeMeta(
        wcs=wcs2d, bunit=bunit_value, convention=conv, rest_value=rest, frame=target_frame,
        beam=beam, medium=kind.medium, ctype_original=ctype_original, ctype=ctype,
        native_convention=kind.convention, repairs=tuple(repairs),
        source=os.path.basename(path),
        checksum_job=_CHECKSUMS.submit(sha256, path) if checksum else None,
        bunit_missing=bunit_missing, spectral_unit=spec_unit, subset=subset,
        memmapped=bool(memmapped), wcs3d=wcs3d)
    return Cube(data=arr, velocity=velocity[cs], spectral=spectral[cs], meta=meta,
                footprint=footprint, source=source)


def _convolve_to_common(hdul, hdu_obj, beam_list):
    """Convolve a multi-beam cube to its smallest common beam with spectral-cube."""
    from spectral_cube import VaryingResolutionSpectralCube

    try:
        common = beam_list.common_beam()
    except Exception as exc:
        raise KinemapError(f"could not find a common beam for the channels: {exc}") from None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        vcube = VaryingResolutionSpectralCube.read(hdul)
        conv = vcube.convolve_to(common)
    data = np.asarray(conv.unmasked_data[:].value, dtype=np.float32)
    return data, Beam.from_radio_beam(common)
