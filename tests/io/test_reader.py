"""Reader: axis types, orders, conventions, rest values, frames, beams, subsets, bad input.

Reference library for every velocity: astropy.units' doppler_radio / doppler_optical /
doppler_relativistic equivalencies, applied here to the header's own axis values.
"""
import warnings

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits

from conftest import gaussian_cube, make_header, write_cube
from kinemap.io.reader import read_cube
from kinemap.errors import (BeamWarning, HeaderRepairWarning, KinemapError,
                            MissingUnitWarning)

HI = 1420.405751768 * u.MHz  # Hellwig et al. 1970 (from memory)
HALPHA_AIR = 6562.80 * u.AA  # NIST ASD, air (from memory)


def axis_values(h, n):
    return h["CRVAL3"] + (np.arange(n) + 1 - h["CRPIX3"]) * h["CDELT3"]


CASES = [
    # ctype, cunit, crval, cdelt, extra header, expected convention, reference velocities
    ("FREQ", "Hz", 1.4200e9, -2.0e4, {"RESTFRQ": HI.to_value(u.Hz)}, "radio",
     lambda x: (x * u.Hz).to(u.km / u.s, u.doppler_radio(HI))),
    ("FREQ", "Hz", 1.4190e9, +2.0e4, {"RESTFREQ": HI.to_value(u.Hz)}, "radio",
     lambda x: (x * u.Hz).to(u.km / u.s, u.doppler_radio(HI))),
    ("WAVE", "Angstrom", 6560.0, 0.25, {"RESTWAV": 6564.61e-10}, "optical",
     lambda x: (x * u.AA).to(u.km / u.s, u.doppler_optical(6564.61 * u.AA))),
    # RESTWAV is in vacuum (FITS WCS Paper III): 6564.61289 A is what wcslib gives for
    # 6562.80 A in air (astropy.wcs 'WAVE-A2W', checked in test_restwav_vacuum_to_air_as_wcslib)
    ("AWAV", "Angstrom", 6575.0, -0.25, {"RESTWAV": 6564.61289406447e-10}, "optical",
     lambda x: (x * u.AA).to(u.km / u.s, u.doppler_optical(HALPHA_AIR))),
    ("VRAD", "km/s", -100.0, 5.0, {}, "radio", lambda x: x * u.km / u.s),
    ("VOPT", "m/s", 4.0e5, -2.0e3, {}, "optical", lambda x: (x * u.m / u.s).to(u.km / u.s)),
    ("VELO", "km/s", 50.0, 2.0, {"RESTFRQ": 1.15271e11}, "relativistic", lambda x: x * u.km / u.s),
]


@pytest.mark.parametrize("ctype,cunit,crval,cdelt,extra,conv,ref", CASES,
                         ids=[f"{c[0]}{'+' if c[3] > 0 else '-'}" for c in CASES])
def test_axis_types_match_astropy_equivalencies(tmp_path, ctype, cunit, crval, cdelt, extra, conv, ref):
    h = make_header(ctype, crval=crval, cdelt=cdelt, cunit=cunit, extra=extra)
    path = write_cube(tmp_path / "c.fits", gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3), h)
    cube = read_cube(path)
    assert cube.meta.convention == conv
    expected = ref(axis_values(h, 40)).to_value(u.km / u.s)
    np.testing.assert_allclose(cube.velocity, expected, rtol=0, atol=1e-9)
    assert cube.shape == (40, 12, 10)
    assert cube.velocity.dtype == np.float64


@pytest.mark.parametrize("conv,equiv", [("optical", u.doppler_optical),
                                        ("relativistic", u.doppler_relativistic)])
def test_convention_override_goes_through_frequency(tmp_path, conv, equiv):
    h = make_header("FREQ", extra={"RESTFRQ": HI.to_value(u.Hz)})
    path = write_cube(tmp_path / "c.fits", gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3), h)
    cube = read_cube(path, convention=conv)
    ref = (axis_values(h, 40) * u.Hz).to_value(u.km / u.s, equivalencies=equiv(HI))  # astropy
    np.testing.assert_allclose(cube.velocity, ref, atol=1e-9)
    assert cube.meta.ctype == "FREQ"  # the header's CTYPE is never edited


@pytest.mark.parametrize("air", [4861.33, 6562.80, 6583.45])
def test_restwav_vacuum_to_air_as_wcslib(air):
    """Our air <-> vacuum step inverts wcslib's AWAV translation (astropy.wcs, 'WAVE-A2W')."""
    from astropy.wcs import WCS

    from kinemap.spectral.airvac import fits_vacuum_to_air

    h = fits.Header({"NAXIS": 1, "NAXIS1": 4, "CTYPE1": "AWAV", "CUNIT1": "Angstrom",
                     "CRVAL1": air, "CDELT1": 1.0, "CRPIX1": 1})
    w = WCS(h)
    w.wcs.sptr("WAVE-A2W")
    vac = float(w.pixel_to_world_values(np.array([0.0]))[0]) * 1e10
    assert float(fits_vacuum_to_air(vac)) == pytest.approx(air, abs=1e-6)


def test_velocity_axis_converted_to_other_convention(tmp_path):
    rest = 115.2712018 * u.GHz  # 12CO(1-0), CDMS (from memory)
    h = make_header("VRAD", crval=-200.0, cdelt=10.0, cunit="km/s", extra={"RESTFRQ": rest.to_value(u.Hz)})
    path = write_cube(tmp_path / "c.fits", gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3), h)
    cube = read_cube(path, convention="optical")
    vrad = axis_values(h, 40) * u.km / u.s
    freq = vrad.to(u.Hz, equivalencies=u.doppler_radio(rest))  # astropy equivalencies
    ref = freq.to_value(u.km / u.s, equivalencies=u.doppler_optical(rest))
    np.testing.assert_allclose(cube.velocity, ref, atol=1e-9)


def test_rest_value_override_and_keyword_aliases(tmp_path):
    h = make_header("FREQ", extra={"RESTFREQ": 1.0e9})
    path = write_cube(tmp_path / "c.fits", gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3), h)
    assert read_cube(path).meta.rest_value.to_value(u.Hz) == pytest.approx(1.0e9)
    cube = read_cube(path, rest_value="1420.405751768 MHz")
    ref = (axis_values(h, 40) * u.Hz).to_value(u.km / u.s, equivalencies=u.doppler_radio(HI))
    np.testing.assert_allclose(cube.velocity, ref, atol=1e-9)


@pytest.mark.parametrize("ctype,expect_ctype,expect_frame,expect_conv", [
    ("VELO-LSR", "VOPT", "LSRK", "optical"),       # AIPS: VELREF absent -> optical (wcslib)
    ("FELO-HEL", "VOPT", "BARYCENT", "optical"),
])
def test_legacy_velocity_types_are_repaired_and_recorded(tmp_path, ctype, expect_ctype, expect_frame, expect_conv):
    h = make_header(ctype, crval=1.0e6, cdelt=5.0e3, cunit="m/s")
    path = write_cube(tmp_path / "c.fits", gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3), h)
    with pytest.warns(HeaderRepairWarning):
        cube = read_cube(path)
    assert cube.meta.ctype_original == ctype
    assert cube.meta.ctype.startswith(expect_ctype)
    assert cube.meta.frame == expect_frame
    assert cube.meta.convention == expect_conv
    assert cube.meta.repairs
    np.testing.assert_allclose(cube.velocity, axis_values(h, 40) / 1e3, atol=1e-6)


def test_stokes_axis_dropped_and_axis_order_handled(tmp_path):
    data = gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3)
    h = make_header("FREQ", stokes=True, extra={"RESTFRQ": HI.to_value(u.Hz)})
    p4 = write_cube(tmp_path / "c4.fits", data[None], h)
    c4 = read_cube(p4)
    assert c4.shape == (40, 12, 10)
    np.testing.assert_allclose(np.asarray(c4.data), data, rtol=1e-6)
    # spectral axis first in the file (FITS axis 1), celestial axes 2 and 3
    h2 = fits.Header()
    for k, v in (("NAXIS", 3), ("NAXIS1", 40), ("NAXIS2", 10), ("NAXIS3", 12),
                 ("CTYPE1", "FREQ"), ("CRVAL1", h["CRVAL3"]), ("CDELT1", h["CDELT3"]), ("CRPIX1", 1.0),
                 ("CUNIT1", "Hz"), ("CTYPE2", "RA---SIN"), ("CRVAL2", 150.0), ("CDELT2", -2e-3),
                 ("CRPIX2", 5.0), ("CTYPE3", "DEC--SIN"), ("CRVAL3", 20.0), ("CDELT3", 2e-3),
                 ("CRPIX3", 6.0), ("RESTFRQ", HI.to_value(u.Hz)), ("BUNIT", "K")):
        h2[k] = v
    p = tmp_path / "swapped.fits"
    fits.PrimaryHDU(np.transpose(data, (1, 2, 0)).astype(np.float32), h2).writeto(p)
    c = read_cube(p)
    assert c.shape == (40, 12, 10)
    np.testing.assert_allclose(np.asarray(c.data), data, rtol=1e-6)
    np.testing.assert_allclose(c.velocity, c4.velocity)


def test_missing_bunit_warns_and_carries_on(tmp_path):
    h = make_header("VRAD", crval=-100, cdelt=5, cunit="km/s")
    del h["BUNIT"]
    path = write_cube(tmp_path / "c.fits", gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3), h)
    with pytest.warns(MissingUnitWarning, match="no BUNIT"):
        cube = read_cube(path)
    assert cube.meta.bunit_missing and cube.meta.bunit == u.one


def test_optical_cube_without_beam_is_quiet_radio_cube_warns(tmp_path):
    h = make_header("AWAV", crval=6550.0, cdelt=0.25, cunit="Angstrom",
                    extra={"RESTWAV": 6564.61e-10})
    path = write_cube(tmp_path / "o.fits", gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3), h)
    with warnings.catch_warnings():
        warnings.simplefilter("error", BeamWarning)
        assert read_cube(path).meta.beam is None
    hr = make_header("VRAD", crval=-100, cdelt=5, cunit="km/s")
    pr = write_cube(tmp_path / "r.fits", gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3), hr)
    with pytest.warns(BeamWarning):
        read_cube(pr)


def test_single_beam_read(tmp_path):
    h = make_header("VRAD", crval=-100, cdelt=5, cunit="km/s",
                    extra={"BMAJ": 15 / 3600, "BMIN": 10 / 3600, "BPA": 30.0})
    path = write_cube(tmp_path / "c.fits", gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3), h)
    beam = read_cube(path).meta.beam
    assert beam.major.to_value(u.arcsec) == pytest.approx(15)
    assert beam.pa.to_value(u.deg) == pytest.approx(30)


def _multibeam(tmp_path):
    from radio_beam import Beams
    from spectral_cube.cube_utils import beams_to_bintable  # CASA-style BEAMS table writer

    nchan = 8
    h = make_header("VRAD", nchan=nchan, ny=24, nx=24, crval=-20, cdelt=5, cunit="km/s")
    data = gaussian_cube(nchan, 24, 24, centre_chan=4, sigma_chan=2)
    beams = Beams(major=np.linspace(20, 27, nchan) * u.arcsec, minor=np.full(nchan, 18) * u.arcsec,
                  pa=np.zeros(nchan) * u.deg)
    hdul = fits.HDUList([fits.PrimaryHDU(data.astype(np.float32), h), beams_to_bintable(beams)])
    p = tmp_path / "mb.fits"
    hdul.writeto(p)
    return p


def test_multibeam_refuse_or_convolve(tmp_path):
    p = _multibeam(tmp_path)
    with pytest.raises(KinemapError, match="beam per channel.*--beams common"):
        read_cube(p, beams="refuse")
    cube = read_cube(p, beams="common")
    # the smallest common beam of beams with equal PA is the largest one (radio-beam)
    assert cube.meta.beam.major.to_value(u.arcsec) == pytest.approx(27, rel=1e-3)
    assert cube.shape == (8, 24, 24)
    assert any("common beam" in r for r in cube.meta.repairs)


def test_subsets_vrange_box_region(tmp_path):
    h = make_header("VRAD", nchan=40, ny=20, nx=30, crval=-100, cdelt=5, cunit="km/s")
    path = write_cube(tmp_path / "c.fits", gaussian_cube(40, 20, 30, centre_chan=20, sigma_chan=3), h)
    c = read_cube(path, vrange=("-50 km/s", "0 km/s"))
    assert c.velocity.min() >= -50 and c.velocity.max() <= 0 and c.nchan == 11
    c = read_cube(path, box="5:15,2:12")
    assert c.shape == (40, 10, 10)
    # the subset keeps its sky position: pixel (0,0) of the box is pixel (5,2) of the file
    from astropy.wcs import WCS
    full = WCS(h).celestial
    np.testing.assert_allclose(c.meta.wcs.pixel_to_world_values(0, 0), full.pixel_to_world_values(5, 2))
    reg = tmp_path / "r.reg"
    ra, dec = full.pixel_to_world_values(15, 10)
    reg.write_text(f"# Region file format: DS9\nfk5\ncircle({ra},{dec},10\")\n")
    c = read_cube(path, region=str(reg))
    pix = 2e-3 * 3600
    assert c.footprint is not None
    assert c.footprint.sum() == pytest.approx(np.pi * (10 / pix) ** 2, rel=0.6)
    with pytest.raises(KinemapError, match="vrange"):
        read_cube(path, vrange=("500", "600"))


def test_frame_change_matches_radial_velocity_correction(tmp_path):
    """TOPOCENT -> BARYCENT equals astropy's SkyCoord.radial_velocity_correction (reference)."""
    from astropy.coordinates import EarthLocation, SkyCoord
    from astropy.time import Time

    loc = EarthLocation.from_geodetic(-107.6 * u.deg, 34.1 * u.deg, 2100 * u.m)  # an invented site
    t = Time("2024-03-20T06:00:00", scale="utc")
    x, y, z = (c.to_value(u.m) for c in loc.geocentric)
    h = make_header("FREQ", extra={"RESTFRQ": HI.to_value(u.Hz), "SPECSYS": "TOPOCENT",
                                   "OBSGEO-X": x, "OBSGEO-Y": y, "OBSGEO-Z": z,
                                   "MJD-OBS": t.mjd})
    path = write_cube(tmp_path / "c.fits", gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3), h)
    topo = read_cube(path)
    bary = read_cube(path, frame="BARYCENT")
    assert bary.meta.frame == "BARYCENT" and topo.meta.frame == "TOPOCENT"
    centre = topo.meta.wcs.pixel_to_world((10 - 1) / 2, (12 - 1) / 2)
    corr = SkyCoord(centre).radial_velocity_correction("barycentric", obstime=t, location=loc)
    shift = bary.velocity - topo.velocity
    # radio velocities: the shift is corr * f/f0 to first order; compare in the middle channel
    assert abs(corr.to_value(u.km / u.s)) > 1.0  # a real correction, not zero
    np.testing.assert_allclose(np.median(shift), corr.to_value(u.km / u.s), atol=0.02)
    with pytest.raises(KinemapError, match="observer location"):
        h2 = make_header("FREQ", extra={"RESTFRQ": HI.to_value(u.Hz), "SPECSYS": "TOPOCENT"})
        read_cube(write_cube(tmp_path / "d.fits", gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3), h2),
                  frame="LSRK")


def _text_file(p):
    (p / "t.fits").write_text("plain text")
    return str(p / "t.fits")


def _image_2d(p):
    fits.PrimaryHDU(np.zeros((5, 5), np.float32)).writeto(p / "i.fits")
    return str(p / "i.fits")


@pytest.mark.parametrize("make,match", [
    (lambda p: str(p / "missing.fits"), "not found"),
    (_text_file, "not a readable FITS file"),
    (_image_2d, "2D image.*no spectral axis"),
])
def test_bad_files(tmp_path, make, match):
    with pytest.raises(KinemapError, match=match):
        read_cube(make(tmp_path))


def test_no_rest_value_and_bad_units(tmp_path):
    h = make_header("FREQ")
    path = write_cube(tmp_path / "c.fits", gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3), h)
    with pytest.raises(KinemapError, match="no rest value.*--rest-value"):
        read_cube(path)
    with pytest.raises(KinemapError, match="frequency or a wavelength"):
        read_cube(path, rest_value="5 km/s")
    h = make_header("VRAD", crval=-100, cdelt=5, cunit="km/s", extra={"BUNIT": "furlongs per fortnight"})
    path = write_cube(tmp_path / "u.fits", gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3), h)
    with pytest.raises(KinemapError, match="BUNIT.*--bunit"):
        read_cube(path)
    assert read_cube(path, bunit="K").meta.bunit == u.K


def test_real_cube_reads_as_documented(real_cube_path):
    # shared/data/README.md: 105 x 105 x 53, 66.4 m/s channels, VOPT, LSRK, no BUNIT, no beam
    with pytest.warns(MissingUnitWarning):
        cube = read_cube(real_cube_path)
    assert cube.shape == (53, 105, 105)
    assert cube.meta.convention == "optical" and cube.meta.frame == "LSRK"
    np.testing.assert_allclose(np.diff(cube.velocity), 0.06642361, rtol=1e-6)
    assert cube.meta.checksum == "de4d44cd2841d34cfe98915ab322f83e302f13b9599ef8629079249e53ad6d49"


@pytest.mark.parametrize("layout", ["standard", "stokes", "spectral-first"])
def test_block_reads_equal_the_array_view(tmp_path, layout):
    """Rows read straight from the file equal the memory-mapped view, subsets included."""
    from kinemap.parallel.blocks import read_rows

    data = gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3, noise=0.1, seed=5)
    if layout == "spectral-first":
        h = fits.Header()
        for k, v in (("NAXIS", 3), ("NAXIS1", 40), ("NAXIS2", 10), ("NAXIS3", 12),
                     ("CTYPE1", "VRAD"), ("CRVAL1", -100.0), ("CDELT1", 5.0), ("CRPIX1", 1.0),
                     ("CUNIT1", "km/s"), ("CTYPE2", "RA---SIN"), ("CRVAL2", 150.0),
                     ("CDELT2", -2e-3), ("CRPIX2", 5.0), ("CTYPE3", "DEC--SIN"), ("CRVAL3", 20.0),
                     ("CDELT3", 2e-3), ("CRPIX3", 6.0), ("BUNIT", "K")):
            h[k] = v
        path = tmp_path / "c.fits"
        fits.PrimaryHDU(np.transpose(data, (1, 2, 0)).astype(np.float32), h).writeto(path)
    else:
        h = make_header("VRAD", crval=-100, cdelt=5, cunit="km/s", stokes=layout == "stokes")
        path = write_cube(tmp_path / "c.fits", data[None] if layout == "stokes" else data, h)
    cube = read_cube(path, vrange=("-60", "40"), box="2:9,1:11")
    assert cube.source is not None
    for ys in (slice(0, 10), slice(3, 7)):
        np.testing.assert_array_equal(read_rows(cube, ys), np.asarray(cube.data[:, ys, :]))


@pytest.mark.parametrize("kind", ["scaled", "compressed"])
def test_scaled_and_compressed_cubes_read_lazily_and_correctly(tmp_path, kind):
    """Scaled 16-bit integers (BSCALE/BZERO, BLANK) and tile-compressed cubes: values as
    astropy.io.fits decodes them (reference library), a one-time warning, block reads."""
    from kinemap.parallel.blocks import read_rows
    from kinemap.errors import KinemapWarning

    data = gaussian_cube(40, 12, 10, centre_chan=20, sigma_chan=3, noise=0.1, seed=6)
    h = make_header("VRAD", crval=-100, cdelt=5, cunit="km/s")
    path = tmp_path / f"{kind}.fits"
    if kind == "scaled":
        hdu = fits.PrimaryHDU(data.astype(np.float32), h)
        hdu.scale("int16", bscale=1e-4, bzero=1.0)
        hdu.writeto(path)
        ref = fits.getdata(path)
    else:
        fits.HDUList([fits.PrimaryHDU(), fits.CompImageHDU(data.astype(np.float32), h,
                                                           quantize_level=0.0)]).writeto(path)
        ref = fits.getdata(path, ext=1)
    with pytest.warns(KinemapWarning, match="cannot be memory-mapped"):
        cube = read_cube(path)
    assert (cube.source is None) == (kind == "compressed")
    # astropy scales into float32; kinemap into float64, hence the absolute tolerance
    np.testing.assert_allclose(read_rows(cube, slice(2, 7)), ref[:, 2:7, :], rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(np.asarray(cube.data[:, 3:5, :]), ref[:, 3:5, :], rtol=1e-6, atol=1e-6)


def test_beam_area_matches_radio_beam(tmp_path):
    """Gaussian beam solid angle pi/(4 ln 2) major minor, against radio-beam (reference)."""
    from radio_beam import Beam as RBeam

    from kinemap.io.beams import Beam

    h = make_header("VRAD", crval=-100, cdelt=5, cunit="km/s",
                    extra={"BMAJ": 16 / 3600, "BMIN": 12 / 3600, "BPA": 30.0})
    ours = Beam.from_header(h)
    ref = RBeam.from_fits_header(h)
    assert ours.sr.to_value(u.sr) == pytest.approx(ref.sr.to_value(u.sr), rel=1e-12)
    assert ours.pa.to_value(u.deg) == pytest.approx(ref.pa.to_value(u.deg))
