"""The invented "demo turbulent cloud": a 13CO(1-0) cube on a velocity axis whose centroid
field is a Gaussian random field with a power-law spectrum plus a linear gradient (private
module; use :func:`kinemap.datasets.generate.make_turbulent_cloud`).
"""
from __future__ import annotations

import math

import astropy.constants as const
import astropy.units as u
import numpy as np
from scipy.ndimage import gaussian_filter

from kinemap.datasets._common import (
    FWHM_PER_SIGMA, DemoCube, celestial_cards, cube_hdu, frozen, scalar, seed_value
)

# 13CO(1-0) rest frequency (CDMS catalogue; from memory) and the molecule's mass in amu
_REST_13CO_HZ = 110.2013543e9
_MASS_13CO_AMU = 29.0
_MU = 2.33  # mean particle mass of molecular gas / m_H (common practice)


def _power_law_field(n_big, shape, beta, rng):
    """Unit-variance Gaussian random field with P(k) ~ k^-beta: a piece of a periodic field
    four times larger, so the periodicity does not show at the largest lags."""
    ky = np.fft.fftfreq(n_big)[:, None]
    kx = np.fft.fftfreq(n_big)[None, :]
    k = np.hypot(kx, ky)
    k[0, 0] = np.inf
    f = np.fft.ifft2(k ** (-beta / 2) * (rng.standard_normal((n_big, n_big))
                                         + 1j * rng.standard_normal((n_big, n_big)))).real
    f = f[:shape[0], :shape[1]]
    return (f - f.mean()) / f.std()


def make_turbulent_cloud(*, seed: int = 3, shape=(96, 96), pixel_scale=20.0 * u.arcsec,
                         beam=40.0 * u.arcsec, beta: float = 3.4,
                         velocity_rms=0.45 * u.km / u.s, systemic_velocity=6.0 * u.km / u.s,
                         gradient=1.0 * u.km / u.s / u.pc, gradient_pa=60.0 * u.deg,
                         distance=300.0 * u.pc, temperature=10.0 * u.K,
                         nonthermal=0.08 * u.km / u.s, peak=4.0, noise_rms=0.08,
                         channel_width=0.05 * u.km / u.s) -> DemoCube:
    """Make the 13CO cube of the invented "demo turbulent cloud".

    Every spectrum is one Gaussian (velocity axis, VRAD, km/s) at the centroid velocity

        v(x) = v_sys + velocity_rms * f(x) + gradient . offset(x)

    with f a unit-variance Gaussian random field of power spectrum P(k) ~ k^-beta (its
    structure function grows as lag^(beta-2); Miville-Deschenes et al. 2003, ApJ 593,
    831; from memory), a plane of ``gradient`` (km/s/pc at ``distance``) towards
    ``gradient_pa`` (deg east of north), and a dispersion sqrt(kT/m_13CO + sigma_nt^2)
    the same everywhere; the intensity follows a smooth log-normal field.  The cube is
    smoothed by a circular Gaussian beam and given seeded noise (K).

    Returns
    -------
    DemoCube
        ``truth``: the parameters, the input maps (velocity in km/s, peak intensity in K),
        the centroid field seen through the beam (``velocity_beam_kms``),
        the sound speed sqrt(kT/(mu m_H)) (km/s) and the gradient's east/north components.
    """
    seed = seed_value(seed)
    rng = np.random.default_rng(seed)
    ny, nx = shape
    pix = scalar(pixel_scale, u.arcsec, "pixel_scale", low=0, low_open=True)
    beam_as = scalar(beam, u.arcsec, "beam", low=0, low_open=True)
    d_pc = scalar(distance, u.pc, "distance", low=0, low_open=True)
    v_rms = scalar(velocity_rms, u.km / u.s, "velocity_rms", low=0)
    v_sys = scalar(systemic_velocity, u.km / u.s, "systemic_velocity")
    g = scalar(gradient, u.km / u.s / u.pc, "gradient", low=0)
    pa = scalar(gradient_pa, u.deg, "gradient_pa")
    t_k = scalar(temperature, u.K, "temperature", low=0, low_open=True)
    s_nt = scalar(nonthermal, u.km / u.s, "nonthermal", low=0)
    dv = scalar(channel_width, u.km / u.s, "channel_width", low=0, low_open=True)

    k_over_amu = (const.k_B / const.u).to_value(u.km ** 2 / u.s ** 2 / u.K)
    sigma_th = math.sqrt(k_over_amu * t_k / _MASS_13CO_AMU)
    sigma = math.hypot(sigma_th, s_nt)
    c_s = math.sqrt((const.k_B * t_k * u.K / (_MU * const.m_p)).to_value(u.km ** 2 / u.s ** 2))

    f = _power_law_field(4 * max(ny, nx), (ny, nx), beta, rng)
    yy, xx = np.mgrid[0:ny, 0:nx].astype(float)
    pc_per_pix = pix / (180 * 3600 / math.pi) * d_pc
    east = -(xx - nx / 2) * pc_per_pix  # east is -x (CDELT1 < 0)
    north = (yy - ny / 2) * pc_per_pix
    g_e, g_n = g * math.sin(math.radians(pa)), g * math.cos(math.radians(pa))
    velocity = v_sys + v_rms * f + g_e * east + g_n * north
    intensity = peak * np.exp(0.4 * _power_law_field(4 * max(ny, nx), (ny, nx), 3.5, rng))

    vlo = float(velocity.min()) - 6 * sigma
    nchan = int(math.ceil((float(velocity.max()) + 6 * sigma - vlo) / dv)) + 1
    axis = vlo + dv * np.arange(nchan)
    data = intensity * np.exp(-0.5 * ((axis[:, None, None] - velocity) / sigma) ** 2)
    s_pix = beam_as / FWHM_PER_SIGMA / pix
    data = np.stack([gaussian_filter(ch, s_pix, mode="nearest") for ch in data])
    # the centroid the telescope sees: the beam-weighted mean of intensity x velocity (exact
    # for the first moment of the smoothed cube)
    weight = gaussian_filter(intensity, s_pix, mode="nearest")
    velocity_beam = gaussian_filter(intensity * velocity, s_pix, mode="nearest") / weight
    data += noise_rms * rng.standard_normal(data.shape)

    cards = [("OBJECT", "demo turbulent cloud", "invented demo source, not a real object"),
             ("BUNIT", "K", "main-beam temperature"),
             *celestial_cards("TAN", 52.0, 31.0, nx / 2, ny / 2, pix),
             ("CTYPE3", "VRAD", "radio velocity"), ("CUNIT3", "km/s", ""),
             ("CRVAL3", vlo, "[km/s] first channel"), ("CRPIX3", 1.0, ""),
             ("CDELT3", dv, "[km/s] channel width"),
             ("RESTFRQ", _REST_13CO_HZ, "[Hz] 13CO(1-0)"), ("SPECSYS", "LSRK", ""),
             ("RADESYS", "ICRS", ""),
             ("BMAJ", beam_as / 3600, "[deg]"), ("BMIN", beam_as / 3600, "[deg]"),
             ("BPA", 0.0, "[deg]"), ("DEMOSEED", seed, "seed of the generator")]
    hdu = cube_hdu(data, cards, [("HISTORY", "Invented demo cube made by kinemap.datasets."
                                             "generate.make_turbulent_cloud.")])
    truth = {"name": "cloud_13co", "description": "invented turbulent molecular cloud (13CO)",
             "seed": seed, "beta": beta, "structure_function_slope_expected": beta - 2,
             "velocity_rms_kms": v_rms, "systemic_velocity_kms": v_sys,
             "gradient_kms_per_pc": g, "gradient_pa_deg": pa, "gradient_east_kms_per_pc": g_e,
             "gradient_north_kms_per_pc": g_n, "distance_pc": d_pc, "pixel_scale_arcsec": pix,
             "beam_fwhm_arcsec": beam_as, "temperature_k": t_k, "mu": _MU,
             "sound_speed_kms": c_s, "thermal_dispersion_kms": sigma_th,
             "nonthermal_dispersion_kms": s_nt, "noise_rms_k": noise_rms,
             "velocity_kms": frozen(velocity), "velocity_beam_kms": frozen(velocity_beam), "intensity_k": frozen(intensity),
             "integrated_k_kms": frozen(intensity * sigma * math.sqrt(2 * math.pi))}
    return DemoCube(name="cloud_13co", hdu=hdu, truth=truth)
