"""Shared test helpers: small synthetic cubes with chosen spectral axes.

The synthetic cubes carry known truth; the checks against outside references (astropy's
equivalencies, spectral-cube's moments, the real cube in ../shared/data) are named in the
tests themselves.
"""
from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits

def _real_cube() -> Path:
    """The shared real cube: $KINEMAP_TEST_DATA, else ../shared/data next to the checkout."""
    name = "l1448_13co.fits"
    candidates = []
    if os.environ.get("KINEMAP_TEST_DATA"):
        candidates.append(Path(os.environ["KINEMAP_TEST_DATA"]) / name)
    candidates.append(Path(__file__).resolve().parents[1].parent / "shared" / "data" / name)
    for path in candidates:
        if path.exists():
            return path
    return candidates[0]


REAL_CUBE = _real_cube()


@pytest.fixture
def real_cube_path():
    if not REAL_CUBE.exists():
        pytest.skip(f"real cube not found at {REAL_CUBE} (the shared data folder is absent)")
    return str(REAL_CUBE)


def make_header(ctype="FREQ", *, nchan=40, ny=12, nx=10, crval=1.4200e9, cdelt=-2.0e4,
                cunit="Hz", extra=None, stokes=False):
    """A (x, y, spectral[, stokes]) header with RA---SIN/DEC--SIN celestial axes."""
    h = fits.Header()
    h["SIMPLE"] = True
    h["BITPIX"] = -32
    h["NAXIS"] = 4 if stokes else 3
    h["NAXIS1"], h["NAXIS2"], h["NAXIS3"] = nx, ny, nchan
    if stokes:
        h["NAXIS4"] = 1
    h["CTYPE1"], h["CRVAL1"], h["CDELT1"], h["CRPIX1"], h["CUNIT1"] = "RA---SIN", 150.0, -2e-3, nx / 2, "deg"
    h["CTYPE2"], h["CRVAL2"], h["CDELT2"], h["CRPIX2"], h["CUNIT2"] = "DEC--SIN", 20.0, 2e-3, ny / 2, "deg"
    h["CTYPE3"], h["CRVAL3"], h["CDELT3"], h["CRPIX3"], h["CUNIT3"] = ctype, crval, cdelt, 1.0, cunit
    if stokes:
        h["CTYPE4"], h["CRVAL4"], h["CDELT4"], h["CRPIX4"] = "STOKES", 1.0, 1.0, 1.0
    h["BUNIT"] = "K"
    for k, v in (extra or {}).items():
        h[k] = v
    return h


def write_cube(path, data, header):
    fits.PrimaryHDU(data=np.asarray(data, dtype=np.float32), header=header).writeto(path, overwrite=True)
    return str(path)


def gaussian_cube(nchan, ny, nx, *, centre_chan, sigma_chan, amp=1.0, noise=0.0, seed=0):
    rng = np.random.default_rng(seed)
    ch = np.arange(nchan)[:, None, None]
    c = np.broadcast_to(np.asarray(centre_chan, dtype=float), (ny, nx))[None]
    cube = amp * np.exp(-0.5 * ((ch - c) / sigma_chan) ** 2)
    if noise:
        cube = cube + rng.normal(0.0, noise, cube.shape)
    return cube


@pytest.fixture
def tmp_cube(tmp_path):
    """Factory: tmp_cube(ctype=..., data=None, **header_kw) -> path of a written cube."""
    def factory(ctype="FREQ", *, data=None, name="cube.fits", **kw):
        h = make_header(ctype, **kw)
        nchan, ny, nx = h["NAXIS3"], h["NAXIS2"], h["NAXIS1"]
        if data is None:
            data = gaussian_cube(nchan, ny, nx, centre_chan=nchan / 2, sigma_chan=3.0, noise=0.05)
        if h["NAXIS"] == 4:
            data = np.asarray(data)[None]
        return write_cube(tmp_path / name, data, h)
    return factory


def pytest_configure(config):
    os.environ.setdefault("MPLBACKEND", "Agg")


def run_cli(*args, timeout=300):
    """Run the installed console script in a subprocess: (exit code, stdout, stderr) as users
    see them (a bad input must give one line on stderr and exit code 2, no traceback)."""
    exe = os.path.join(os.path.dirname(sys.executable), "kinemap")
    p = subprocess.run([exe, *args], capture_output=True, text=True, timeout=timeout)
    return p.returncode, p.stdout, p.stderr


C_KMS = 299792.458
# air wavelengths (NIST ASD; from memory), as in the catalogue
HALPHA_AIR, NII_6583_AIR, NII_6548_AIR = 6562.80, 6583.45, 6548.05


def optical_cube(path, *, seed=1, ny=6, nx=6, nchan=120, level=6.0, slope=2.0, noise=1.0,
                 v=20.0, sigma=25.0, amp=10.0, restwav=None, ctype="AWAV"):
    """An H-alpha + [N II] cube on an air-wavelength axis with a sloped continuum (in units
    of the noise) and, by default, no RESTWAV.  Returns (lambda in Angstrom, truth dict)."""
    rng = np.random.default_rng(seed)
    crval, cdelt = 6540.0, 0.4
    extra = {} if restwav is None else {"RESTWAV": restwav}
    h = make_header(ctype, nchan=nchan, ny=ny, nx=nx, crval=crval * 1e-10, cdelt=cdelt * 1e-10,
                    cunit="m", extra=extra)
    lam = crval + cdelt * np.arange(nchan)

    def gauss(l0, s_kms, a):
        mu, s = l0 * (1 + v / C_KMS), l0 * s_kms / C_KMS
        return a * np.exp(-0.5 * ((lam - mu) / s) ** 2)

    lines = gauss(HALPHA_AIR, sigma, amp) + gauss(NII_6583_AIR, 15, 4) + gauss(NII_6548_AIR, 15, 4 / 3)
    x = (lam - lam.mean()) / (np.ptp(lam) / 2)
    cont = level + slope * x
    data = (lines + cont)[:, None, None] + rng.normal(0, noise, (nchan, ny, nx))
    fits.writeto(path, data.astype(np.float32), h, overwrite=True)
    lam_ha = HALPHA_AIR * (1 + v / C_KMS)
    truth = dict(level_at_halpha=level + slope * (lam_ha - lam.mean()) / (np.ptp(lam) / 2),
                 flux=amp * np.sqrt(2 * np.pi) * sigma, v=v, sigma=sigma)
    return lam, truth
