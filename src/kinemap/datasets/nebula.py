"""The invented "demo nebula": an H-alpha + [N II] cube on an air-wavelength axis (private
module; use :func:`kinemap.datasets.generate.make_nebula`).
"""
from __future__ import annotations

import math
from types import SimpleNamespace
from typing import Any

import astropy.constants as const
import astropy.units as u
import numpy as np
from astropy.wcs import WCS

from kinemap.errors import KinemapError
from kinemap.datasets._common import (
    C_KMS, FWHM_PER_SIGMA, KMS, DemoCube, celestial_cards, check_reference_position, cube_hdu, frozen, pair,
    scalar, seed_value, spatial_shape
)

# The values below describe the demo scenario only; kinemap's line catalogue and unit
# helpers live elsewhere, so these stay private.

# Air rest wavelengths (NIST ASD; from memory).
_AIR_WAVELENGTHS_ANGSTROM = {"halpha": 6562.80, "nii6548": 6548.05, "nii6583": 6583.45}
# Fine-structure broadening of H-alpha, added to sigma^2 (Garcia-Diaz et al. 2008,
# RMxAA 44, 181; from memory).
_HALPHA_FINE_STRUCTURE_KMS2 = 10.233
_MASS_AMU = {"H": 1.008, "N": 14.007}  # standard atomic weights (IUPAC; from memory)
_FLUX_UNIT_KEY = "1e-20_erg_s_cm2"  # unit tag of nebula line fluxes in truth keys


def make_nebula(
    *,
    seed: int = 2,
    shape: tuple[int, int] = (64, 64),
    pixel_scale=1.0 * u.arcsec,
    wavelength_range=(6538.0, 6594.0) * u.AA,
    channel_width=0.25 * u.AA,
    resolving_power: float = 12000.0,
    systemic_velocity=12.0 * KMS,
    velocity_amplitude=25.0 * KMS,
    temperature_range=(8000.0, 12000.0) * u.K,
    nonthermal_range=(5.0, 20.0) * KMS,
    nii_ratio_range=(0.3, 0.5),
    halpha_peak_flux: float = 400.0,
    noise_rms: float = 1.0,
    continuum: float = 5.0,
    continuum_slope: float = 2.0,
    write_restwav: bool = False,
    center_offset=(1.5 * u.arcsec, -2.0 * u.arcsec),
    reference_position=(112.5, -18.75) * u.deg,
) -> DemoCube:
    """Make the optical H-alpha + [N II] cube of the invented "demo nebula".

    Each spectrum is exactly the sum of three Gaussians (H-alpha, [N II] 6548 and 6583,
    air rest wavelengths) plus ``continuum`` plus seeded white noise.  A line at velocity
    v (optical convention) is centred at ``lambda_rest * (1 + v/c)`` (air rest
    wavelength) and has the velocity dispersion::

        sigma^2 = k T / m + sigma_nt^2 (+ 10.233 km^2/s^2 for H-alpha) + sigma_instr^2

    with m = 1.008 amu (H) or 14.007 amu (N), T the electron temperature (the ions are
    taken to share it), sigma_nt the non-thermal dispersion, and
    ``sigma_instr = c / R / 2.35482`` (Gaussian instrumental profile of resolving power
    R, the same in velocity for all lines).  In wavelength, sigma_lambda =
    lambda_rest * sigma / c.  The profile is evaluated at channel centres: the
    instrumental profile of FWHM c/R is taken to include the detector sampling.
    Fields are evaluated at pixel centres; seeing is not modelled.

    Parameters
    ----------
    seed : int
        Seed of ``numpy.random.default_rng``; only the noise is random.
    shape : (int, int)
        (ny, nx) spatial pixels.
    pixel_scale : Quantity [angle] or float [arcsec]
        Pixel size (TAN projection, north up, east left).
    wavelength_range : Quantity (2,) or (float, float) [Angstrom, air]
        First channel centre and the upper limit of the axis.
    channel_width : Quantity or float [Angstrom]
        Channel spacing (linear air-wavelength axis, CTYPE3 = 'AWAV').
    resolving_power : float
        R = lambda / FWHM of the instrumental profile.
    systemic_velocity : Quantity or float [km/s]
        Mean velocity (optical convention, barycentric).
    velocity_amplitude : Quantity or float [km/s]
        Largest |v - systemic_velocity| of the smooth velocity field.
    temperature_range : Quantity (2,) or (float, float) [K]
        Range of the smooth electron-temperature field.
    nonthermal_range : Quantity (2,) or (float, float) [km/s]
        Range of the smooth non-thermal dispersion field.
    nii_ratio_range : (float, float)
        Range of F([N II] 6583) / F(H-alpha); F(6583)/F(6548) is 3.0 everywhere.
    halpha_peak_flux : float [1e-20 erg/s/cm2 per pixel]
        Brightest H-alpha line flux.
    noise_rms : float [1e-20 erg/s/cm2/Angstrom]
        White-noise sigma per channel and pixel (0 for noise-free).
    continuum : float [1e-20 erg/s/cm2/Angstrom]
        Continuum level at the middle of the band (default 5, five times the noise:
        integral-field cubes of nebulae arrive with a continuum under the lines).
    continuum_slope : float [1e-20 erg/s/cm2/Angstrom]
        Change of the continuum from the middle to either end of the band (a straight
        line in wavelength; default 2).
    write_restwav : bool
        Write RESTWAV (the vacuum rest wavelength of H-alpha).  Off by default: cubes
        holding many lines usually have none, and kinemap takes rest values from its line
        catalogue.
    center_offset : pair [arcsec]
        Offset (east, north) of the nebula centre from the reference position.
    reference_position : pair [deg]
        (RA, Dec) ICRS at the reference pixel.

    Returns
    -------
    DemoCube
        ``hdu`` holds float32 data in 1e-20 erg/s/cm2/Angstrom; ``truth`` holds the
        parameters and 2D maps of velocity, electron temperature, non-thermal
        dispersion, line fluxes, the [N II]/H-alpha ratio and the intrinsic and observed
        line dispersions.

    Notes
    -----
    RESTWAV in the header is the VACUUM rest wavelength of H-alpha in metres, as the
    FITS WCS standard (Greisen et al. 2006, Paper III) and wcslib read it; it is
    computed from the air value 6562.80 Angstrom with wcslib's air-to-vacuum relation,
    so wcslib gives v = 0 at 6562.80 Angstrom on the AWAV axis.  Using the air rest
    wavelength in the optical Doppler formula on the air axis differs from the
    vacuum-based velocity by less than 1 m/s here (dispersion of air).
    """
    o = _nebula_options(
        seed=seed, shape=shape, pixel_scale=pixel_scale, wavelength_range=wavelength_range,
        channel_width=channel_width, resolving_power=resolving_power, systemic_velocity=systemic_velocity,
        velocity_amplitude=velocity_amplitude, temperature_range=temperature_range,
        nonthermal_range=nonthermal_range, nii_ratio_range=nii_ratio_range, halpha_peak_flux=halpha_peak_flux,
        noise_rms=noise_rms, continuum=continuum, center_offset=center_offset,
        reference_position=reference_position)
    o.slope = scalar(continuum_slope, u.one, "continuum_slope")
    o.write_restwav = bool(write_restwav)
    x_ref, y_ref = o.nx // 2, o.ny // 2
    x_c = x_ref - o.east0 / o.pix
    y_c = y_ref + o.north0 / o.pix
    f = _nebula_fields(o, x_c, y_c)

    # ---- cube ------------------------------------------------------------------------
    half = (o.lam - o.lam.mean()) / (np.ptp(o.lam) / 2.0)  # -1 .. 1 across the band
    continuum_spectrum = o.cont + o.slope * half
    data = np.broadcast_to(continuum_spectrum[:, None, None], (o.n_chan, o.ny, o.nx)).copy()
    for key, flux, sig in (("halpha", f["f_ha"], f["sig_h_obs"]), ("nii6548", f["f_n48"], f["sig_n_obs"]),
                           ("nii6583", f["f_n83"], f["sig_n_obs"])):
        lam0 = _AIR_WAVELENGTHS_ANGSTROM[key]
        centre = lam0 * (1.0 + f["velocity"] / C_KMS)   # optical convention, exact
        sig_lam = lam0 * sig / C_KMS
        data += (flux / (math.sqrt(2 * math.pi) * sig_lam)
                 * np.exp(-0.5 * ((o.lam[:, None, None] - centre) / sig_lam) ** 2))
    rng = np.random.default_rng(o.seed)
    if o.noise > 0:
        data += o.noise * rng.standard_normal(data.shape)

    restwav_vac = _air_to_vacuum_m(_AIR_WAVELENGTHS_ANGSTROM["halpha"] * 1e-10)
    cards = _nebula_cards(o, restwav_vac, x_ref, y_ref)
    if not write_restwav:
        cards = [c for c in cards if c[0] != "RESTWAV"]
    hdu = cube_hdu(data, cards, [
        ("COMMENT", "RESTWAV, when present, is the vacuum wavelength (FITS WCS Paper III); "
                    "the air rest wavelength of H-alpha is 6562.80 Angstrom."),
        ("HISTORY", "Invented demo cube made by kinemap.datasets.generate.make_nebula."),
        ("HISTORY", "H-alpha + [N II] 6548/6583; optical velocity convention; no seeing."),
    ])
    truth = _nebula_truth(o, hdu, restwav_vac, x_c, y_c, f)
    return DemoCube(name="nebula_halpha", hdu=hdu, truth=truth)


def _nebula_options(*, seed, shape, pixel_scale, wavelength_range, channel_width, resolving_power,
                    systemic_velocity, velocity_amplitude, temperature_range, nonthermal_range, nii_ratio_range,
                    halpha_peak_flux, noise_rms, continuum, center_offset, reference_position) -> SimpleNamespace:
    """The options of :func:`make_nebula` checked and in plain numbers, with the wavelength
    axis ``lam`` and the instrumental dispersion; refuses an axis that misses a line or
    undersamples the instrument."""
    o = SimpleNamespace()
    o.seed = seed_value(seed)
    o.ny, o.nx = spatial_shape(shape, "shape")
    o.pix = scalar(pixel_scale, u.arcsec, "pixel_scale", low=0, low_open=True)
    lam_start, lam_stop = pair(wavelength_range, u.AA, "wavelength_range")
    o.dlam = scalar(channel_width, u.AA, "channel_width", low=0, low_open=True)
    o.res = scalar(resolving_power, u.one, "resolving_power", low=100, high=1e6)
    o.v_sys = scalar(systemic_velocity, KMS, "systemic_velocity", low=-3000, high=3000)
    o.v_amp = scalar(velocity_amplitude, KMS, "velocity_amplitude", low=0, high=1000)
    o.t_lo, o.t_hi = pair(temperature_range, u.K, "temperature_range")
    o.s_lo, o.s_hi = pair(nonthermal_range, KMS, "nonthermal_range")
    o.q_lo, o.q_hi = pair(nii_ratio_range, u.one, "nii_ratio_range")
    for name, lo, hi, floor in (("temperature_range", o.t_lo, o.t_hi, 0.0),
                                ("nonthermal_range", o.s_lo, o.s_hi, 0.0),
                                ("nii_ratio_range", o.q_lo, o.q_hi, 0.0)):
        if not floor <= lo <= hi:
            raise KinemapError(f"'{name}' must be (low, high) with {floor:g} <= low <= high, "
                               f"got ({lo:g}, {hi:g})")
    o.f_peak = scalar(halpha_peak_flux, u.one, "halpha_peak_flux", low=0, low_open=True)
    o.noise = scalar(noise_rms, u.one, "noise_rms", low=0)
    o.cont = scalar(continuum, u.one, "continuum")
    o.east0, o.north0 = pair(center_offset, u.arcsec, "center_offset")
    o.ra0, o.dec0 = pair(reference_position, u.deg, "reference_position")
    check_reference_position(o.ra0, o.dec0)
    o.n_chan = int(math.floor((lam_stop - lam_start) / o.dlam + 1e-9)) + 1
    if o.n_chan < 16:
        raise KinemapError(f"'wavelength_range' holds only {o.n_chan} channels of "
                           f"{o.dlam:g} Angstrom; widen it or use narrower channels")
    o.lam = lam_start + o.dlam * np.arange(o.n_chan)

    # ---- line widths and coverage --------------------------------------------------
    o.sigma_instr = C_KMS / o.res / FWHM_PER_SIGMA
    sig_h_max = math.sqrt(float(_thermal_dispersion_kms(o.t_hi, _MASS_AMU["H"])) ** 2
                          + o.s_hi ** 2 + _HALPHA_FINE_STRUCTURE_KMS2 + o.sigma_instr ** 2)
    v_min, v_max = o.v_sys - o.v_amp, o.v_sys + o.v_amp
    blue = _AIR_WAVELENGTHS_ANGSTROM["nii6548"] * (1 + (v_min - 5 * sig_h_max) / C_KMS)
    red = _AIR_WAVELENGTHS_ANGSTROM["nii6583"] * (1 + (v_max + 5 * sig_h_max) / C_KMS)
    lam = o.lam
    if lam[0] > blue or lam[-1] < red:
        raise KinemapError(
            f"'wavelength_range' ({lam[0]:.2f}-{lam[-1]:.2f} Angstrom) must cover "
            f"{blue:.2f}-{red:.2f} Angstrom to hold both [N II] lines; widen it")
    sig_lam_min = _AIR_WAVELENGTHS_ANGSTROM["nii6548"] * o.sigma_instr / C_KMS
    if o.dlam > 1.5 * sig_lam_min:
        raise KinemapError(
            f"'channel_width' {o.dlam:g} Angstrom undersamples the instrumental profile "
            f"(sigma {sig_lam_min:.3f} Angstrom); use at most {1.5 * sig_lam_min:.3f} "
            f"Angstrom or a lower 'resolving_power'")
    return o


def _nebula_fields(o, x_c, y_c) -> dict:
    """Smooth fields on the sky (arcsec from the nebula centre): line fluxes, velocity,
    electron temperature, non-thermal dispersion, [N II]/H-alpha ratio and the intrinsic
    and observed line dispersions."""
    yy, xx = np.mgrid[0:o.ny, 0:o.nx].astype(float)
    east = -(xx - x_c) * o.pix
    north = (yy - y_c) * o.pix
    half_size = 0.5 * min(o.nx, o.ny) * o.pix
    # the shapes scale with the field so that any shape keeps the nebula in view
    r_ring, w_ring, r_core = 0.5 * half_size, 0.16 * half_size, 0.33 * half_size
    pa_major = math.radians(30.0)  # long axis of the elliptical shell, east of north
    along = east * math.sin(pa_major) + north * math.cos(pa_major)
    across = east * math.cos(pa_major) - north * math.sin(pa_major)
    r_ell = np.hypot(along, across / 0.8)
    radius = np.hypot(east, north)
    shape_ha = (np.exp(-0.5 * ((r_ell - r_ring) / w_ring) ** 2)
                + 0.35 * np.exp(-0.5 * (radius / r_core) ** 2))
    f_ha = o.f_peak * shape_ha / shape_ha.max()

    pa_grad = math.radians(60.0)  # direction of the velocity gradient, east of north
    u_grad = east * math.sin(pa_grad) + north * math.cos(pa_grad)
    w_grad = east * math.cos(pa_grad) - north * math.sin(pa_grad)
    # |0.8 tanh| + |0.2 sin| <= 1 keeps |v - v_sys| <= velocity_amplitude
    velocity = o.v_sys + o.v_amp * (0.8 * np.tanh(u_grad / (0.4 * half_size))
                                    + 0.2 * np.sin(math.pi * w_grad / half_size))
    g_t = (0.7 * np.tanh(-north / (0.5 * half_size))
           + 0.3 * np.cos(math.pi * east / (1.2 * half_size)))
    temperature = 0.5 * (o.t_lo + o.t_hi) + 0.5 * (o.t_hi - o.t_lo) * g_t
    sigma_nt = o.s_lo + (o.s_hi - o.s_lo) * np.exp(-0.5 * (radius / (0.45 * half_size)) ** 2)
    ratio = o.q_lo + (o.q_hi - o.q_lo) * (1.0 - np.exp(-0.5 * (radius / (0.6 * half_size)) ** 2))
    f_n83 = ratio * f_ha
    f_n48 = f_n83 / 3.0

    sig_h = np.sqrt(_thermal_dispersion_kms(temperature, _MASS_AMU["H"]) ** 2
                    + sigma_nt ** 2 + _HALPHA_FINE_STRUCTURE_KMS2)
    sig_n = np.sqrt(_thermal_dispersion_kms(temperature, _MASS_AMU["N"]) ** 2
                    + sigma_nt ** 2)
    return {"f_ha": f_ha, "f_n48": f_n48, "f_n83": f_n83, "ratio": ratio, "velocity": velocity,
            "temperature": temperature, "sigma_nt": sigma_nt, "sig_h": sig_h, "sig_n": sig_n,
            "sig_h_obs": np.hypot(sig_h, o.sigma_instr), "sig_n_obs": np.hypot(sig_n, o.sigma_instr)}


def _nebula_cards(o, restwav_vac, x_ref, y_ref) -> list:
    """Header cards (key, value, comment) of the nebula cube."""
    return [
        ("OBJECT", "demo nebula", "invented demo source, not a real object"),
        ("BUNIT", "10**(-20) erg/(s cm2 Angstrom)", "flux density per pixel"),
        *celestial_cards("TAN", o.ra0, o.dec0, x_ref, y_ref, o.pix),
        ("CTYPE3", "AWAV", "air wavelength"), ("CUNIT3", "Angstrom", ""),
        ("CRVAL3", float(o.lam[0]), "[Angstrom] air wavelength of the first channel"),
        ("CRPIX3", 1.0, ""),
        ("CDELT3", o.dlam, "[Angstrom] channel width"),
        ("RESTWAV", restwav_vac, "[m] H-alpha rest wavelength IN VACUUM"),
        ("SPECSYS", "BARYCENT", "spectral reference frame"),
        ("RADESYS", "ICRS", ""),
        ("SPEC_RES", o.res, "resolving power lambda/FWHM of the instrument"),
        ("DEMOSEED", o.seed, "seed of the noise generator"),
    ]


def _nebula_truth(o, hdu, restwav_vac, x_c, y_c, f) -> dict[str, Any]:
    """The truth of the nebula cube (every numeric key with its unit in its name)."""
    wcs = WCS(hdu.header).celestial
    centre_sky = wcs.pixel_to_world(x_c, y_c)
    fk = _FLUX_UNIT_KEY
    return {
        "name": "nebula_halpha",
        "description": "invented H-alpha + [N II] cube of an ionised nebula (demo nebula)",
        "velocity_convention": "optical",
        "spectral_frame": "BARYCENT",
        "wavelength_medium": "air",
        "seed": o.seed,
        "rest_wavelength_air_halpha_angstrom": _AIR_WAVELENGTHS_ANGSTROM["halpha"],
        "rest_wavelength_air_nii6548_angstrom": _AIR_WAVELENGTHS_ANGSTROM["nii6548"],
        "rest_wavelength_air_nii6583_angstrom": _AIR_WAVELENGTHS_ANGSTROM["nii6583"],
        "restwav_header_vacuum_m": restwav_vac,
        "mass_hydrogen_amu": _MASS_AMU["H"],
        "mass_nitrogen_amu": _MASS_AMU["N"],
        "halpha_fine_structure_kms2": _HALPHA_FINE_STRUCTURE_KMS2,
        "resolving_power": o.res,
        "instrumental_dispersion_kms": o.sigma_instr,
        "nii_doublet_ratio": 3.0,
        "systemic_velocity_kms": o.v_sys,
        "velocity_amplitude_kms": o.v_amp,
        "channel_width_angstrom": o.dlam,
        "pixel_scale_arcsec": o.pix,
        "noise_rms_1e-20_erg_s_cm2_angstrom": o.noise,
        "continuum_1e-20_erg_s_cm2_angstrom": o.cont,
        "continuum_slope_1e-20_erg_s_cm2_angstrom": o.slope,
        "continuum_at_halpha_1e-20_erg_s_cm2_angstrom": float(
            o.cont + o.slope * (_AIR_WAVELENGTHS_ANGSTROM["halpha"] * (1 + o.v_sys / C_KMS)
                                - o.lam.mean()) / (np.ptp(o.lam) / 2.0)),
        "restwav_in_header": o.write_restwav,
        "center_x_pix": float(x_c),
        "center_y_pix": float(y_c),
        "center_ra_deg": float(centre_sky.ra.deg),
        "center_dec_deg": float(centre_sky.dec.deg),
        "wavelength_air_angstrom": frozen(o.lam),
        "velocity_kms": frozen(f["velocity"]),
        "electron_temperature_k": frozen(f["temperature"]),
        "nonthermal_dispersion_kms": frozen(f["sigma_nt"]),
        f"halpha_flux_{fk}": frozen(f["f_ha"]),
        f"nii6548_flux_{fk}": frozen(f["f_n48"]),
        f"nii6583_flux_{fk}": frozen(f["f_n83"]),
        "nii6583_halpha_ratio": frozen(f["ratio"]),
        "halpha_dispersion_intrinsic_kms": frozen(f["sig_h"]),
        "nii_dispersion_intrinsic_kms": frozen(f["sig_n"]),
        "halpha_dispersion_observed_kms": frozen(f["sig_h_obs"]),
        "nii_dispersion_observed_kms": frozen(f["sig_n_obs"]),
    }


def _air_to_vacuum_m(wavelength_air_m: float) -> float:
    """Vacuum wavelength of an air wavelength, through wcslib's own AWAV -> WAVE relation.

    Going through wcslib (astropy.wcs) keeps RESTWAV exactly consistent with how
    astropy/wcslib convert the AWAV axis, so that v = 0 falls on the air rest wavelength.
    """
    w = WCS(naxis=1)
    w.wcs.ctype = ["AWAV"]
    w.wcs.cunit = ["m"]
    w.wcs.crval = [wavelength_air_m]
    w.wcs.cdelt = [1e-12]
    w.wcs.crpix = [1.0]
    w.wcs.set()
    w.wcs.sptr("WAVE-???")
    return float(w.wcs.crval[0])


def _thermal_dispersion_kms(temperature_k, mass_amu: float) -> np.ndarray:
    """sqrt(k T / m) in km/s for temperature(s) in K and a particle mass in amu."""
    k_over_amu = (const.k_B / const.u).to_value(u.km ** 2 / u.s ** 2 / u.K)
    return np.sqrt(k_over_amu * np.asarray(temperature_k, dtype=float) / mass_amu)
