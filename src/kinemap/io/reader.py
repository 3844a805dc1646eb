"""Read a FITS spectral-line cube into a :class:`~kinemap.io.cube.Cube`."""
from __future__ import annotations

import os
import warnings
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import astropy.units as u
import numpy as np
from astropy.coordinates import SkyCoord
from astropy.io import fits
from astropy.wcs.utils import pixel_to_skycoord

from kinemap.spectral.airvac import fits_vacuum_to_air
from kinemap.errors import KinemapError, KinemapWarning
from kinemap.io._header import build_wcs, parse_bunit, sha256, warn_repairs
from kinemap.io._open import Opened, data_checksum, open_source
from kinemap.io.beams import Beam, as_beam, check_policy, read_beam
from kinemap.io._source import FileSource, SourceArray
from kinemap.io.cube import Cube, CubeMeta
from kinemap.spectral.frames import change_frame, normalise_frame
from kinemap.spectral.catalogue import (
    is_line_name, line_rest_value, medium_from_ctype, resolve_rest_value
)
from kinemap.spectral.axes import axis_kind, check_convention, to_velocity
from kinemap.io.subset import channel_range, parse_box, region_footprint
from kinemap.io.validate import (
    check_beam, check_beam_table, check_header, check_time_keywords, check_velocity_axis
)

__all__ = ["read_cube"]

# FITS BITPIX -> big-endian numpy type of the stored values
_BITPIX = {8: "u1", 16: ">i2", 32: ">i4", 64: ">i8", -32: ">f4", -64: ">f8"}
_WARNED: set = set()


def _warn_once(path, message):
    """Once per file and session: how this file's data are read and what it costs."""
    if path in _WARNED:
        return
    _WARNED.add(path)
    warnings.warn(message, KinemapWarning, stacklevel=4)

# hashlib releases the GIL, so the input's checksum is computed while the stages run.
_CHECKSUMS = ThreadPoolExecutor(max_workers=1, thread_name_prefix="kinemap-sha256")


def read_cube(source, *, rest_value=None, convention: str | None = None,
              frame: str | None = None, vrange=None, box=None, region=None,
              beams: str = "common", bunit=None, beam=None, hdu=None,
              checksum: bool = True, line: str | None = None, unit: str | None = None) -> Cube:
    """Read a spectral-line cube and work out its velocity axis.

    Parameters
    ----------
    source : str, path-like, HDU, HDUList, SpectralCube or (array, header_or_wcs)
        A FITS file (read lazily: memory-mapped where the file allows), an astropy
        ``PrimaryHDU``/``ImageHDU``/``HDUList``, a ``spectral_cube.SpectralCube`` (its mask
        becomes NaN, "no data"), or a numpy array of shape (nchan, ny, nx) with a FITS
        header or an astropy WCS describing it (a Quantity array gives BUNIT).  The cube
        has two celestial axes and one spectral axis (plus, optionally, a length-1 Stokes
        axis).  Spectral axes in frequency (FREQ), vacuum or air wavelength (WAVE, AWAV) or
        velocity (VRAD, VOPT, VELO, and legacy VELO-xxx/FELO-xxx types, which wcslib
        translates; every translation is recorded in ``meta.repairs``).
    rest_value : Quantity or str, optional
        Rest frequency or wavelength, or a catalogue line name (``'Halpha'``,
        ``'13CO_1-0'``; see :func:`kinemap.spectral.catalogue.load_catalogue`) whose rest
        value is taken in the cube's medium: air wavelength for AWAV, vacuum wavelength for
        WAVE (and optical velocity axes), frequency otherwise.  Overrides
        RESTFRQ/RESTFREQ/RESTWAV.  A quantity for an AWAV axis must be an air wavelength.
        A header's RESTWAV is a vacuum wavelength (FITS WCS Paper III) and is converted to
        air for AWAV axes.
    convention : {'radio', 'optical', 'relativistic'}, optional
        Velocity convention of the output velocities.  Default: radio for a frequency axis,
        optical for a wavelength axis, the axis' own for a velocity axis.
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
    beam : Quantity, str, Beam or radio_beam.Beam, optional
        The beam when the header has none (single-dish cubes often lack BMAJ): a FWHM
        Quantity (circular), ``'46arcsec'`` or ``'30arcsec,20arcsec,45deg'`` (major,
        minor, position angle), or a beam object.  It replaces a header beam (recorded
        in ``meta.repairs``) and is written into every product.
    hdu : int or str, optional
        Which HDU of a file or HDUList holds the cube (default: the first with 3+ axes).
    checksum : bool
        Compute the SHA-256 of the file (or of an in-memory array) for provenance.
    line : str, optional
        A catalogue line name whose rest value (in the cube's medium) applies when neither
        ``rest_value`` nor the header gives one (``kinemap widths`` passes its first line).
    unit : {'K', 'Jy/beam'}, optional
        Convert the values to brightness temperature or Jy/beam with astropy's
        ``brightness_temperature`` equivalency, channel by channel (needs the beam, and a
        rest frequency for a velocity axis); see :mod:`kinemap.io.brightness`.

    Returns
    -------
    Cube
        Shape (nchan, ny, nx); velocities float64 km/s in ``meta.convention`` and
        ``meta.frame``.  Files are closed before returning (memory-mapped data stay valid).
    """
    opened = open_source(source, hdu=hdu)
    try:
        cube = _read(opened, rest_value=rest_value, convention=convention, frame=frame,
                     vrange=vrange, box=box, region=region, beams=beams, bunit=bunit,
                     beam=beam, checksum=checksum, line=line)
    finally:
        opened.close()
    if unit is None:
        return cube
    from kinemap.io.brightness import convert_brightness

    return convert_brightness(cube, unit)


@dataclass
class _Axes:
    """The cube's WCS and what the reader needs to know about its axes."""

    wcs: object
    repairs: list
    wcslib_repairs: tuple  # warned about once the whole cube has passed the checks
    spec: int
    lon: int
    lat: int
    kind: object
    ctype: str
    ctype_original: str


def _axes(opened: Opened) -> _Axes:
    header, name = opened.hdu.header, opened.name
    check_header(header, name)
    wcs, repairs = build_wcs(header, name, emit=False)
    spec = wcs.wcs.spec
    if spec < 0:
        raise KinemapError(f"{name} has no spectral axis (CTYPE values "
                           f"{list(wcs.wcs.ctype)}); give a spectral-line cube")
    if not wcs.has_celestial:
        raise KinemapError(f"{name} has no celestial axes (CTYPE values {list(wcs.wcs.ctype)})")
    ctype = wcs.wcs.ctype[spec]
    return _Axes(wcs=wcs, repairs=repairs, wcslib_repairs=tuple(repairs), spec=spec,
                 lon=wcs.wcs.lng, lat=wcs.wcs.lat,
                 kind=axis_kind(ctype), ctype=ctype,
                 ctype_original=str(header.get(f"CTYPE{spec + 1}", ctype)))


@dataclass
class _Data:
    """A (spectral, y, x) view of the values and how to read them from the file."""

    arr: object
    raw_shape: tuple
    raw_dtype: str | None
    drop: tuple
    order: tuple
    bscale: float
    bzero: float
    blank: object
    compressed: bool
    memmapped: bool


def _data_view(opened: Opened, ax: _Axes) -> _Data:
    """Drop length-1 extra axes (Stokes) and order the values as (spectral, lat, lon).

    Plain float data on disk are memory-mapped; scaled or integer data on disk are read
    through a :class:`SourceArray` (independent ``os.pread`` calls, so threads never share
    a file position); tile-compressed HDUs through a fresh astropy handle per read; gzip or
    bzip2 files are decompressed into memory once (astropy cannot read them in parts).
    """
    header, name, wcs = opened.hdu.header, opened.name, ax.wcs
    naxis = wcs.naxis
    shape_wcs = [int(header.get(f"NAXIS{i + 1}", 1)) for i in range(naxis)]
    for i in range(naxis):
        if i not in (ax.spec, ax.lon, ax.lat) and shape_wcs[i] != 1:
            raise KinemapError(
                f"{name} has a fourth axis {wcs.wcs.ctype[i]!r} of length {shape_wcs[i]}; "
                "kinemap reads one Stokes plane: cut the cube to one plane first")
    bscale = float(header.get("BSCALE", 1.0))
    bzero = float(header.get("BZERO", 0.0))
    raw_dtype = _BITPIX.get(int(header.get("BITPIX", 0)))
    compressed = isinstance(opened.hdu, fits.CompImageHDU)
    on_disk = opened.path is not None and not opened.archive
    plain = (on_disk and not compressed and bscale == 1.0 and bzero == 0.0
             and raw_dtype is not None and "f" in raw_dtype)
    raw_shape = tuple(int(header[f"NAXIS{naxis - i}"]) for i in range(naxis))
    np_axis = {i: naxis - 1 - i for i in range(naxis)}  # numpy order reverses the WCS order
    drop = tuple(np_axis[i] for i in range(naxis) if i not in (ax.spec, ax.lon, ax.lat))
    keep = sorted(np_axis[i] for i in (ax.spec, ax.lon, ax.lat))
    pos = {a: k for k, a in enumerate(keep)}
    order = (pos[np_axis[ax.spec]], pos[np_axis[ax.lat]], pos[np_axis[ax.lon]])
    view = _Data(arr=None, raw_shape=raw_shape, raw_dtype=raw_dtype, drop=drop, order=order,
                 bscale=bscale, bzero=bzero, blank=header.get("BLANK"), compressed=compressed,
                 memmapped=bool(plain))
    if on_disk and not plain and not compressed:
        view.arr = _source_array(opened, view)
        return view
    if not on_disk:
        raw = _in_memory(opened, raw_shape)
    elif plain:
        raw = opened.hdu.data  # a memory map: lazy through squeeze/transpose/slicing views
        if raw is None:
            raise KinemapError(f"{name}: the cube HDU holds no data")
    else:
        raw = _compressed_array(opened, raw_shape)
    arr = raw.squeeze(axis=drop) if drop else raw
    view.arr = arr.transpose(order)
    return view


def _in_memory(opened: Opened, raw_shape):
    """Data already in memory (astropy has applied any scaling), or an archive file that
    astropy decompresses whole: its cost in memory is said once."""
    if opened.archive:
        nbytes = int(np.prod(raw_shape)) * abs(int(opened.hdu.header.get("BITPIX", 32))) // 8
        _warn_once(opened.path, f"{opened.name} is {opened.archive}-compressed: astropy "
                   f"decompresses the whole cube into memory ({nbytes / 2**20:.3g} MB as "
                   "stored, more once scaled to floats) before kinemap reads it; decompress "
                   "the file first to read it block by block within --max-memory")
    try:
        raw = opened.hdu.data
    except (EOFError, OSError, ValueError, TypeError) as exc:
        if not opened.archive:
            raise
        from kinemap.io._header import _archive_damage

        reason = _archive_damage(opened.path) or " ".join(str(exc).split())[:200]
        raise KinemapError(f"{opened.name}: the cube's data cannot be read ({reason})") from None
    if raw is None:
        raise KinemapError(f"{opened.name}: the cube HDU holds no data")
    raw = np.asarray(raw)
    blank = opened.hdu.header.get("BLANK")
    if raw.dtype.kind in "iu" and blank is not None:  # astropy keeps BLANK in unscaled ints
        raw = np.where(raw == blank, np.nan, raw.astype(np.float64))
    return raw


def _source_array(opened: Opened, view: _Data):
    """Integer or scaled data on disk as a lazy (spectral, y, x) dask array whose every
    chunk is an independent read of the file (thread-safe; BLANK becomes NaN)."""
    import dask.array as da

    kept = [n for i, n in enumerate(view.raw_shape) if i not in view.drop]
    nchan, ny, nx = (kept[k] for k in view.order)
    full = _file_source(opened, view, slice(0, nchan), slice(0, ny), slice(0, nx))
    _warn_once(opened.path, f"{opened.name} holds scaled or integer data (BITPIX "
               f"{opened.hdu.header.get('BITPIX')}, BSCALE {view.bscale:g}, BZERO "
               f"{view.bzero:g}), which cannot be memory-mapped; values are decoded to "
               "float64 as blocks are read")
    return da.from_array(SourceArray(full), chunks=(-1, 8, -1), asarray=True)


class _CompressedSection:
    """A tile-compressed HDU read through astropy's ``section`` (only the tiles a read
    touches are decompressed); every read opens its own handle, so threads share none."""

    def __init__(self, path, hdu_index, shape, dtype):
        self.path, self.hdu_index = path, hdu_index
        self.shape, self.ndim, self.dtype = tuple(shape), len(shape), np.dtype(dtype)

    def __getitem__(self, item):
        with fits.open(self.path, memmap=False, mode="readonly") as hdul:
            return np.asarray(hdul[self.hdu_index].section[item], dtype=self.dtype)


def _compressed_array(opened: Opened, raw_shape):
    import dask.array as da

    hdu_index = next(i for i, h in enumerate(opened.hdul) if h is opened.hdu)
    probe = np.asarray(opened.hdu.section[(slice(0, 1),) * len(raw_shape)])
    dtype = probe.dtype if probe.dtype.kind == "f" else np.float64
    _warn_once(opened.path, f"{opened.name} holds a tile-compressed image, which cannot be "
               "memory-mapped; tiles are decompressed as blocks are read (slower than a plain "
               "float cube)")
    section = _CompressedSection(opened.path, hdu_index, raw_shape, dtype)
    return da.from_array(section, chunks=(-1,) * (len(raw_shape) - 2) + (8, -1), asarray=True)


def _line_rest_value(name: str, ax: _Axes) -> u.Quantity:
    """The catalogue rest value of line ``name`` in the axis' medium, recorded."""
    rest = line_rest_value(name, ax.ctype)
    ax.repairs.append(f"rest value {rest:.9g} ({medium_from_ctype(ax.ctype)}) from the "
                      f"catalogue line {name.strip()}")
    return rest


def _rest_value(rest_value, ax: _Axes, line=None):
    """The rest value in the cube's medium: the caller's (a quantity or a catalogue line
    name), else the header's, else the fallback ``line``'s."""
    wcs, kind = ax.wcs, ax.kind
    if is_line_name(rest_value):
        rest = _line_rest_value(rest_value, ax)
    elif rest_value is not None:
        rest = resolve_rest_value(rest_value, ax.ctype)
    elif wcs.wcs.restfrq > 0:
        rest = wcs.wcs.restfrq * u.Hz
    elif wcs.wcs.restwav > 0:
        rest = wcs.wcs.restwav * u.m
        if kind.medium == "air":
            # RESTWAV is a vacuum wavelength (FITS WCS Paper III); the AWAV axis needs the
            # air value, converted with the dispersion formula wcslib uses.
            air = float(fits_vacuum_to_air(rest.to_value(u.AA))) * u.AA
            ax.repairs.append(f"RESTWAV {rest.to(u.AA):.3f} (vacuum) read as {air:.3f} in air "
                              "for the AWAV axis")
            rest = air
    elif line is not None:
        rest = _line_rest_value(line, ax)
    else:
        rest = None
    if kind.medium == "air" and rest is not None and not rest.unit.is_equivalent(u.m):
        raise KinemapError(
            "the cube's axis is in air wavelength (AWAV), so the rest value must be an air "
            f"wavelength, got {rest}; give --rest-value in Angstrom (air)")
    if kind.physical in ("frequency", "wavelength") and rest is None:
        raise KinemapError(
            f"no rest value: the {ax.ctype} axis needs one to give velocities and the header "
            "has no RESTFRQ/RESTFREQ/RESTWAV; give one with --rest-value (a line name such "
            "as 'Halpha', or a value such as '1420.405751768 MHz' or '6562.80 Angstrom')")
    return rest


def _velocity_axis(ax: _Axes, header, nchan, shape_yx, *, rest_value, convention, frame,
                   line=None, name=""):
    """(spectral coordinates, velocities km/s, rest value, convention, frame)."""
    kind = ax.kind
    spec_wcs = ax.wcs.sub([ax.spec + 1])
    spec_unit = u.Unit(spec_wcs.wcs.cunit[0]) if spec_wcs.wcs.cunit[0] else u.one
    spectral = u.Quantity(spec_wcs.pixel_to_world_values(np.arange(nchan, dtype=float)),
                          spec_unit).ravel()
    rest = _rest_value(rest_value, ax, line)
    conv = check_convention(convention) if convention else kind.convention
    specsys = normalise_frame(ax.wcs.wcs.specsys) if ax.wcs.wcs.specsys else ""
    target = normalise_frame(frame) if frame else specsys
    if not (frame and target != specsys):
        velocity = to_velocity(spectral, convention=conv, rest_value=rest,
                               native_convention=kind.convention)
        _check_axis(velocity, spectral, ax, rest, name)
        return spectral, velocity, rest, conv, target
    check_time_keywords(header, name)
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
    ny, nx = shape_yx
    centre = pixel_to_skycoord((nx - 1) / 2, (ny - 1) / 2, _celestial(ax))
    physical = change_frame(physical, header=header, target=SkyCoord(centre),
                            from_frame=specsys, to_frame=target)
    ax.repairs.append(f"kinemap converted the spectral frame from {specsys} to {target}")
    velocity = to_velocity(physical, convention=conv, rest_value=rest)
    _check_axis(velocity, spectral, ax, rest, name)
    return spectral, velocity, rest, conv, target


def _check_axis(velocity, spectral, ax: _Axes, rest, name):
    check_velocity_axis(velocity, spectral, name=name, ctype=ax.ctype_original, rest=rest,
                        physical=ax.kind.physical)


def _celestial(ax: _Axes):
    wcs2d = ax.wcs.celestial
    return wcs2d.sub([2, 1]) if ax.lon > ax.lat else wcs2d  # keep x = longitude


def _beam(opened: Opened, ax: _Axes, data: _Data, *, beams, beam):
    """The cube's single beam (convolving a beam per channel to a common one, or the
    caller's ``beam``); returns (data array, beam, one beam per channel?)."""
    policy = check_policy(beams)
    file_beam, beam_list = read_beam(opened.hdul, opened.hdu.header,
                                     radio_like=ax.kind.physical != "wavelength" and beam is None)
    arr = data.arr
    if beam_list is not None:
        check_beam_table(beam_list, arr.shape[0], opened.name)
        if policy == "refuse":
            raise KinemapError(
                f"{opened.name} has a different beam per channel; rerun with --beams common to "
                "convolve every channel to the smallest common beam")
        arr, file_beam = _convolve_to_common(opened.hdul, beam_list)
        ax.repairs.append(f"kinemap convolved all channels to the common beam {file_beam}")
    if beam is not None:
        given = as_beam(beam)
        if file_beam is not None:
            ax.repairs.append(f"the beam given ({given}) replaces the header's ({file_beam})")
        file_beam = given
    cel = _celestial(ax)
    pixel = float(np.sqrt(abs(np.linalg.det(cel.pixel_scale_matrix))))
    check_beam(file_beam, name=opened.name, pixel_deg=pixel, shape_yx=arr.shape[1:],
               source="--beam" if beam is not None else "BMAJ/BMIN")
    return arr, file_beam, beam_list is not None


def _subset(ax: _Axes, velocity, shape_yx, *, vrange, box, region):
    """(channel slice, row slice, column slice, footprint, subset record)."""
    cs = channel_range(velocity, vrange)
    ys, xs = parse_box(box, shape_yx)
    footprint = None
    if region is not None:
        fp_full = region_footprint(region, _celestial(ax), shape_yx)
        fp_full[: ys.start] = False
        fp_full[ys.stop:] = False
        fp_full[:, : xs.start] = False
        fp_full[:, xs.stop:] = False
        yy, xx = np.nonzero(fp_full)
        if yy.size == 0:
            raise KinemapError("the region and the box do not overlap")
        ys, xs = slice(int(yy.min()), int(yy.max()) + 1), slice(int(xx.min()), int(xx.max()) + 1)
        footprint = fp_full[ys, xs]
    subset = {}
    if (cs.start, cs.stop) != (0, len(velocity)):
        subset["channels"] = [cs.start, cs.stop]
    if box is not None or region is not None:
        subset["box_x"] = [xs.start, xs.stop]
        subset["box_y"] = [ys.start, ys.stop]
    if region is not None:
        subset["region"] = os.path.basename(str(region))
    return cs, ys, xs, footprint, subset


def _file_source(opened: Opened, data: _Data, cs, ys, xs):
    """How to read bands of rows straight from the file (None for in-memory data)."""
    if opened.path is None or opened.archive or data.compressed or data.raw_dtype is None:
        return None
    hdu_index = next(i for i, h in enumerate(opened.hdul) if h is opened.hdu)
    blank = data.blank
    return FileSource(path=os.path.abspath(opened.path),
                      offset=int(opened.hdul.fileinfo(hdu_index)["datLoc"]),
                      raw_shape=data.raw_shape, dtype=data.raw_dtype, drop=data.drop,
                      order=data.order, channels=(cs.start, cs.stop),
                      rows=(ys.start, ys.stop), cols=(xs.start, xs.stop),
                      bscale=data.bscale, bzero=data.bzero,
                      blank=None if blank is None or data.raw_dtype[1] == "f" else int(blank))


def _read(opened: Opened, *, rest_value, convention, frame, vrange, box, region, beams,
          bunit, beam, checksum, line=None) -> Cube:
    header = opened.hdu.header
    ax = _axes(opened)
    data = _data_view(opened, ax)
    nchan, ny, nx = data.arr.shape
    spectral, velocity, rest, conv, target = _velocity_axis(
        ax, header, nchan, (ny, nx), rest_value=rest_value, convention=convention, frame=frame,
        line=line, name=opened.name)
    arr, beam_value, per_channel = _beam(opened, ax, data, beams=beams, beam=beam)
    bunit_value, bunit_missing = parse_bunit(header, bunit)
    cs, ys, xs, footprint, subset = _subset(ax, velocity, (ny, nx), vrange=vrange, box=box,
                                            region=region)
    source = None if per_channel else _file_source(opened, data, cs, ys, xs)
    if opened.path is not None:
        job = _CHECKSUMS.submit(sha256, opened.path) if checksum else None
    else:
        job = _CHECKSUMS.submit(data_checksum, arr) if checksum else None
    meta = CubeMeta(
        wcs=_celestial(ax).slice((ys, xs)), bunit=bunit_value, convention=conv,
        rest_value=rest, frame=target, beam=beam_value, medium=ax.kind.medium,
        ctype_original=ax.ctype_original, ctype=ax.ctype, native_convention=ax.kind.convention,
        repairs=tuple(ax.repairs), source=opened.name, checksum_job=job,
        bunit_missing=bunit_missing, spectral_unit=spectral.unit, subset=subset,
        memmapped=data.memmapped,
        wcs3d=ax.wcs.sub([ax.lon + 1, ax.lat + 1, ax.spec + 1]).slice((cs, ys, xs)))
    cube = Cube(data=arr[cs, ys, xs], velocity=velocity[cs], spectral=spectral[cs], meta=meta,
                footprint=footprint, source=source)
    warn_repairs(ax.wcslib_repairs, opened.name)
    return cube


def _convolve_to_common(hdul, beam_list):
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
