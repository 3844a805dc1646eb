"""An independent mock disk cube for the 3D ring tests (invented, seeded).

Written separately from kinemap's model: the sky is sampled on a sub-pixel grid (the
line-of-sight integral of a thin disk), each element's Gaussian line is integrated over
the channel with scipy.special.ndtr, each channel is convolved with the beam by
scipy.ndimage.gaussian_filter, and beam-correlated noise is added.
"""
from __future__ import annotations

import numpy as np
from astropy.io import fits
from scipy.ndimage import gaussian_filter
from scipy.special import ndtr

FWHM = 2.3548200450309493


def mock_disk(*, n=48, pix=4.0, nchan=60, dv=5.0, vsys=30.0, pa=60.0, inc=55.0,
              vrot=lambda r: 120 * (1 - np.exp(-r / 20.0)), disp=lambda r: 10.0 + 0 * r,
              sigma=lambda r: np.exp(-r / 30.0), r_max=70.0, beam=16.0, noise=0.01, seed=1,
              sub=5, center=(23.3, 24.6)):
    """A (HDU, truth) pair: face-on Sigma(R), rotation vrot(R), dispersion disp(R) (km/s);
    radii in arcsec; a circular beam of FWHM ``beam`` arcsec; peak face-on Sigma 1."""
    off = (np.arange(sub) + 0.5) / sub - 0.5
    yy, xx = np.mgrid[0:n, 0:n]
    x = (xx[..., None, None] + off[None, None, None, :] + 0 * off[:, None]).reshape(n, n, -1)
    y = (yy[..., None, None] + off[None, None, :, None] + 0 * off[None, :]).reshape(n, n, -1)
    east, north = -(x - center[0]) * pix, (y - center[1]) * pix
    p, i = np.deg2rad(pa), np.deg2rad(inc)
    xd = east * np.sin(p) + north * np.cos(p)
    yd = (east * np.cos(p) - north * np.sin(p)) / np.cos(i)
    r = np.hypot(xd, yd)
    ct = xd / np.maximum(r, 1e-9)
    vlos = vsys + np.sin(i) * vrot(r) * ct
    flux = np.where(r < r_max, sigma(r), 0.0) / np.cos(i) / sub**2  # moment 0 per element
    s = disp(r)
    v = vsys + (np.arange(nchan) - nchan / 2) * dv
    cube = np.empty((nchan, n, n))
    for c in range(nchan):
        frac = ndtr((v[c] + dv / 2 - vlos) / s) - ndtr((v[c] - dv / 2 - vlos) / s)
        cube[c] = (flux * frac).sum(axis=-1) / dv
    sb = beam / FWHM / pix
    cube = np.stack([gaussian_filter(ch, sb, mode="constant", truncate=5) for ch in cube])
    rng = np.random.default_rng(seed)
    if noise:
        white = rng.standard_normal(cube.shape)
        # smoothed by beam / sqrt(2): the noise is then correlated like the beam
        corr = np.stack([gaussian_filter(ch, sb / np.sqrt(2), mode="wrap") for ch in white])
        cube = cube + corr / corr.std() * noise
    h = fits.Header()
    h["CTYPE1"], h["CRVAL1"], h["CDELT1"], h["CRPIX1"], h["CUNIT1"] = "RA---SIN", 150.0, -pix / 3600, n / 2, "deg"
    h["CTYPE2"], h["CRVAL2"], h["CDELT2"], h["CRPIX2"], h["CUNIT2"] = "DEC--SIN", 20.0, pix / 3600, n / 2, "deg"
    h["CTYPE3"], h["CRVAL3"], h["CDELT3"], h["CRPIX3"], h["CUNIT3"] = "VRAD", v[0] * 1e3, dv * 1e3, 1.0, "m/s"
    h["BMAJ"] = h["BMIN"] = beam / 3600
    h["BPA"] = 0.0
    h["BUNIT"] = "Jy/beam"
    h["SPECSYS"] = "BARYCENT"
    truth = dict(vsys=vsys, pa=pa, inc=inc, vrot=vrot, disp=disp, sigma=sigma, center=center)
    return fits.PrimaryHDU(cube.astype(np.float32), h), truth
