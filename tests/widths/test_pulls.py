"""Error calibration of the width budget: pulls of the temperature and the non-thermal
dispersion across resolving powers (instrument narrower than, comparable to and wider than
a channel).

Seeded synthetic truth: H-alpha + [N II] 6548/6583 on an air-wavelength axis, each line a
Gaussian of sigma^2 = kT/m + sigma_nt^2 (+ 10.233 km^2/s^2 fine structure for H-alpha,
Garcia-Diaz et al. 2008, RMxAA 44, 181; from memory) convolved with a Gaussian instrument
of FWHM c/R and integrated exactly over top-hat channels (error functions); kT/m with
astropy.constants.  The pull (estimate - truth) / error of a calibrated error has unit
standard deviation; the issue's bound is [0.85, 1.15].
"""
from __future__ import annotations

import numpy as np
import pytest
from astropy.constants import k_B, u as AMU
from scipy.special import erf

import kinemap
from conftest import make_header
from kinemap.status import Status

C_KMS = 299792.458
FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))
T_TRUE, SNT_TRUE = 8000.0, 10.0
CDELT_AA = 0.2  # channel: 9.14 km/s at H-alpha
# air wavelengths (NIST ASD; from memory), masses in amu (IUPAC; from memory)
LINES = ((6562.80, 1.008, 1.0, 10.233), (6583.45, 14.007, 0.4, 0.0),
         (6548.05, 14.007, 0.4 / 3.0, 0.0))


def _thermal(t, mass_amu):
    return np.sqrt(k_B.value * t / (mass_amu * AMU.value)) / 1e3


def _cube(resolving_power, *, seed, ny=20, nx=20, amp=200.0, noise=1.0):
    rng = np.random.default_rng(seed)
    crval, nchan = 6535.0, 300
    edges = crval - CDELT_AA / 2 + CDELT_AA * np.arange(nchan + 1)
    s_in = C_KMS / resolving_power / FWHM_PER_SIGMA
    v = rng.normal(0.0, 5.0, (ny, nx))
    data = np.zeros((nchan, ny, nx))
    for lam0, mass, rel, fs in LINES:
        s = np.sqrt(_thermal(T_TRUE, mass) ** 2 + SNT_TRUE ** 2 + fs + s_in ** 2)
        ve = C_KMS * (edges - lam0) / lam0  # optical velocity of the channel edges
        z = (ve[:, None, None] - v) / (np.sqrt(2.0) * s)
        # mean of the Gaussian over each channel (top-hat response, exact)
        data += amp * rel * 0.5 * (erf(z[1:]) - erf(z[:-1])) * np.sqrt(2 * np.pi) * s \
            / np.diff(ve)[:, None, None]
    data += rng.normal(0.0, noise, data.shape)
    h = make_header("AWAV", nchan=nchan, ny=ny, nx=nx, crval=crval * 1e-10,
                    cdelt=CDELT_AA * 1e-10, cunit="m")
    return kinemap.read_cube((data.astype(np.float32), h), rest_value="Halpha")


@pytest.mark.parametrize("resolving_power", [42400.0, 14100.0, 4700.0])
def test_temperature_and_nonthermal_pulls(resolving_power):
    """Instrument sigma / channel = 0.33, 0.99, 2.97.  High S/N keeps the linearised
    errors in their regime, so the pulls test the propagation, not non-linearity."""
    cube = _cube(resolving_power, seed=int(resolving_power))
    w = kinemap.line_widths(cube, lines=["Halpha", "NII_6583", "NII_6548"],
                            resolving_power=resolving_power, mu=0.6, channel_response="tophat")
    b = w.budget
    ok = np.asarray(b.width_status) == Status.OK
    assert ok.sum() > 350
    t, te = np.asarray(b.temperature)[ok], np.asarray(b.temperature_err)[ok]
    s, se = (np.asarray(b.nonthermal_dispersion)[ok],
             np.asarray(b.nonthermal_dispersion_err)[ok])
    pull_t, pull_s = np.std((t - T_TRUE) / te), np.std((s - SNT_TRUE) / se)
    print(f"R={resolving_power:.0f}: T {np.median(t):.0f}+-{np.median(te):.0f} K pull "
          f"{pull_t:.3f}; sigma_nt {np.median(s):.3f}+-{np.median(se):.3f} km/s pull {pull_s:.3f}")
    assert abs(np.median(t) - T_TRUE) < 3 * np.median(te) / np.sqrt(ok.sum()) + 30
    assert abs(np.median(s) - SNT_TRUE) < 0.05
    assert 0.85 <= pull_t <= 1.15
    assert 0.85 <= pull_s <= 1.15
