"""Seeded synthetic cubes for the benchmarks (invented data, written plane by plane), and
the load line every timing is printed with."""
from __future__ import annotations

import os

import numpy as np
from astropy.io import fits


def load() -> str:
    """The 1-minute, 5-minute and 15-minute load averages (the machine may be shared)."""
    return "load " + " ".join(f"{x:.2f}" for x in os.getloadavg())


def write_line_cube(path, *, nx=512, ny=512, nchan=256, seed=1, dtype=np.float32):
    """A rotating-disk-like velocity field with one Gaussian line per pixel plus noise.

    Written with a pre-sized file and plane-by-plane writes so memory stays small.
    """
    rng = np.random.default_rng(seed)
    h = _header(nx, ny, nchan)
    yy, xx = np.mgrid[:ny, :nx]
    vel, amp = _disk(xx, yy, nx, ny)
    sigma = 12.0
    v = -320.0 + 2.5 * np.arange(nchan)
    # The header as it is: a PrimaryHDU without data would reset NAXIS to 0.
    header_bytes = h.tostring(padding=True).encode("ascii")
    with open(path, "wb") as fh:
        fh.write(header_bytes)
        for k in range(nchan):
            plane = amp * np.exp(-0.5 * ((v[k] - vel) / sigma) ** 2)
            plane = plane + rng.normal(0.0, 0.1, plane.shape)
            fh.write(plane.astype(">f4").tobytes())
        pad = (-fh.tell()) % 2880
        fh.write(b"\0" * pad)
    return {"velocity": vel, "sigma": sigma, "amplitude": amp}


def _header(nx, ny, nchan):
    h = fits.Header()
    h["SIMPLE"], h["BITPIX"], h["NAXIS"] = True, -32, 3
    h["NAXIS1"], h["NAXIS2"], h["NAXIS3"] = nx, ny, nchan
    h["CTYPE1"], h["CRVAL1"], h["CDELT1"], h["CRPIX1"], h["CUNIT1"] = "RA---SIN", 180.0, -1e-3, nx / 2, "deg"
    h["CTYPE2"], h["CRVAL2"], h["CDELT2"], h["CRPIX2"], h["CUNIT2"] = "DEC--SIN", 10.0, 1e-3, ny / 2, "deg"
    h["CTYPE3"], h["CRVAL3"], h["CDELT3"], h["CRPIX3"], h["CUNIT3"] = "VRAD", -320.0, 2.5, 1.0, "km/s"
    h["BUNIT"], h["SPECSYS"] = "K", "LSRK"
    h["BMAJ"] = h["BMIN"] = 3e-3
    h["BPA"] = 0.0
    return h


def _disk(xx, yy, nx, ny):
    r = np.hypot(xx - nx / 2, yy - ny / 2) + 1e-3
    return 200.0 * np.tanh(r / 40.0) * (xx - nx / 2) / r * 0.7, 2.0 * np.exp(-r / 150.0)


def write_wide_cube(path, *, nx, ny, nchan, seed=1, band=512):
    """The disk of :func:`write_line_cube` on a plane of any size, written a band of rows
    at a time (memory: a few bands, whatever the plane)."""
    rng = np.random.default_rng(seed)
    h = _header(nx, ny, nchan)
    header_bytes = h.tostring(padding=True).encode("ascii")
    v = -320.0 + 2.5 * np.arange(nchan)
    with open(path, "wb") as fh:
        fh.write(header_bytes)
        for k in range(nchan):
            for y0 in range(0, ny, band):
                yy, xx = np.mgrid[y0:min(ny, y0 + band), :nx]
                vel, amp = _disk(xx, yy, nx, ny)
                plane = amp * np.exp(-0.5 * ((v[k] - vel) / 12.0) ** 2)
                plane += rng.normal(0.0, 0.1, plane.shape)
                fh.write(plane.astype(">f4").tobytes())
        fh.write(b"\0" * ((-fh.tell()) % 2880))
