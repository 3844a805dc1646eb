"""Archive formats and stored integers read exactly as astropy.io.fits reads the whole file
(the reference library), block by block, from many threads at once, and through the
command to the same moment maps as the plain float cube.

FITS conventions used (FITS Standard 4.0, sect. 5.2.5 and table 11; from memory):
value = BZERO + BSCALE * stored; BITPIX 8 is unsigned; BZERO = -128 gives signed bytes,
BZERO = 32768 unsigned 16-bit, 2147483648 unsigned 32-bit, 9223372036854775808 unsigned
64-bit integers; BLANK names the stored integer that means 'no data'.
"""
from __future__ import annotations

import bz2
import gzip
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest
from astropy.io import fits

from conftest import gaussian_cube, make_header, run_cli, write_cube
from kinemap.io import read_cube
from kinemap.parallel.blocks import read_rows

NCHAN, NY, NX = 40, 24, 10


def _header(ny=NY, **extra):
    return make_header("FREQ", nchan=NCHAN, ny=ny, nx=NX,
                       extra={"RESTFRQ": 1.4204e9, "BMAJ": 0.006, "BMIN": 0.005, **extra})


def _counts(seed=3, ny=NY):
    """Integer-valued data (a line on a floor, with noise): exact in float32 and in every
    integer type below, so stored integers and plain floats hold the same values."""
    cube = gaussian_cube(NCHAN, ny, NX, centre_chan=np.linspace(12, 28, NX)[None, :],
                         sigma_chan=3, amp=100.0, noise=4.0, seed=seed)
    return np.round(cube + 20.0)


def _stored(path, values, bitpix, *, bscale=1.0, bzero=0.0, blank=None):
    """Write ``values`` as BITPIX integers (value = bzero + bscale * stored) by hand."""
    dtype = {8: ">u1", 16: ">i2", 32: ">i4", 64: ">i8"}[bitpix]
    stored = np.round((values - bzero) / bscale)
    if blank is not None:
        stored = np.where(np.isnan(values), blank, stored)
    raw = stored.astype(dtype)
    h = _header(ny=values.shape[1])
    h["BITPIX"] = bitpix
    hdr = fits.Header()
    for card in h.cards:
        hdr.append(card)
    hdr["BSCALE"], hdr["BZERO"] = bscale, bzero
    if blank is not None:
        hdr["BLANK"] = blank
    with open(path, "wb") as fh:
        fh.write(hdr.tostring().encode())
        body = raw.tobytes()
        fh.write(body + b"\0" * (-len(body) % 2880))
    return str(path)


SCALED = [  # (BITPIX, BSCALE, BZERO, BLANK): the conventions named in the module docstring
    (8, 1.0, 0.0, None),
    (8, 1.0, -128.0, None),
    (16, 1.0, 32768.0, None),
    (16, 0.5, 10.0, -32768),
    (32, 1.0, 2147483648.0, None),
    (32, 0.25, -3.0, 7),
    (64, 1.0, 9223372036854775808.0, None),
    (64, 2.0 ** -10, 0.0, -1),
]


def _reference(path):
    """astropy's read of the stored integers with the Standard's formula applied in float64
    (astropy's own scaled read rounds to float32 for 16-bit data, and in astropy 8.0.2 it
    fails on signed bytes, BZERO = -128; where it works it must agree, checked below)."""
    with fits.open(path, do_not_scale_image_data=True) as hdul:
        stored, h = hdul[0].data, hdul[0].header
        ref = h.get("BZERO", 0.0) + h.get("BSCALE", 1.0) * stored.astype(np.float64)
        if "BLANK" in h:
            ref[stored == h["BLANK"]] = np.nan
    try:
        scaled = fits.getdata(path)
    except TypeError:  # numpy's casting error: the signed-byte case
        scaled = fits.getdata(path, uint=False)
    np.testing.assert_allclose(scaled, ref, rtol=1e-6, equal_nan=True)
    return ref


def _scaled_cube(tmp_path, bitpix, bscale, bzero, blank, ny=NY):
    values = _counts(ny=ny)
    if bitpix == 8 and bzero == 0:
        values = np.clip(values, 0, 255)
    if blank is not None:
        values = values.copy()
        values[5, 3, 2] = values[6, 10, 4] = np.nan
    return _stored(tmp_path / f"s{bitpix}.fits", values, bitpix, bscale=bscale, bzero=bzero,
                   blank=blank)


@pytest.mark.parametrize("bitpix,bscale,bzero,blank", SCALED)
def test_scaled_integers_match_astropy_block_by_block(tmp_path, bitpix, bscale, bzero, blank):
    path = _scaled_cube(tmp_path, bitpix, bscale, bzero, blank)
    ref = _reference(path)
    cube = read_cube(path)
    assert cube.source is not None and not cube.meta.memmapped
    np.testing.assert_array_equal(np.isnan(np.asarray(cube.data)), np.isnan(ref))
    np.testing.assert_allclose(np.asarray(cube.data), ref, rtol=1e-15, equal_nan=True)
    for ys in (slice(0, 7), slice(7, 24), slice(11, 12)):
        np.testing.assert_allclose(read_rows(cube, ys), ref[:, ys], rtol=1e-15, equal_nan=True)
    if blank is not None:
        assert np.isnan(np.asarray(cube.data)[5, 3, 2])


@pytest.mark.parametrize("bitpix,bscale,bzero,blank", [SCALED[2], SCALED[3], SCALED[5]])
def test_concurrent_reads_are_independent(tmp_path, bitpix, bscale, bzero, blank):
    """Many threads reading bands of one scaled cube at once, repeated, get exactly what a
    serial read gets; so does dask's threaded scheduler over the lazy cube and the
    prefetching block walker."""
    import dask

    from kinemap.parallel.blocks import map_blocks

    ny = 160  # 20 dask chunks of 8 rows: a shared file handle gave wrong values in 3 of 10
    path = _scaled_cube(tmp_path, bitpix, bscale, bzero, blank, ny=ny)
    ref = _reference(path)
    cube = read_cube(path)
    bands = [slice(y, y + 3) for y in range(0, ny - 3, 3)] * 4
    with ThreadPoolExecutor(max_workers=8) as pool:
        for _ in range(3):
            for ys, got in zip(bands, pool.map(lambda s: read_rows(cube, s), bands)):
                np.testing.assert_array_equal(got, ref[:, ys])
    for _ in range(10):
        with dask.config.set(scheduler="threads", num_workers=8):
            np.testing.assert_array_equal(cube.data.compute(), ref)
    for _ in range(3):
        # a small memory bound: many bands, each read in a thread while the last is summed
        out = map_blocks(cube, _band_sum, outputs={"s": ((), np.float64, np.nan)},
                         max_memory=NCHAN * NX * 8 * 3 * 6, prefetch=True)
        np.testing.assert_allclose(out["s"], np.nansum(ref, axis=0), rtol=1e-12)


def _band_sum(block):
    return {"s": np.nansum(block, axis=0)}


def _archive(tmp_path, kind):
    data = _counts().astype(np.float32)
    plain = write_cube(tmp_path / "plain.fits", data, _header())
    raw = open(plain, "rb").read()
    if kind == "gz":
        path = tmp_path / "a.fits.gz"
        path.write_bytes(gzip.compress(raw))
    elif kind == "gz_named_fits":
        path = tmp_path / "a.fits"
        path.write_bytes(gzip.compress(raw))
    elif kind == "bz2":
        path = tmp_path / "a.fits.bz2"
        path.write_bytes(bz2.compress(raw))
    else:
        path = tmp_path / f"{kind}.fits"
        # lossless: integer-valued floats, no quantisation (quantize_level=0 for GZIP_2;
        # RICE_1 on floats quantises, so it gets the integers themselves)
        comp = (fits.CompImageHDU(data, _header(), compression_type="GZIP_2",
                                  quantize_level=0.0) if kind == "GZIP_2" else
                fits.CompImageHDU(data.astype(np.int32), _header(), compression_type="RICE_1"))
        fits.HDUList([fits.PrimaryHDU(), comp]).writeto(path)
    return str(path), plain


@pytest.mark.parametrize("kind", ["gz", "gz_named_fits", "bz2", "GZIP_2", "RICE_1"])
def test_archives_match_astropy(tmp_path, kind):
    import dask

    path, plain = _archive(tmp_path, kind)
    ext = 1 if kind in ("GZIP_2", "RICE_1") else 0
    ref = np.asarray(fits.getdata(path, ext=ext), dtype=np.float64)  # reference library
    np.testing.assert_array_equal(ref, fits.getdata(plain))  # lossless, as built
    with pytest.warns(UserWarning, match="compressed"):
        cube = read_cube(path)
    for _ in range(5):  # threads, repeated: each read of a compressed HDU has its own handle
        with dask.config.set(scheduler="threads", num_workers=8):
            np.testing.assert_array_equal(np.asarray(cube.data.compute() if hasattr(
                cube.data, "compute") else cube.data, dtype=np.float64), ref)
    np.testing.assert_array_equal(read_rows(cube, slice(4, 9)), ref[:, 4:9])


def test_archive_memory_cost_is_stated(tmp_path):
    path, _ = _archive(tmp_path, "gz")
    with pytest.warns(UserWarning, match=r"decompresses the whole cube into memory \(0.0366 MB"):
        read_cube(path)


@pytest.mark.parametrize("kind", ["gz", "GZIP_2", "u16"])
def test_cli_moments_identical_to_the_plain_cube(tmp_path, kind):
    """`kinemap maps` on an archive or unsigned 16-bit cube writes the same moment maps as
    on the plain float32 cube holding the same values."""
    if kind == "u16":
        plain = write_cube(tmp_path / "plain.fits", _counts().astype(np.float32), _header())
        path = _stored(tmp_path / "u16.fits", _counts(), 16, bzero=32768.0)
    else:
        path, plain = _archive(tmp_path, kind)
    maps = {}
    for name, p in (("plain", plain), (kind, path)):
        out = tmp_path / f"out_{name}"
        code, _, err = run_cli("maps", p, "--out", str(out), "--no-plots", "--continuum", "none")
        assert code == 0, err
        maps[name] = {k: fits.getdata(out / f"{k}.fits") for k in ("moment0", "moment1", "noise")}
    for k, ref in maps["plain"].items():
        assert np.isfinite(ref).any()
        np.testing.assert_allclose(maps[kind][k], ref, rtol=1e-6, atol=1e-9, equal_nan=True)


def test_cut_short_archive_is_named(tmp_path):
    from kinemap.errors import KinemapError

    path, _ = _archive(tmp_path, "gz")
    raw = open(path, "rb").read()
    cut = tmp_path / "cut.fits.gz"
    cut.write_bytes(raw[: len(raw) // 2])
    with pytest.raises(KinemapError, match="gzip stream ends early: the file is cut short"):
        read_cube(str(cut))
