"""`pv_diagram` and `kinemap pv`: against direct sampling with scipy's map_coordinates at
positions from astropy, the FITS axes, the ring model through the centre, bad input."""
import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import SkyCoord
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS
from scipy import ndimage

from conftest import make_header, run_cli, write_cube
from kinemap import KinemapError, pv_diagram, read_cube

PIX_ARCSEC = 7.2  # make_header's 2e-3 deg pixels


@pytest.fixture
def cube_path(tmp_path):
    rng = np.random.default_rng(8)
    data = rng.normal(0, 1, (16, 40, 44))
    h = make_header("VRAD", nchan=16, ny=40, nx=44, crval=-30e3, cdelt=4e3, cunit="m/s",
                    extra={"BUNIT": "Jy/beam", "BMAJ": 4 * 2e-3, "BMIN": 2 * 2e-3, "BPA": 30.0})
    return write_cube(tmp_path / "c.fits", data, h)


def test_straight_cut_equals_map_coordinates_along_the_same_path(cube_path):
    """Sky positions every pixel-size step from astropy's directional_offset_by (reference
    library), to pixels with astropy's WCS, sampled with scipy.ndimage.map_coordinates
    (order 1, reference library): the diagram must equal those samples."""
    cube = read_cube(cube_path)
    w = WCS(fits.getheader(cube_path)).celestial
    centre = w.pixel_to_world(21.3, 19.6)
    pa, length = 62.0, 180.0
    pv = pv_diagram(cube, center=centre, position_angle=pa, length=length)
    assert pv.offset[0] < 0 < pv.offset[-1] and 0.0 in pv.offset
    sky = centre.directional_offset_by(pa * u.deg, pv.offset * u.arcsec)
    x, y = w.world_to_pixel(sky)
    data = fits.getdata(cube_path).astype(float)
    ref = np.array([ndimage.map_coordinates(data[c], [y, x], order=1, cval=np.nan,
                                            prefilter=False) for c in range(data.shape[0])])
    np.testing.assert_allclose(pv.data, ref, atol=2e-3, rtol=0)  # 1e-3 pixel of position


def test_polyline_offsets_and_a_linear_field(tmp_path):
    """On a cube whose values are a plane in x and y, bilinear sampling is exact, so the
    diagram is the plane at each sample's pixel position; offsets run from 0 at the first
    point and the vertex sits at the first segment's sky length (astropy separation)."""
    ny, nx = 30, 30
    yy, xx = np.indices((ny, nx), dtype=float)
    plane = 0.5 + 0.1 * xx - 0.03 * yy
    data = np.repeat(plane[None], 6, axis=0)
    h = make_header("VRAD", nchan=6, ny=ny, nx=nx, crval=0.0, cdelt=5e3, cunit="m/s")
    path = write_cube(tmp_path / "p.fits", data, h)
    w = WCS(h).celestial
    pts = w.pixel_to_world([3, 20, 25], [4, 6, 22])
    text = ";".join(f"{p.ra.deg},{p.dec.deg}" for p in pts)
    pv = pv_diagram(read_cube(path), path=text)
    assert pv.offset[0] == 0.0
    np.testing.assert_allclose(pv.data[0], 0.5 + 0.1 * pv.x - 0.03 * pv.y, atol=1e-5)
    first = pts[0].separation(pts[1]).to_value(u.arcsec)
    k = np.argmin(np.abs(pv.offset - first))
    if abs(pv.offset[k] - first) < 1e-6:  # a sample right on the vertex
        assert (pv.x[k], pv.y[k]) == pytest.approx((20, 6), abs=1e-3)
    total = first + pts[1].separation(pts[2]).to_value(u.arcsec)
    assert pv.offset[-1] <= total < pv.offset[-1] + PIX_ARCSEC


def test_width_averages_parallel_lines(cube_path):
    """A cut along a pixel row, 3 pixels wide: the mean of the three rows (numpy)."""
    cube = read_cube(cube_path)
    w = cube.meta.wcs
    a, b = w.pixel_to_world(5, 20), w.pixel_to_world(35, 20)
    pv = pv_diagram(cube, path=f"{a.ra.deg},{a.dec.deg};{b.ra.deg},{b.dec.deg}",
                    width=3 * PIX_ARCSEC)
    data = fits.getdata(cube_path).astype(float)
    ref = data[:, 19:22, 5:36].mean(axis=1)
    n = min(ref.shape[1], pv.data.shape[1])
    np.testing.assert_allclose(pv.data[:, :n], ref[:, :n], atol=2e-3)


def test_fits_axes_and_png(cube_path, tmp_path):
    out = tmp_path / "o"
    code, stdout, err = run_cli("pv", cube_path, "--center", "150.0,20.0", "--pa", "30",
                                "--length", "150", "--out", str(out), "--no-progress")
    assert code == 0, err
    h = fits.getheader(out / "pv.fits")
    assert h["CTYPE1"] == "OFFSET" and h["CUNIT1"].strip() == "arcsec"
    assert h["CUNIT2"].strip() == "km/s" and h["CTYPE2"] == "VRAD"
    w = WCS(h)
    off, vel = w.pixel_to_world_values(np.arange(h["NAXIS1"]), np.zeros(h["NAXIS1"]))
    assert np.min(np.abs(off)) < 1e-9  # offset 0 at the centre
    assert vel[0] == pytest.approx(-30e3)  # astropy's WCS reads velocities in m/s
    assert (out / "pv.png").exists() and not (out / "moment0.fits").exists()


class _SolidBody:
    """A ring model stand-in: v = v_sys + k * (x - 20) (km/s per pixel)."""

    model_note = "test model"

    def model_velocity_at(self, x, y):
        return 5.0 + 3.0 * (np.asarray(x) - 20.0)

    def systemic_velocity(self):
        return 5.0


def test_ring_model_is_sampled_at_the_cut(cube_path):
    cube = read_cube(cube_path)
    pv = pv_diagram(cube, center=cube.meta.wcs.pixel_to_world(20, 20), position_angle=90,
                    length=100, rings=_SolidBody())
    np.testing.assert_allclose(pv.model_velocity, 5.0 + 3.0 * (pv.x - 20.0))
    assert pv.v_sys == 5.0


def test_ring_table_model_passes_v_sys_smoothly(tmp_path):
    """A rotation_curve.ecsv with a failed inner ring: along the major axis the model is
    the tilted-ring formula (Begeman 1989, A&A 223, 47) v_sys + v_rot(R) sin i, v_rot
    linear inside the first valid ring, so it is continuous and crosses v_sys at the centre
    (no gap, no jump)."""
    from kinemap.rings.model import RingModel

    h = make_header("VRAD", nchan=4, ny=41, nx=41, crval=0.0, cdelt=5e3, cunit="m/s")
    w = WCS(h).celestial
    radius = np.array([7.2, 21.6, 36.0, 50.4])
    vrot = np.array([np.nan, 100.0, 140.0, 150.0])
    n = radius.size
    t = Table({"radius": radius * u.arcsec, "v_rot": vrot * u.km / u.s,
               "v_exp": np.zeros(n) * u.km / u.s, "position_angle": np.full(n, 90.0) * u.deg,
               "inclination": np.full(n, 60.0) * u.deg, "v_sys": np.full(n, 1000.0) * u.km / u.s,
               "x_center": np.full(n, 20.0) * u.pix, "y_center": np.full(n, 20.0) * u.pix})
    t.meta["ring_width"] = 14.4
    t.write(tmp_path / "rc.ecsv", format="ascii.ecsv")
    model = RingModel(Table.read(tmp_path / "rc.ecsv"), w)
    # PA 90: the receding side is east, to the left (x decreasing)
    x = 20.0 - np.linspace(-40, 40, 161) / PIX_ARCSEC
    v = model.model_velocity_at(x, np.full_like(x, 20.0))
    off = (20.0 - x) * PIX_ARCSEC
    sini = np.sin(np.radians(60.0))
    inner = np.abs(off) <= 21.6
    np.testing.assert_allclose(v[inner], 1000.0 + 100.0 * off[inner] / 21.6 * sini, atol=0.3)
    assert np.all(np.isfinite(v)) and np.max(np.abs(np.diff(v))) < 3.0  # no jump
    mid = np.argmin(np.abs(off))
    assert v[mid] == pytest.approx(1000.0, abs=1e-6)


@pytest.mark.parametrize("args, match", [
    ([], "give the cut as one of"),
    (["--center", "150,20", "--pa", "30"], "needs --position-angle"),
    (["--center", "150,20", "--pa", "30", "--length", "2000"], "shorten --length"),
    (["--path", "150,20;152,20"], "lies off the map"),
    (["--path", "150,20"], "at least two positions"),
    (["--path", "150,20;150.01,20", "--center", "150,20"], "got --path and --center"),
    (["--path", "150,20;150.01,20", "--rings", "missing.ecsv"], "ring table not found"),
])
def test_bad_input_is_one_line(cube_path, tmp_path, args, match):
    out = tmp_path / "o"
    code, stdout, err = run_cli("pv", cube_path, *args, "--out", str(out), "--no-progress")
    assert code == 2, err
    assert match in err and err.count("\n") == 1 and "Traceback" not in err
    assert not out.exists()


def test_region_line(cube_path, tmp_path):
    """A DS9 line written by the regions package (reference library) is the cut."""
    from regions import LineSkyRegion, Regions

    cube = read_cube(cube_path)
    a, b = cube.meta.wcs.pixel_to_world(5, 10), cube.meta.wcs.pixel_to_world(30, 25)
    Regions([LineSkyRegion(SkyCoord(a.ra, a.dec), SkyCoord(b.ra, b.dec))]).write(
        str(tmp_path / "l.reg"), format="ds9")
    pv = pv_diagram(cube, region=str(tmp_path / "l.reg"))
    ref = pv_diagram(cube, path=f"{a.ra.deg},{a.dec.deg};{b.ra.deg},{b.dec.deg}")
    np.testing.assert_allclose(pv.data, ref.data, atol=1e-4)


def test_real_cube_cut(real_cube_path, tmp_path):
    """The real cube: a cut through the map centre equals map_coordinates at astropy's
    positions (reference libraries), as on the synthetic cube."""
    cube = read_cube(real_cube_path)
    ny, nx = cube.shape[1:]
    w = WCS(fits.getheader(real_cube_path)).celestial
    centre = w.pixel_to_world(nx / 2, ny / 2)
    pv = pv_diagram(cube, center=centre, position_angle=45.0, length=300.0)
    sky = centre.directional_offset_by(45 * u.deg, pv.offset * u.arcsec)
    x, y = w.world_to_pixel(sky)
    data = np.asarray(cube.data, float)
    ref = np.array([ndimage.map_coordinates(data[c], [y, x], order=1, cval=np.nan,
                                            prefilter=False) for c in range(data.shape[0])])
    ok = np.isfinite(ref)
    np.testing.assert_allclose(pv.data[ok], ref[ok], atol=1e-2 * np.nanstd(ref))


def test_two_joined_lines_make_a_polyline_and_loose_ones_are_refused(cube_path, tmp_path):
    """Two DS9 lines (regions package, reference library) joined end to start are one cut
    through three points; lines that do not join give one clear error."""
    from regions import LineSkyRegion, Regions

    cube = read_cube(cube_path)
    w = cube.meta.wcs
    a, b, c = (w.pixel_to_world(x, y) for x, y in ((5, 10), (20, 12), (30, 30)))
    sky = [SkyCoord(p.ra, p.dec) for p in (a, b, c)]
    Regions([LineSkyRegion(sky[0], sky[1]), LineSkyRegion(sky[1], sky[2])]).write(
        str(tmp_path / "two.reg"), format="ds9")
    pv = pv_diagram(cube, region=str(tmp_path / "two.reg"))
    ref = pv_diagram(cube, path=[a, b, c])
    np.testing.assert_allclose(pv.data, ref.data, atol=1e-4)
    assert len(pv.vertices) == 3
    Regions([LineSkyRegion(sky[0], sky[1]), LineSkyRegion(sky[2], sky[1])]).write(
        str(tmp_path / "loose.reg"), format="ds9", overwrite=True)
    with pytest.raises(KinemapError, match="do not join end to start"):
        pv_diagram(cube, region=str(tmp_path / "loose.reg"))


def test_sexagesimal_and_degrees_give_the_same_cut(cube_path):
    """'RA,DEC' in sexagesimal and in degrees (astropy's Angle formatting, reference
    library) name the same position."""
    cube = read_cube(cube_path)
    p = cube.meta.wcs.pixel_to_world(22, 18)
    sexa = f"{p.ra.to_string(unit=u.hourangle, precision=4)},{p.dec.to_string(precision=3)}"
    one = pv_diagram(cube, center=sexa, position_angle=10, length=100)
    two = pv_diagram(cube, center=f"{p.ra.deg},{p.dec.deg}", position_angle=10, length=100)
    np.testing.assert_allclose(one.data, two.data, atol=1e-3)
