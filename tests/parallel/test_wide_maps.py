"""A cube with wide planes and few channels under a small --max-memory: its maps are kept
on disk (kinemap.parallel.store) and written band by band; the products must be the
in-memory run's, and moment 0/1 spectral-cube's (reference library)."""
import json
import os
import warnings

import astropy.units as u
import numpy as np
from astropy.io import fits

from conftest import gaussian_cube, make_header, run_cli, write_cube


def test_maps_on_disk_equal_maps_in_memory_and_spectral_cube(tmp_path):
    nchan, ny, nx = 12, 90, 140
    data = gaussian_cube(nchan, ny, nx, centre_chan=5.0 + np.linspace(0, 2, nx)[None, :],
                         sigma_chan=1.6, amp=2.0, noise=0.05, seed=7)
    h = make_header("VRAD", nchan=nchan, ny=ny, nx=nx, crval=-10e3, cdelt=2e3, cunit="m/s")
    cube = write_cube(tmp_path / "wide.fits", data, h)
    runs = {}
    # 11 float64 maps of 90 x 140 are 1.1 MB: beyond a quarter of 400 KB, not of 1 GB
    for name, memory in (("disk", "400KB"), ("memory", "1GB")):
        out = tmp_path / name
        code, _, err = run_cli("maps", str(cube), "--method", "moments", "--no-mask",
                               "--continuum", "none", "--max-memory", memory,
                               "--out", str(out))
        assert code == 0, err
        runs[name] = out
    for name, disk in (("disk", True), ("memory", False)):
        manifest = json.loads((runs[name] / "manifest.json").read_text())
        assert manifest["execution"]["maps_on_disk"] is disk
    names = sorted(os.listdir(runs["memory"]))
    assert sorted(os.listdir(runs["disk"])) == names  # no scratch file left in the folder
    assert not [p for p in os.listdir(tmp_path) if "staging" in p]
    for f in names:
        if f.endswith(".fits"):
            a, b = fits.getdata(runs["disk"] / f), fits.getdata(runs["memory"] / f)
            np.testing.assert_array_equal(a, b, err_msg=f)
    from spectral_cube import SpectralCube

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        sc = SpectralCube.read(cube).with_spectral_unit(u.km / u.s)
        m0, m1 = sc.moment0().value, sc.moment1().value
    np.testing.assert_allclose(fits.getdata(runs["disk"] / "moment0.fits"), m0, rtol=1e-6)
    np.testing.assert_allclose(fits.getdata(runs["disk"] / "moment1.fits"), m1, rtol=1e-6,
                               atol=1e-9)
