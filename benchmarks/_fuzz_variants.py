"""The malformed and unusual cubes of ``benchmarks/fuzz.py`` (invented data, seeded).

A variant is ``(name, build)``; ``build(folder)`` writes what it needs into ``folder`` and
returns the path given to the command.  The base is a small valid cube: 16 x 16 pixels,
24 channels of 10 km/s on a frequency axis around the HI rest frequency (the 21 cm value
is from memory), one Gaussian line per pixel on a rotating-disk velocity field, a beam.
Headers are written card by card (not through astropy) so that values astropy refuses to
write (NaN, a missing END, a wrong BITPIX) can be written too.
"""
from __future__ import annotations

import bz2
import gzip
import os
import shutil

import numpy as np
from astropy.io import fits

NCHAN, NY, NX = 24, 16, 16
F0 = 1.420405751768e9  # HI rest frequency, Hz (Hellwig et al. 1970; from memory)
C_KMS = 299792.458
DV = 10.0


def base_cards():
    """The valid header as an ordered list of (key, value) pairs."""
    return [("SIMPLE", True), ("BITPIX", -32), ("NAXIS", 3), ("NAXIS1", NX), ("NAXIS2", NY),
            ("NAXIS3", NCHAN),
            ("CTYPE1", "RA---SIN"), ("CRVAL1", 150.0), ("CDELT1", -2e-3), ("CRPIX1", 8.5),
            ("CUNIT1", "deg"),
            ("CTYPE2", "DEC--SIN"), ("CRVAL2", 20.0), ("CDELT2", 2e-3), ("CRPIX2", 8.5),
            ("CUNIT2", "deg"),
            ("CTYPE3", "FREQ"), ("CRVAL3", F0), ("CDELT3", -DV / C_KMS * F0), ("CRPIX3", 12.5),
            ("CUNIT3", "Hz"),
            ("RESTFRQ", F0), ("SPECSYS", "LSRK"), ("BMAJ", 5e-3), ("BMIN", 5e-3), ("BPA", 0.0),
            ("BUNIT", "K")]


def base_data(seed=1):
    """(NCHAN, NY, NX) float64: an inclined rotating disk, sigma 15 km/s, noise 0.1 K."""
    yy, xx = np.mgrid[:NY, :NX] - (NY - 1) / 2
    pa, inc = np.radians(60), np.radians(50)
    xr = xx * np.cos(pa) + yy * np.sin(pa)
    yr = -xx * np.sin(pa) + yy * np.cos(pa)
    r = np.hypot(xr, yr / np.cos(inc))
    vlos = 80 * np.tanh(r / 2) * xr / np.maximum(r, 1e-9) * np.sin(inc)
    v = (np.arange(NCHAN) - (NCHAN - 1) / 2) * DV
    line = np.exp(-0.5 * ((v[:, None, None] - vlos[None]) / 15.0) ** 2)
    rng = np.random.default_rng(seed)
    return 3 * np.exp(-r / 6)[None] * line + rng.normal(0, 0.1, (NCHAN, NY, NX))


def card(key, value):
    """One 80-character card; ``value`` may be a raw string ('RAW:...') written as is."""
    if isinstance(value, str) and value.startswith("RAW:"):
        text = value[4:]
    elif isinstance(value, bool):
        text = "T" if value else "F"
    elif isinstance(value, str):
        text = "'" + value.replace("'", "''").ljust(8) + "'"
    elif isinstance(value, (int, np.integer)):
        text = str(int(value))
    else:
        text = repr(float(value)).upper()
    if key in ("COMMENT", "HISTORY"):
        return f"{key:<8}{text}"[:80].ljust(80)
    if isinstance(value, str) and not value.startswith("RAW:"):
        return f"{key:<8}= {text:<20}"[:80].ljust(80)
    return f"{key:<8}= {text:>20}"[:80].ljust(80)


def header_bytes(cards, *, end=True):
    text = "".join(card(k, v) for k, v in cards) + ("END".ljust(80) if end else "")
    text += " " * ((-len(text)) % 2880)
    return text.encode("ascii", "replace")


def data_bytes(data, bitpix=-32):
    dtype = {-32: ">f4", -64: ">f8", 8: "u1", 16: ">i2", 32: ">i4", 64: ">i8"}[bitpix]
    raw = np.asarray(data).astype(dtype).tobytes()
    return raw + b"\0" * ((-len(raw)) % 2880)


def write(path, cards, data, *, bitpix=None, end=True, cut=None, extra=b""):
    """Write a primary HDU from raw cards; ``cut`` keeps only that many bytes in the end."""
    bp = bitpix if bitpix is not None else dict(cards).get("BITPIX", -32)
    bp = bp if bp in (-32, -64, 8, 16, 32, 64) else -32
    blob = header_bytes(cards, end=end) + (b"" if data is None else data_bytes(data, bp)) + extra
    with open(path, "wb") as fh:
        fh.write(blob if cut is None else blob[:cut])
    return str(path)


def _set(cards, key, value):
    """Cards with ``key`` replaced (or appended, before nothing in particular; None drops it)."""
    out, done = [], False
    for k, v in cards:
        if k == key:
            done = True
            if value is not None:
                out.append((k, value))
        else:
            out.append((k, v))
    if not done and value is not None:
        out.append((key, value))
    return out


def mutate(**changes):
    """A variant builder: the base with some keywords changed (None removes one)."""
    def build(folder):
        cards = base_cards()
        for key, value in changes.items():
            cards = _set(cards, key, value)
        return write(os.path.join(folder, "cube.fits"), cards, base_data())
    return build


# keyword -> the mutations tried on it (besides removing it)
_HEADER_KEYS = ["CTYPE3", "CRVAL3", "CDELT3", "CRPIX3", "CUNIT3", "RESTFRQ", "SPECSYS",
                "CTYPE1", "CRVAL1", "CDELT1", "CRPIX1", "CUNIT1", "CDELT2", "CUNIT2",
                "BMAJ", "BMIN", "BPA", "BUNIT"]
_VALUES = {"nan": "RAW:NaN", "str": "abc", "zero": 0.0, "huge": 1e30, "neg": -1.0,
           "tiny": 1e-30}


def header_variants():
    out = []
    for key in _HEADER_KEYS:
        out.append((f"{key}-removed", mutate(**{key: None})))
        for label, value in _VALUES.items():
            if key.startswith(("CTYPE", "CUNIT", "SPECSYS", "BUNIT")) and label in ("neg", "tiny"):
                continue
            out.append((f"{key}={label}", mutate(**{key: value})))
    return out


def unit_variants():
    s = -DV / C_KMS * F0
    return [
        ("CUNIT3=km/s-on-FREQ", mutate(CUNIT3="km/s")),
        ("CUNIT3=GHz-values-in-Hz", mutate(CUNIT3="GHz")),
        ("CUNIT3=m", mutate(CUNIT3="m")),
        ("CUNIT1=arcsec-values-in-deg", mutate(CUNIT1="arcsec", CUNIT2="arcsec")),
        ("CUNIT1=rad", mutate(CUNIT1="rad", CUNIT2="rad")),
        ("CUNIT1=furlong", mutate(CUNIT1="furlong")),
        ("BUNIT=Jy/beam", mutate(BUNIT="Jy/beam")),
        ("BUNIT=nonsense", mutate(BUNIT="blips/fortnight")),
        ("RESTFRQ=1Hz", mutate(RESTFRQ=1.0)),
        ("RESTFRQ=1e30", mutate(RESTFRQ=1e30)),
        ("RESTFRQ-far-1GHz", mutate(RESTFRQ=1.0e9)),
        ("CRVAL3-far-1GHz", mutate(CRVAL3=1.0e9)),
        ("RESTFRQ+RESTFREQ-disagree", mutate(RESTFREQ=F0 * 1.001)),
        ("RESTFREQ-only", mutate(RESTFRQ=None, RESTFREQ=F0)),
        ("CDELT3-positive", mutate(CDELT3=-s)),
        ("CDELT3-1Hz", mutate(CDELT3=1.0)),
        ("CRPIX3=1e9", mutate(CRPIX3=1e9)),
        ("CTYPE3=VRAD-in-Hz", mutate(CTYPE3="VRAD")),
        ("CTYPE3=VELO-LSR", mutate(CTYPE3="VELO-LSR", CRVAL3=0.0, CDELT3=DV * 1e3, CUNIT3="m/s")),
        ("CTYPE3=VOPT", mutate(CTYPE3="VOPT", CRVAL3=0.0, CDELT3=DV * 1e3, CUNIT3="m/s")),
        ("CTYPE3=VRAD-kms", mutate(CTYPE3="VRAD", CRVAL3=0.0, CDELT3=DV, CUNIT3="km/s")),
        ("CTYPE3=WAVE-no-rest", mutate(CTYPE3="WAVE", CRVAL3=0.211, CDELT3=7e-6, CUNIT3="m",
                                       RESTFRQ=None)),
        ("CTYPE3=FREQ-no-rest", mutate(RESTFRQ=None)),
        ("CTYPE3=STOKES", mutate(CTYPE3="STOKES")),
        ("CTYPE3=numeric", mutate(CTYPE3="RAW:3")),
        ("CTYPE1=numeric", mutate(CTYPE1="RAW:3")),
        ("CTYPE1=GLON-CAR", mutate(CTYPE1="GLON-CAR", CTYPE2="GLAT-CAR")),
        ("CTYPE1=linear", mutate(CTYPE1="X", CTYPE2="Y", CUNIT1=None, CUNIT2=None)),
        ("PC-mixes-spectral", mutate(PC1_3=0.5, PC3_1=0.5)),
        ("SPECSYS=BARYCENT", mutate(SPECSYS="BARYCENT")),
        ("SPECSYS=weird", mutate(SPECSYS="NOWHERE")),
        ("MJD-OBS=str", mutate(**{"MJD-OBS": "abc"})),
        ("VELREF=257", mutate(VELREF=257)),
        ("no-beam", mutate(BMAJ=None, BMIN=None, BPA=None)),
        ("beam-1e5deg", mutate(BMAJ=1e5, BMIN=1e5)),
        ("beam-BMIN>BMAJ", mutate(BMIN=1e-2)),
        ("beam-tiny", mutate(BMAJ=1e-9, BMIN=1e-9)),
        ("BSCALE=str", mutate(BSCALE="abc")),
        ("BSCALE=2", mutate(BSCALE=2.0)),
        ("BZERO=nan", mutate(BZERO="RAW:NaN")),
        ("BLANK-on-float", mutate(BLANK=-32768)),
        ("EQUINOX=str", mutate(EQUINOX="abc")),
        ("RADESYS=weird", mutate(RADESYS="NOWHERE")),
        ("LONPOLE=nan", mutate(LONPOLE="RAW:NaN")),
    ]


def _with_data(transform, **changes):
    """A builder whose data (and header) a function reshapes: transform(cards, data)."""
    def build(folder):
        cards = base_cards()
        for key, value in changes.items():
            cards = _set(cards, key, value)
        cards, data = transform(cards, base_data())
        return write(os.path.join(folder, "cube.fits"), cards, data)
    return build


def _shape(cards, data):
    n = data.shape[::-1]
    for i, k in enumerate(n, 1):
        cards = _set(cards, f"NAXIS{i}", k)
    return _set(cards, "NAXIS", data.ndim), data


def _blank(fraction, value=np.nan):
    def t(cards, data):
        rng = np.random.default_rng(7)
        data = data.copy()
        data[:, rng.random(data.shape[1:]) < fraction] = value
        return cards, data
    return t


def _slice(sl):
    return lambda cards, data: _shape(cards, data[sl])


def _stokes_last(cards, data):
    cards = _set(_set(_set(cards, "CTYPE4", "STOKES"), "CRVAL4", 1.0), "CDELT4", 1.0)
    cards = _set(cards, "CRPIX4", 1.0)
    return _shape(cards, data[None])


def _stokes_spectral_swap(cards, data):
    """Axes ordered (x, y, stokes, spectral)."""
    c = dict(cards)
    new = [(k, v) for k, v in cards if not k.endswith("3") or k.startswith("NAXIS")]
    for k in ("CTYPE", "CRVAL", "CDELT", "CRPIX", "CUNIT"):
        new = _set(new, k + "4", c[k + "3"])
    new += [("CTYPE3", "STOKES"), ("CRVAL3", 1.0), ("CDELT3", 1.0), ("CRPIX3", 1.0)]
    return _shape(new, data[:, None])


def _spectral_first(cards, data):
    """Axes ordered (spectral, x, y): FITS axis 1 is the spectral one."""
    c = dict(cards)
    new = [(k, v) for k, v in cards if k[:5] not in ("CTYPE", "CRVAL", "CDELT", "CRPIX", "CUNIT")]
    for k in ("CTYPE", "CRVAL", "CDELT", "CRPIX", "CUNIT"):
        new += [(k + "1", c[k + "3"]), (k + "2", c[k + "1"]), (k + "3", c[k + "2"])]
    return _shape(new, np.ascontiguousarray(np.transpose(data, (1, 2, 0))))


def _two_d(cards, data):
    cards = [(k, v) for k, v in cards if not k.endswith("3")]
    return _shape(cards, data[12])


def shape_variants():
    return [
        ("one-channel", _with_data(_slice(np.s_[12:13]))),
        ("two-channels", _with_data(_slice(np.s_[11:13]))),
        ("three-channels", _with_data(_slice(np.s_[10:13]))),
        ("one-row", _with_data(_slice(np.s_[:, 8:9]))),
        ("one-column", _with_data(_slice(np.s_[:, :, 8:9]))),
        ("one-pixel", _with_data(_slice(np.s_[:, 8:9, 8:9]))),
        ("two-rows", _with_data(_slice(np.s_[:, 7:9]))),
        ("wide-4x16", _with_data(_slice(np.s_[:, 6:10]))),
        ("60pct-blank", _with_data(_blank(0.6))),
        ("95pct-blank", _with_data(_blank(0.95))),
        ("all-nan", _with_data(_blank(1.01))),
        ("60pct-zero", _with_data(_blank(0.6, 0.0))),
        ("all-zero", _with_data(lambda c, d: (c, np.zeros_like(d)))),
        ("constant", _with_data(lambda c, d: (c, np.ones_like(d)))),
        ("noise-only", _with_data(lambda c, d: (c, np.random.default_rng(3).normal(0, .1, d.shape)))),
        ("absorption", _with_data(lambda c, d: (c, 5 - d))),
        ("inf-values", _with_data(lambda c, d: (c, np.where(d > 2.5, np.inf, d)))),
        ("huge-values", _with_data(lambda c, d: (c, d * 1e37))),
        ("tiny-values", _with_data(lambda c, d: (c, d * 1e-37))),
        ("nan-channels", _with_data(lambda c, d: (c, np.where(np.arange(NCHAN)[:, None, None] % 3 == 0, np.nan, d)))),
        ("2D-image", _with_data(_two_d)),
        ("4D-stokes-last", _with_data(_stokes_last)),
        ("4D-stokes-before-spectral", _with_data(_stokes_spectral_swap)),
        ("spectral-axis-first", _with_data(_spectral_first)),
        ("NAXIS4-missing", _with_data(lambda c, d: (_set(_stokes_last(c, d)[0], "NAXIS4", None), d[None]))),
    ]


def _raw(cards=None, data="base", **kw):
    def build(folder):
        d = base_data() if isinstance(data, str) else data
        return write(os.path.join(folder, "cube.fits"), cards or base_cards(), d, **kw)
    return build


def _scaled(bitpix, bscale, bzero, blank=None):
    def build(folder):
        d = base_data()
        raw = np.round((d - bzero) / bscale)
        cards = _set(_set(_set(base_cards(), "BITPIX", bitpix), "BSCALE", bscale), "BZERO", bzero)
        if blank is not None:
            raw[0, 0, :4] = blank
            cards = _set(cards, "BLANK", blank)
        return write(os.path.join(folder, "cube.fits"), cards, raw, bitpix=bitpix)
    return build


def _astropy_hdul(kind):
    def build(folder):
        h = fits.Header()
        for k, v in base_cards()[6:]:
            h[k] = v
        data = base_data().astype(np.float32)
        path = os.path.join(folder, "cube.fits")
        if kind == "ext1":
            fits.HDUList([fits.PrimaryHDU(), fits.ImageHDU(data, h)]).writeto(path)
        elif kind == "ext1-behind-2D":
            fits.HDUList([fits.PrimaryHDU(data[0]), fits.ImageHDU(data, h)]).writeto(path)
        elif kind in ("RICE_1", "GZIP_2"):
            fits.HDUList([fits.PrimaryHDU(), fits.CompImageHDU(data, h, compression_type=kind)]).writeto(path)
        elif kind == "uint16":
            fits.PrimaryHDU((data * 1000 + 30000).astype(np.uint16), h).writeto(path)
        elif kind == "beam-table-short":
            t = fits.BinTableHDU.from_columns([
                fits.Column(name=n, format="E", array=np.full(5, v)) for n, v in
                (("BMAJ", 18.0), ("BMIN", 18.0), ("BPA", 0.0))] + [
                fits.Column(name="CHAN", format="J", array=np.arange(5)),
                fits.Column(name="POL", format="J", array=np.zeros(5))], name="BEAMS")
            h2 = h.copy()
            h2["CASAMBM"] = True
            fits.HDUList([fits.PrimaryHDU(data, h2), t]).writeto(path)
        return path
    return build


def _archive(kind):
    def build(folder):
        src = _raw()(folder)
        blob = open(src, "rb").read()
        os.remove(src)
        name, opener = {"gz": ("cube.fits.gz", gzip.compress), "bz2": ("cube.fits.bz2", bz2.compress),
                        "gz-as-fits": ("cube.fits", gzip.compress)}[kind]
        path = os.path.join(folder, name)
        with open(path, "wb") as fh:
            fh.write(opener(blob))
        return path
    return build


def _special(kind):
    def build(folder):
        path = os.path.join(folder, "cube.fits")
        if kind == "named-pipe":
            os.mkfifo(path)
        elif kind == "directory":
            os.mkdir(path)
        elif kind == "empty-file":
            open(path, "wb").close()
        elif kind == "text-file":
            with open(path, "w") as fh:
                fh.write("this is not a cube\n")
        elif kind == "missing":
            pass
        elif kind in ("name with spaces", "nàme-ünicode"):
            src = _raw()(folder)
            path = os.path.join(folder, kind + ".fits")
            shutil.move(src, path)
        return path
    return build


def file_variants():
    hb = len(header_bytes(base_cards()))
    nbytes = NCHAN * NY * NX * 4
    return [
        ("truncated-half-data", _raw(cut=hb + nbytes // 2)),
        ("truncated-one-byte", _raw(cut=hb + nbytes - 1)),
        ("header-only", _raw(data=None)),
        ("header-cut", _raw(cut=hb // 2)),
        ("no-END", _raw(end=False)),
        ("extra-data", _raw(extra=b"\0" * 2880 * 3)),
        ("NAXIS3-larger", _raw(cards=_set(base_cards(), "NAXIS3", NCHAN * 4))),
        ("NAXIS3-smaller", _raw(cards=_set(base_cards(), "NAXIS3", NCHAN // 2))),
        ("NAXIS1=0", _raw(cards=_set(base_cards(), "NAXIS1", 0))),
        ("NAXIS=0", _raw(cards=_set(base_cards(), "NAXIS", 0))),
        ("NAXIS2-missing", _raw(cards=_set(base_cards(), "NAXIS2", None))),
        ("BITPIX-missing", _raw(cards=_set(base_cards(), "BITPIX", None))),
        ("BITPIX=7", _raw(cards=_set(base_cards(), "BITPIX", 7))),
        ("BITPIX=-64-data-32", _raw(cards=_set(base_cards(), "BITPIX", -64), bitpix=-32)),
        ("float64", _raw(cards=_set(base_cards(), "BITPIX", -64))),
        ("int16-scaled", _scaled(16, 1e-4, 1.0)),
        ("int32-scaled", _scaled(32, 1e-6, 0.0)),
        ("int64-scaled", _scaled(64, 1e-9, 0.0)),
        ("int16-BLANK", _scaled(16, 1e-4, 1.0, blank=-32768)),
        ("uint8-scaled", _scaled(8, 0.02, -0.5)),
        ("uint16-BZERO32768", _astropy_hdul("uint16")),
        ("cube-in-ext1", _astropy_hdul("ext1")),
        ("cube-behind-2D-primary", _astropy_hdul("ext1-behind-2D")),
        ("tile-RICE_1", _astropy_hdul("RICE_1")),
        ("tile-GZIP_2", _astropy_hdul("GZIP_2")),
        ("beam-table-short", _astropy_hdul("beam-table-short")),
        ("gzip", _archive("gz")),
        ("bzip2", _archive("bz2")),
        ("gzip-named-fits", _archive("gz-as-fits")),
        ("named-pipe", _special("named-pipe")),
        ("directory", _special("directory")),
        ("empty-file", _special("empty-file")),
        ("text-file", _special("text-file")),
        ("missing-file", _special("missing")),
        ("name-with-spaces", _special("name with spaces")),
        ("name-non-ascii", _special("nàme-ünicode")),
    ]


def all_variants():
    return (header_variants() + unit_variants() + shape_variants() + file_variants()
            + [("valid", _raw())])
