"""An invented thin rotating disk with known dispersion, for the stacking tests.

Every pixel holds one Gaussian line (sigma = ``dispersion``) centred on the tilted-ring
line-of-sight velocity at the pixel centre (Begeman 1989, A&A 223, 47:
v = v_sys + v_rot cos(theta) sin(i)), integrated over each channel (top-hat channel
response), plus white Gaussian noise; no beam, so the pixels are independent.
"""
from __future__ import annotations

import numpy as np
from astropy.io import fits
from scipy.special import erf

from conftest import make_header

PIX_ARCSEC = 7.2  # CDELT of make_header: 2e-3 deg


def disk_cube(path, *, seed=0, ny=40, nx=40, nchan=120, dv=4.0, dispersion=12.0,
              position_angle=60.0, inclination=50.0, v_flat=150.0, r_turn=40.0,
              peak=3.0, r_scale=120.0, noise=1.0):
    """Write the disk to ``path``; returns (velocity map km/s, truth dict)."""
    rng = np.random.default_rng(seed)
    h = make_header("VRAD", nchan=nchan, ny=ny, nx=nx, crval=-(nchan - 1) / 2 * dv * 1e3,
                    cdelt=dv * 1e3, cunit="m/s")
    x0, y0 = h["CRPIX1"] - 1.0, h["CRPIX2"] - 1.0
    yy, xx = np.mgrid[0:ny, 0:nx]
    east, north = -(xx - x0) * PIX_ARCSEC, (yy - y0) * PIX_ARCSEC
    pa, inc = np.deg2rad(position_angle), np.deg2rad(inclination)
    xd = east * np.sin(pa) + north * np.cos(pa)
    yd = (east * np.cos(pa) - north * np.sin(pa)) / np.cos(inc)
    r = np.hypot(xd, yd)
    cos_t = np.where(r > 0, xd / np.maximum(r, 1e-9), 0.0)
    vel = v_flat * (1 - np.exp(-r / r_turn)) * cos_t * np.sin(inc)
    amp = peak * np.exp(-r / r_scale)
    v = (np.arange(nchan) - (nchan - 1) / 2) * dv
    lo = (v[:, None, None] - dv / 2 - vel[None]) / (np.sqrt(2) * dispersion)
    hi = (v[:, None, None] + dv / 2 - vel[None]) / (np.sqrt(2) * dispersion)
    # a channel records the mean of the line over its width (the Gaussian integral)
    line = amp * dispersion * np.sqrt(np.pi / 2) * (erf(hi) - erf(lo)) / dv
    data = line + rng.normal(0.0, noise, line.shape)
    fits.PrimaryHDU(data.astype(np.float32), h).writeto(path, overwrite=True)
    truth = dict(x0=x0, y0=y0, position_angle=position_angle, inclination=inclination,
                 dispersion=dispersion, radius=r, noise=noise, amplitude=amp)
    return vel, truth


def write_map(path, data, cube_path):
    """A 2D FITS map on the cube's sky grid."""
    h = fits.getheader(cube_path)
    m = fits.Header()
    for k in ("CTYPE1", "CRVAL1", "CDELT1", "CRPIX1", "CUNIT1", "CTYPE2", "CRVAL2", "CDELT2",
              "CRPIX2", "CUNIT2"):
        m[k] = h[k]
    m["BUNIT"] = "km/s"
    fits.PrimaryHDU(np.asarray(data, np.float32), m).writeto(path, overwrite=True)
    return str(path)
