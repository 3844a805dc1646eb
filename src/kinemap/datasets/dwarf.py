"""The invented "demo dwarf": a small, poorly resolved HI disk held up partly by its own
velocity dispersion (private module; use :func:`kinemap.datasets.generate.make_dwarf`).
"""
from __future__ import annotations

import math
from types import SimpleNamespace
from typing import Any

import astropy.units as u
import numpy as np
from scipy.signal import fftconvolve
from scipy.special import ndtr

from kinemap.datasets._common import (
    C_KMS, DemoCube, cube_hdu, frozen, scalar, seed_value
)
from kinemap.datasets.galaxy import (
    _HI_REST_FREQUENCY_HZ, _beam_kernel, _disk_cards, _disk_coordinates, _observing_truth,
    _with_noise
)

# width (arcsec) of the logistic outer edge of the disk (beyond the last fitted ring)
_EDGE_WIDTH = 4.0


def make_dwarf(*, seed: int = 4, noise_rms=1.0 * u.mJy / u.beam) -> DemoCube:
    """Make the HI cube of the invented "demo dwarf".

    A thin exponential disk (scale length R_d = 25 arcsec, logistic edge at 85 arcsec)
    with one velocity dispersion sigma = 14 km/s everywhere, in a potential whose circular
    speed is ``V_c(R) = 45 (1 - exp(-R / 15 arcsec))`` km/s.  The gas rotates slower than
    V_c by the asymmetric drift of such a disk: with V_A^2 = -R sigma^2 dln(Sigma
    sigma^2)/dR (isotropic dispersion, thin disk) and Sigma ~ exp(-R/R_d), sigma constant,
    V_A^2 = sigma^2 R / R_d, and ``v_rot = sqrt(V_c^2 - V_A^2)``.  Line-of-sight velocity
    v = v_sys + v_rot cos(theta) sin(i) (Begeman 1989, A&A 223, 47).

    32 x 32 pixels of 6 arcsec, 40 channels of 5 km/s on a frequency axis (radio
    convention), an 18 arcsec circular beam: the disk is about nine beams across, so the
    beam smears its inner rise and widens its lines.  Each pixel is sampled on 5 x 5
    sub-pixels, each Gaussian line is integrated over its channel (top-hat), channels
    are convolved with the beam and seeded beam-correlated noise is added.

    Parameters
    ----------
    seed : int
        Seed of ``numpy.random.default_rng`` (only the noise is random).
    noise_rms : Quantity or float [Jy/beam]
        Noise per channel and pixel (0 for a noise-free cube).

    Returns
    -------
    DemoCube
        ``name`` 'dwarf_hi'; ``truth`` holds the geometry, dispersion, scale length and
        the curves v_rot, v_circ and asymmetric drift against radius (arcsec and kpc).
    """
    o = SimpleNamespace(
        seed=seed_value(seed), ny=32, nx=32, pix=6.0, n_chan=40, dv=5.0, v_sys=620.0,
        v_flat=45.0, r_turn=15.0, r_d=25.0, r_out=85.0, sigma=14.0, pa=215.0, inc=60.0,
        sb_peak=1.0, bmaj=18.0, bmin=18.0, bpa=0.0, dist=4.0, k_os=5,
        noise=scalar(noise_rms, u.Jy / u.beam, "noise_rms", low=0),
        ra0=152.75, dec0=-12.5, east0=-4.0, north0=3.0)
    o.sin_i, o.cos_i = math.sin(math.radians(o.inc)), math.cos(math.radians(o.inc))
    f0 = _HI_REST_FREQUENCY_HZ
    v_chan = o.v_sys + (np.arange(o.n_chan) - 0.5 * (o.n_chan - 1)) * o.dv
    freq = f0 * (1.0 - v_chan / C_KMS)  # radio convention, exact
    x_ref, y_ref = o.nx // 2, o.ny // 2
    x_c, y_c = x_ref - o.east0 / o.pix, y_ref + o.north0 / o.pix

    cube = _dwarf_disk(o, v_chan, x_c, y_c)
    kernel = _beam_kernel(o.bmaj / o.pix, o.bmin / o.pix, o.bpa)
    model = fftconvolve(cube, kernel[None], mode="same", axes=(1, 2))
    data = _with_noise(model, kernel, o, True)
    cards = _disk_cards(o, f0, freq, x_ref, y_ref, name="demo dwarf")
    hdu = cube_hdu(data, cards, [
        ("HISTORY", "Invented demo cube made by kinemap.datasets.generate.make_dwarf."),
        ("HISTORY", "Pressure-supported thin exponential disk; radio velocity convention."),
    ])
    return DemoCube(name="dwarf_hi", hdu=hdu, truth=_dwarf_truth(o, hdu, f0, x_c, y_c, v_chan))


def _circular(o, r):
    return o.v_flat * (1.0 - np.exp(-np.asarray(r, dtype=float) / o.r_turn))


def _drift_squared(o, r):
    """V_A^2 = sigma^2 R / R_d: exponential disk, constant dispersion (km/s)^2."""
    return o.sigma ** 2 * np.asarray(r, dtype=float) / o.r_d


def _rotation(o, r):
    return np.sqrt(np.maximum(_circular(o, r) ** 2 - _drift_squared(o, r), 0.0))


def _profile(o, r):
    """Face-on integrated intensity (Jy/beam km/s): exponential with a soft edge."""
    with np.errstate(over="ignore"):
        edge = 1.0 / (1.0 + np.exp((r - o.r_out) / _EDGE_WIDTH))
    return o.sb_peak * np.exp(-r / o.r_d) * edge


def _dwarf_disk(o, v_chan, x_c, y_c):
    """Intrinsic cube (Jy/beam, before the beam) on ``o.k_os`` x ``o.k_os`` sub-pixels."""
    v_lo = v_chan - 0.5 * o.dv
    yy, xx = np.mgrid[0:o.ny, 0:o.nx].astype(float)
    cube = np.zeros((o.n_chan, o.ny, o.nx))
    sub = (np.arange(o.k_os) + 0.5) / o.k_os - 0.5
    for oy in sub:
        for ox in sub:
            radius, cos_t, _ = _disk_coordinates(-(xx + ox - x_c) * o.pix,
                                                 (yy + oy - y_c) * o.pix, o.pa, o.inc)
            bright = _profile(o, radius) / o.cos_i
            v_los = o.v_sys + _rotation(o, radius) * cos_t * o.sin_i
            frac = (ndtr((v_lo[:, None, None] + o.dv - v_los) / o.sigma)
                    - ndtr((v_lo[:, None, None] - v_los) / o.sigma))
            cube += bright * frac / o.dv
    return cube / o.k_os ** 2


def _dwarf_truth(o, hdu, f0, x_c, y_c, v_chan) -> dict[str, Any]:
    r = np.arange(0.0, o.r_out + 2 * o.pix, o.pix / 2.0)
    kpc_per_arcsec = o.dist * 1e3 * math.radians(1.0 / 3600.0)
    return {
        "name": "dwarf_hi",
        "description": "invented HI cube of a small pressure-supported disk (demo dwarf)",
        "velocity_convention": "radio",
        "spectral_frame": "BARYCENT",
        "seed": o.seed,
        "rest_frequency_hz": f0,
        "systemic_velocity_kms": o.v_sys,
        "position_angle_deg": o.pa,
        "inclination_deg": o.inc,
        "dispersion_kms": o.sigma,
        "circular_flat_velocity_kms": o.v_flat,
        "turnover_radius_arcsec": o.r_turn,
        "scale_length_arcsec": o.r_d,
        "outer_radius_arcsec": o.r_out,
        "edge_width_arcsec": _EDGE_WIDTH,
        "surface_brightness_peak_jy_beam_kms": o.sb_peak,
        **_observing_truth(o, hdu, x_c, y_c),
        "drift_note": "V_A^2 = sigma^2 R / R_d (exponential disk, constant dispersion); "
                      "the soft edge beyond the last ring is not included",
        "channel_velocity_kms": frozen(v_chan),
        "radius_arcsec": frozen(r),
        "radius_kpc": frozen(r * kpc_per_arcsec),
        "rotation_velocity_kms": frozen(_rotation(o, r)),
        "circular_velocity_kms": frozen(_circular(o, r)),
        "asymmetric_drift_kms": frozen(np.sqrt(_drift_squared(o, r))),
        "surface_brightness_face_on_jy_beam_kms": frozen(_profile(o, r)),
    }
