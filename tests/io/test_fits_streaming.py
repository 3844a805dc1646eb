"""FITS products written a band at a time (kinemap.io.fitsmaps.write_fits), checked by
astropy (reference library): its reader gives the same values, its checksum verification
accepts CHECKSUM and DATASUM (the FITS checksum convention), and the header cards are the
ones astropy's own writer makes."""
import warnings

import numpy as np
import pytest
from astropy.io import fits

from kinemap.io.fitsmaps import write_fits
from kinemap.parallel import store


def _header():
    h = fits.Header()
    h["CTYPE1"], h["CTYPE2"], h["BUNIT"] = "RA---SIN", "DEC--SIN", "K km s-1"
    h.add_history("options {}")
    return h


@pytest.mark.parametrize("dtype", [np.float64, np.float32, ">f8", np.int16, np.int32,
                                   np.int64, np.uint8, bool, np.uint16])
@pytest.mark.parametrize("shape", [(1, 1), (7, 5), (3, 4, 5), (129, 67)])
def test_values_and_checksums_as_astropy_reads_them(tmp_path, monkeypatch, dtype, shape):
    monkeypatch.setattr(store, "CHUNK_BYTES", 100)  # many bands, words split across them
    rng = np.random.default_rng(len(shape) + shape[0])
    a = (rng.normal(size=shape) * 1000).astype(dtype)
    if a.dtype.kind == "f":
        a.flat[::7] = np.nan
    path = tmp_path / "m.fits"
    write_fits(path, a, _header())
    fits.PrimaryHDU(data=a.astype(np.uint8) if a.dtype == bool else a,
                    header=_header()).writeto(tmp_path / "ref.fits", checksum=True)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # astropy warns on a checksum that does not verify
        with fits.open(path, checksum=True) as ours, fits.open(tmp_path / "ref.fits") as ref:
            assert ours[0].verify_checksum() == 1 and ours[0].verify_datasum() == 1
            assert ours[0].header["DATASUM"] == ref[0].header["DATASUM"]
            assert list(ours[0].header) == list(ref[0].header)
            assert ours[0].data.dtype == ref[0].data.dtype
            np.testing.assert_array_equal(ours[0].data, ref[0].data)
    assert path.stat().st_size == (tmp_path / "ref.fits").stat().st_size


def test_a_map_on_disk_is_written_as_the_same_map_in_memory(tmp_path, monkeypatch):
    monkeypatch.setattr(store, "CHUNK_BYTES", 4096)
    a = np.random.default_rng(3).normal(size=(300, 200))
    disk = store.allocate({"m": ((), np.float64, np.nan)}, a.shape, max_memory=0)["m"]
    for ys, band in store.row_chunks(disk):
        band[...] = a[ys]
    write_fits(tmp_path / "disk.fits", disk, _header())
    write_fits(tmp_path / "mem.fits", a, _header())
    d1, d2 = fits.getdata(tmp_path / "disk.fits"), fits.getdata(tmp_path / "mem.fits")
    np.testing.assert_array_equal(d1, d2)
    assert (fits.getheader(tmp_path / "disk.fits")["DATASUM"]
            == fits.getheader(tmp_path / "mem.fits")["DATASUM"])
