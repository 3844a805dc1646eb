"""Region files: include regions cut the map, exclusion regions (DS9 `-circle(...)`, CRTF
`-circle[...]`) cut holes; files written by the regions package (reference library) and a
hand-written DS9 file read the same."""
from __future__ import annotations

import warnings

import astropy.units as u
import numpy as np
import pytest
import regions
from astropy.coordinates import SkyCoord
from astropy.wcs import WCS

import kinemap
from conftest import make_header, write_cube
from kinemap.errors import KinemapError


def _cube(tmp_path):
    h = make_header("VRAD", nchan=8, ny=24, nx=24, crval=-20.0, cdelt=5.0, cunit="km/s")
    return write_cube(tmp_path / "c.fits", np.ones((8, 24, 24)), h), WCS(h).celestial


def _read(path, region):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return kinemap.read_cube(path, region=str(region))


def _expected(wcs, shape, centre, r_in, r_out):
    """Pixels whose centres lie between r_in and r_out arcsec of ``centre`` (the geometry
    the region file describes), from astropy's own sky separations."""
    yy, xx = np.mgrid[:shape[0], :shape[1]]
    sep = wcs.pixel_to_world(xx, yy).separation(centre).to_value(u.arcsec)
    return (sep <= r_out) & (sep > r_in)


@pytest.mark.parametrize("fmt", ["ds9", "crtf"])
def test_exclusion_region_cuts_a_hole(tmp_path, fmt):
    path, wcs = _cube(tmp_path)
    centre = wcs.pixel_to_world(11.0, 12.0)
    if fmt == "ds9":  # the regions package does not write DS9 exclusions: write it by hand
        reg = tmp_path / "r.reg"
        reg.write_text(f"# Region file format: DS9\nicrs\n"
                       f"circle({centre.ra.deg},{centre.dec.deg},40\")\n"
                       f"-circle({centre.ra.deg},{centre.dec.deg},15\")\n")
    else:
        inc = regions.CircleSkyRegion(centre, 40 * u.arcsec)
        exc = regions.CircleSkyRegion(centre, 15 * u.arcsec,
                                      meta=regions.RegionMeta({"include": False}))
        reg = tmp_path / "r.crtf"
        regions.Regions([inc, exc]).write(str(reg), format="crtf")
    cube = _read(path, reg)
    # the footprint lives on the cut-out box: put it back on the full grid
    full = np.zeros((24, 24), bool)
    ys, xs = cube.meta.subset["box_y"], cube.meta.subset["box_x"]
    full[ys[0]:ys[1], xs[0]:xs[1]] = cube.footprint
    expected = _expected(wcs, (24, 24), centre, 15.0, 40.0)
    # pixels whose centres sit within half a pixel of an edge may go either way
    yy, xx = np.mgrid[:24, :24]
    sep = wcs.pixel_to_world(xx, yy).separation(centre).to_value(u.arcsec)
    clear = (np.abs(sep - 15.0) > 4.0) & (np.abs(sep - 40.0) > 4.0)
    np.testing.assert_array_equal(full[clear], expected[clear])
    assert not full[12, 11] and full[12, 11 + 4]


def test_only_exclusions_keep_the_rest_of_the_map(tmp_path):
    path, wcs = _cube(tmp_path)
    centre = wcs.pixel_to_world(11.0, 12.0)
    reg = tmp_path / "r.reg"
    reg.write_text(f"# Region file format: DS9\nicrs\n"
                   f"-circle({centre.ra.deg},{centre.dec.deg},15\")\n")
    cube = _read(path, reg)
    assert cube.footprint.shape == (24, 24)
    assert not cube.footprint[12, 11] and cube.footprint[0, 0] and cube.footprint.mean() > 0.8


def test_regions_leaving_nothing_is_one_clear_error(tmp_path):
    path, wcs = _cube(tmp_path)
    far = SkyCoord(10.0, -40.0, unit="deg")
    reg = tmp_path / "r.reg"
    reg.write_text(f"# Region file format: DS9\nicrs\ncircle({far.ra.deg},{far.dec.deg},10\")\n")
    with pytest.raises(KinemapError, match="leave no pixel"):
        _read(path, reg)
