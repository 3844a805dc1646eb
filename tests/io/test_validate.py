"""The reader's validation layer (io/validate.py): every malformed variant of a small valid
cube is refused before its data are read, in one line that names the keyword, or read with
a named warning when it is only suspicious.

The variants are built in tmp_path from conftest's make_header/write_cube; cards astropy
will not write (NaN, a string BSCALE) are patched into the file's bytes.  Outside facts
used: the FITS Standard 4.0 layout (2880-byte blocks of 80-byte cards, END, BITPIX values
8/16/32/64/-32/-64, data size |BITPIX|/8 * NAXIS1 * ... * NAXISn; from memory) and the
speed of light (CODATA, exact).
"""
from __future__ import annotations

import os
import tracemalloc

import numpy as np
import pytest
from astropy.io import fits

from conftest import gaussian_cube, make_header, run_cli, write_cube
from kinemap.errors import HeaderWarning, KinemapError
from kinemap.io import read_cube

BLOCK = 2880  # FITS Standard 4.0, sect. 3.1: 2880-byte blocks (from memory)
REST = 1.4204e9


def _header(**edits):
    h = make_header("FREQ", extra={"RESTFRQ": REST, "BMAJ": 0.006, "BMIN": 0.005, "BPA": 0.0})
    for key, value in edits.items():
        key = key.replace("__", "-")
        if value is None:
            h.remove(key)
        else:
            h[key] = value
    return h


def _data():
    return gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3, noise=0.05)


def _cube(tmp_path, name="c.fits", **edits):
    return write_cube(tmp_path / name, _data(), _header(**edits))


def _patched(tmp_path, key, text, name="p.fits", **edits):
    """A cube whose card ``key`` reads ``key = text`` as raw bytes (added if absent)."""
    h = _header(**edits)
    if key not in h:
        h["KMTEST"] = 0
    path = write_cube(tmp_path / name, _data(), h)
    raw = bytearray(open(path, "rb").read())
    target = (key if key in h else "KMTEST").ljust(8).encode() + b"="
    i = raw.index(target)
    raw[i:i + 80] = f"{key.ljust(8)}= {text:>20}".ljust(80).encode()
    open(path, "wb").write(bytes(raw))
    return path


def _edited_bytes(tmp_path, name, edit):
    path = _cube(tmp_path, "ok.fits")
    raw = open(path, "rb").read()
    out = tmp_path / name
    out.write_bytes(edit(raw))
    return str(out)


def _set_card(raw, key, value):
    b = bytearray(raw)
    i = raw.index(key.ljust(8).encode() + b"=")
    b[i:i + 80] = fits.Card(key, value).image.encode()
    return bytes(b)


def _blank_card(raw, key):
    b = bytearray(raw)
    i = raw.index(key.ljust(8).encode() + b"=")
    b[i:i + 80] = b" " * 80
    return bytes(b)


# --- the file against its header ---------------------------------------------------------

STRUCTURE = [
    ("truncated", lambda r: r[:BLOCK + 5000], r"cut short.*19200 bytes.*only 5000"),
    ("header_only", lambda r: r[:BLOCK], r"cut short.*only 0 follow"),
    ("no_end", lambda r: r[:1000], r"no END card"),
    ("naxis3_too_big", lambda r: _set_card(r, "NAXIS3", 400), r"NAXIS 10 x 12 x 400"),
    ("bitpix_7", lambda r: _set_card(r, "BITPIX", 7), r"BITPIX = 7 .*8, 16, 32, 64, -32, -64"),
    ("bitpix_wrong", lambda r: _set_card(r, "BITPIX", -64), r"cut short.*BITPIX -64"),
    ("bitpix_short", lambda r: _set_card(r, "BITPIX", 16), r"not a FITS extension.*BITPIX 16"),
    ("naxis1_zero", lambda r: _set_card(r, "NAXIS1", 0), r"NAXIS1 = 0 in the primary header says there are no data"),
    ("naxis_zero", lambda r: _set_card(r, "NAXIS", 0), r"NAXIS = 0 .*says there are no data"),
    ("no_naxis2", lambda r: _blank_card(r, "NAXIS2"), r"NAXIS = 3 but no NAXIS2"),
    ("no_bitpix", lambda r: _blank_card(r, "BITPIX"), r"has no BITPIX"),
    ("longer", lambda r: r + b"\x01" * BLOCK, r"not a FITS extension: the data are longer"),
    ("text", lambda r: b"plain text, not FITS", r"not a readable FITS file.*SIMPLE"),
]


@pytest.mark.parametrize("name,edit,match", STRUCTURE, ids=[s[0] for s in STRUCTURE])
def test_broken_structure_is_named(tmp_path, name, edit, match):
    path = _edited_bytes(tmp_path, f"{name}.fits", edit)
    with pytest.raises(KinemapError, match=match):
        read_cube(path)


def test_huge_claim_refused_from_the_headers_alone(tmp_path):
    """A header that says NAXIS = 0 in front of 4 GB of (sparse) data is refused by reading
    the headers only: tracemalloc's peak stays far below the file's size."""
    path = tmp_path / "huge.fits"
    h = fits.Header()
    h["SIMPLE"], h["BITPIX"], h["NAXIS"] = True, -32, 0
    with open(path, "wb") as fh:
        fh.write(h.tostring().encode())
        fh.truncate(4 * 2**30)
    tracemalloc.start()
    try:
        with pytest.raises(KinemapError, match="NAXIS = 0 .*says there are no data"):
            read_cube(str(path))
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 20 * 2**20, peak


def test_special_files_refused(tmp_path):
    pipe = tmp_path / "pipe.fits"
    os.mkfifo(pipe)
    with pytest.raises(KinemapError, match="named pipe"):
        read_cube(str(pipe))  # would block forever if opened
    with pytest.raises(KinemapError, match="folder"):
        read_cube(str(tmp_path))
    empty = tmp_path / "empty.fits"
    empty.write_bytes(b"")
    with pytest.raises(KinemapError, match="empty"):
        read_cube(str(empty))


# --- keywords -----------------------------------------------------------------------------

KEYWORDS = [
    (dict(CRVAL3=None), r"CRVAL3 is missing"),
    (dict(CDELT3=None), r"CDELT3 is missing"),
    (dict(CDELT3=0.0), r"CDELT3 = 0"),
    (dict(CDELT3="abc"), r"CDELT3 = 'abc' is not a number"),
    (dict(CRVAL3=0.0), r"frequency values <= 0"),
    (dict(CDELT3=1e12), r"beyond the speed of light"),
    (dict(CDELT3=1e-12), r"less than 1 mm/s"),
    (dict(CRPIX3=1e9), r"beyond the speed of light"),
    (dict(RESTFRQ=1.0), r"rest value 1 Hz.*beyond the speed of light"),
    (dict(RESTFRQ=1e30), r"beyond the speed of light"),
    (dict(RESTFRQ=-5.0), r"RESTFRQ = -5.0 is not positive"),
    (dict(RESTFREQ=REST * 1.001), r"RESTFRQ = .* and RESTFREQ = .* disagree \(299 km/s"),
    (dict(CUNIT3="GHz"), r"beyond the speed of light"),
    (dict(CUNIT3="km/s"), r"CUNIT3 = 'km/s' is not a frequency unit"),
    (dict(CUNIT3="furlong"), r"CUNIT3 = 'furlong' is not a unit"),
    (dict(CUNIT1="rad", CUNIT2="rad"), r"CRVAL2 = 20.0 rad is 1146 deg, not a latitude"),
    (dict(CUNIT1="K"), r"CUNIT1 = 'K' is not an angle unit"),
    (dict(CDELT1=None), r"CDELT1 is missing"),
    (dict(CDELT2=0.0), r"CDELT2 = 0"),
    (dict(CTYPE1=5), r"CTYPE1 = 5 is not an axis type"),
    (dict(CTYPE1="RA---XYZ"), r"cannot be read: Unrecognized projection code"),
    (dict(PC3_1=0.5, PC1_1=1.0, PC2_2=1.0, PC3_3=1.0), r"PC3_1 = 0.5 mixes the spectral"),
    (dict(BMAJ=1e5, BMIN=1e5), r"beam major axis .* 100000 deg, larger than the sky"),
    (dict(BMAJ=5.0, BMIN=5.0), r"over ten times the map's width"),
    (dict(BLANK="x"), r"BLANK = 'x' .*is not an integer"),
]


@pytest.mark.parametrize("edits,match", KEYWORDS, ids=[str(k[0]) for k in KEYWORDS])
def test_bad_keywords_are_named(tmp_path, edits, match):
    path = _cube(tmp_path, **edits)
    with pytest.raises(KinemapError, match=match):
        read_cube(path)


@pytest.mark.parametrize("key,text,match", [
    ("CRVAL3", "NaN", r"CRVAL3 = NaN is not a number"),
    ("CDELT3", "NaN", r"CDELT3 = NaN is not a number"),
    ("CRPIX3", "NaN", r"CRPIX3 = NaN is not a number"),
    ("CDELT1", "NaN", r"CDELT1 = NaN is not a number"),
    ("BSCALE", "'abc'", r"BSCALE = 'abc' .* is not a number"),
    ("BZERO", "'x'", r"BZERO = 'x' .* is not a number"),
    ("CUNIT3", "NaN", r"CUNIT3 = NaN is not a unit"),
    ("BPA", "NaN", r"beam position angle \(BPA\) is not finite"),
])
def test_unparsable_cards_are_named(tmp_path, key, text, match):
    """Cards astropy will not write (or silently drops on reading) are patched in as bytes."""
    path = _patched(tmp_path, key, text)
    with pytest.raises(KinemapError, match=match):
        read_cube(path)


def test_absurd_beam_given_by_hand_refused(tmp_path):
    path = _cube(tmp_path)
    with pytest.raises(KinemapError, match=r"\(--beam\) is 100000 deg, larger than the sky; "
                       "give --beam"):
        read_cube(path, beam="100000deg")


def test_time_keywords_checked_only_for_a_frame_change(tmp_path):
    path = _cube(tmp_path, SPECSYS="TOPOCENT", MJD__OBS="abc", OBSGEO__X=-1.6e6,
                 OBSGEO__Y=-5.0e6, OBSGEO__Z=3.5e6)
    assert read_cube(path).shape == (40, 12, 10)  # no frame change: MJD-OBS is not needed
    with pytest.raises(KinemapError, match=r"MJD-OBS = 'abc' is not a number.*--frame"):
        read_cube(path, frame="LSRK")


def test_beam_table_shorter_than_the_cube(tmp_path):
    from astropy.table import Table

    h = _header(BMAJ=None, BMIN=None, BPA=None, CASAMBM=True)
    beams = Table({"BMAJ": np.full(30, 20.0), "BMIN": np.full(30, 18.0), "BPA": np.zeros(30),
                   "CHAN": np.arange(30), "POL": np.zeros(30, int)})
    table = fits.BinTableHDU(beams, name="BEAMS")
    for i, unit in ((1, "arcsec"), (2, "arcsec"), (3, "deg")):
        table.header[f"TUNIT{i}"] = unit
    path = tmp_path / "mb.fits"
    fits.HDUList([fits.PrimaryHDU(_data().astype(np.float32), h), table]).writeto(path)
    with pytest.raises(KinemapError, match="BEAMS table has 30 beams for 40 channels"):
        read_cube(str(path))


def test_suspicious_but_usable_headers_warn(tmp_path):
    # channels 2000 km/s wide on a band still inside |v| < c: usable, but worth a look
    path = _cube(tmp_path, CDELT3=-1e7, CRVAL3=REST * 1.1)
    with pytest.warns(HeaderWarning, match="channels are .* km/s wide"):
        read_cube(path)
    path = _cube(tmp_path, "b.fits", CRPIX3=None)
    with pytest.warns(HeaderWarning, match="CRPIX3 is missing"):
        read_cube(path)


def test_a_valid_cube_passes_quietly(tmp_path):
    """The checks must not refuse or warn about a plain valid cube."""
    import warnings

    path = _cube(tmp_path)
    with warnings.catch_warnings():
        warnings.simplefilter("error", HeaderWarning)
        cube = read_cube(path)
    assert cube.shape == (40, 12, 10)
    assert np.all(np.isfinite(cube.velocity))


def test_real_cube_passes(real_cube_path):
    """The shared real cube (tests/conftest.py REAL_CUBE) is read without a HeaderWarning."""
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error", HeaderWarning)
        cube = read_cube(real_cube_path)
    assert cube.shape == (53, 105, 105)


# --- what users see -----------------------------------------------------------------------

@pytest.mark.parametrize("make,keyword", [
    (lambda p: _edited_bytes(p, "t.fits", lambda r: r[:BLOCK + 5000]), "cut short"),
    (lambda p: _patched(p, "CDELT3", "NaN"), "CDELT3"),
    (lambda p: _cube(p, CTYPE1="RA---XYZ"), "CTYPE1"),
    (lambda p: _cube(p, RESTFREQ=REST * 1.001), "RESTFREQ"),
    (lambda p: _patched(p, "BPA", "NaN"), "BPA"),
])
def test_cli_one_line_exit_2(tmp_path, make, keyword):
    """Exit 2 with one line on stderr naming the keyword: no traceback, no wcslib location
    ('ERROR 4 in wcs_types()'), no astropy log line before it, and nothing written."""
    path = make(tmp_path)
    out = tmp_path / "out"
    code, _, err = run_cli("maps", path, "--out", str(out), "--no-plots")
    assert code == 2, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("kinemap: error:"), err
    assert keyword in lines[0] and "ERROR" not in lines[0]
    assert not out.exists()


def test_cli_non_ascii_name_is_recorded_escaped(tmp_path):
    """A file name with spaces and non-ASCII letters works and is written into product
    headers as printable ASCII (FITS Standard 4.0, sect. 4.2.1: string values are ASCII
    32-126; from memory), reversibly escaped."""
    name = "nébuleuse ä b.fits"
    path = _cube(tmp_path, name)
    out = tmp_path / "o ü"
    code, _, err = run_cli("maps", path, "--out", str(out), "--no-plots", "--continuum", "none")
    assert code == 0, err
    value = fits.getheader(out / "moment0.fits")["KMINPUT"]
    assert value.encode("ascii").decode("unicode_escape") == name


def test_cli_rings_inputs(tmp_path):
    """rings: a 2D image that is no velocity map and a one-channel cube are refused by
    name; a cube in extension 1 behind a 2D primary HDU is read as the cube (as maps does)."""
    h = make_header("VRAD", crval=-100e3, cdelt=5e3, cunit="m/s")
    d = _data().astype(np.float32)
    h2 = h.copy()
    for k in [k for k in h2 if k.endswith("3")]:
        del h2[k]
    h2["NAXIS"] = 2
    img = tmp_path / "img.fits"
    fits.PrimaryHDU(d[20], h2).writeto(img)
    one = h.copy()
    one["NAXIS3"] = 1
    onechan = tmp_path / "one.fits"
    fits.PrimaryHDU(d[20:21], one).writeto(onechan)
    code, _, err = run_cli("rings", str(img), "--out", str(tmp_path / "a"), "--no-plots")
    assert code == 2 and "BUNIT 'K', so it is not a velocity map" in err, err
    code, _, err = run_cli("rings", str(onechan), "--out", str(tmp_path / "b"), "--no-plots")
    assert code == 2 and "one channel, NAXIS3 = 1" in err, err

    from kinemap.io import is_2d_image

    ext = tmp_path / "ext.fits"
    fits.HDUList([fits.PrimaryHDU(d[20], h2), fits.ImageHDU(d, h)]).writeto(ext)
    assert is_2d_image(str(img)) and is_2d_image(str(onechan))
    assert not is_2d_image(str(ext))
    assert read_cube(str(ext)).shape == (40, 12, 10)


def test_cli_rings_unparsable_ctype(tmp_path):
    """rings looks at CTYPEs to tell a velocity map from a cube: an unparsable CTYPE3
    (NaN) is named by the validation layer, not an internal error (benchmarks/fuzz.py)."""
    path = _patched(tmp_path, "CTYPE3", "NaN")
    code, _, err = run_cli("rings", path, "--out", str(tmp_path / "o"), "--no-plots")
    assert code == 2, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "CTYPE3" in lines[0] and "internal error" not in lines[0], err
