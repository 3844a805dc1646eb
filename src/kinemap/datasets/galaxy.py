"""The invented "demo disk galaxy": an HI cube of a thin rotating disk (private module;
use :func:`kinemap.datasets.generate.make_disk_galaxy`).
"""
from __future__ import annotations

import math
from types import SimpleNamespace
from typing import Any

import astropy.units as u
import numpy as np
from astropy.wcs import WCS
from scipy.signal import fftconvolve
from scipy.special import ndtr

from kinemap.errors import KinemapError
from kinemap.datasets._common import (
    C_KMS, FWHM_PER_SIGMA, KMS, DemoCube, celestial_cards, check_reference_position, cube_hdu, frozen, integer,
    pair, scalar, seed_value, spatial_shape
)

# HI 21 cm rest frequency (Hellwig et al. 1970; from memory).
_HI_REST_FREQUENCY_HZ = 1420405751.768
# width (arcsec) of the logistic outer edge of the disk
_EDGE_WIDTH = 5.0


def make_disk_galaxy(
    *,
    seed: int = 1,
    shape: tuple[int, int] = (96, 96),
    pixel_scale=4.0 * u.arcsec,
    n_channels: int = 64,
    channel_width=8.0 * KMS,
    frequency_increasing: bool = False,
    systemic_velocity=1500.0 * KMS,
    flat_velocity=180.0 * KMS,
    turnover_radius=20.0 * u.arcsec,
    position_angle=140.0 * u.deg,
    inclination=55.0 * u.deg,
    dispersion=10.0 * KMS,
    expansion_velocity=0.0 * KMS,
    scale_length=60.0 * u.arcsec,
    hole_radius=25.0 * u.arcsec,
    hole_depth: float = 0.7,
    outer_radius=150.0 * u.arcsec,
    surface_brightness_peak=0.25 * u.Jy / u.beam * KMS,
    beam_major=16.0 * u.arcsec,
    beam_minor=12.0 * u.arcsec,
    beam_pa=30.0 * u.deg,
    noise_rms=1.0 * u.mJy / u.beam,
    correlated_noise: bool = True,
    center_offset=(6.0 * u.arcsec, -4.0 * u.arcsec),
    reference_position=(210.5, 34.25) * u.deg,
    distance=20.0 * u.Mpc,
    oversample: int = 5,
) -> DemoCube:
    """Make the HI cube of the invented "demo disk galaxy".

    A thin, optically thin disk with a rotation curve
    ``v(R) = flat_velocity * (1 - exp(-R / turnover_radius))`` and line-of-sight velocity
    (tilted-ring model, Begeman 1989, A&A 223, 47)::

        v = v_sys + v_rot(R) cos(theta) sin(i) + v_exp sin(theta) sin(i)

    with theta the azimuth in the disk plane from the receding half of the major axis.
    Each pixel is sampled on an ``oversample x oversample`` sub-grid (the line-of-sight
    integral of a thin disk), each Gaussian line (sigma = ``dispersion``) is integrated
    over each channel (top-hat channel response), every channel is convolved with the
    elliptical Gaussian beam, and seeded Gaussian noise is added (smoothed by the same
    beam when ``correlated_noise``, as in an interferometer image, then scaled to
    ``noise_rms``).

    Parameters
    ----------
    seed : int
        Seed of ``numpy.random.default_rng``; only the noise is random.
    shape : (int, int)
        (ny, nx) spatial pixels.
    pixel_scale : Quantity [angle] or float [arcsec]
        Pixel size; CDELT1 = -pixel_scale, CDELT2 = +pixel_scale (north up, east left).
    n_channels : int
        Number of channels.  The band is centred on the systemic velocity.
    channel_width : Quantity [velocity] or float [km/s]
        Channel width in radio-convention velocity (the axis is linear in frequency,
        hence in radio velocity).
    frequency_increasing : bool
        If False (default) frequency decreases along the axis (velocity increases).
    systemic_velocity : Quantity or float [km/s]
        Systemic velocity, radio convention, barycentric.
    flat_velocity, turnover_radius : Quantity or float [km/s], [arcsec]
        Rotation-curve parameters.
    position_angle : Quantity or float [deg]
        East of north to the receding half of the major axis; wrapped into [0, 360).
    inclination : Quantity or float [deg]
        0 face-on; at most 85 deg (a thin disk closer to edge-on is not sampled well).
    dispersion : Quantity or float [km/s]
        Intrinsic velocity dispersion (Gaussian sigma), the same everywhere.
    expansion_velocity : Quantity or float [km/s]
        Radial velocity in the disk plane; the minor-axis half at PA + 90 deg is taken as
        the far side, so a positive value is an outflow.
    scale_length, hole_radius, hole_depth, outer_radius : Quantity or float [arcsec], float
        Face-on profile ``exp(-R/scale_length) * (1 - hole_depth exp(-R^2/(2 hole_radius^2)))``
        with a logistic edge at ``outer_radius`` (width 5 arcsec).
    surface_brightness_peak : Quantity or float [Jy/beam km/s]
        Maximum of the face-on profile, as an integrated intensity in the cube's beam.
        On the sky the disk is brighter by 1/cos(i).
    beam_major, beam_minor, beam_pa : Quantity or float [arcsec], [arcsec], [deg]
        Beam FWHM axes and position angle (east of north), written to BMAJ/BMIN/BPA.
    noise_rms : Quantity or float [Jy/beam]
        Noise per channel and pixel (0 for a noise-free cube).
    correlated_noise : bool
        Smooth the noise with the beam (True) or keep it white.
    center_offset : (Quantity, Quantity) or (float, float) [arcsec]
        Offset (east, north) of the galaxy centre from the reference position.
    reference_position : Quantity (2,) or (float, float) [deg]
        (RA, Dec) ICRS of the reference pixel, CRPIX = (nx // 2 + 1, ny // 2 + 1).
    distance : Quantity or float [Mpc]
        Used only to give radii in kpc in the truth.
    oversample : int
        Sub-pixel sampling per axis (1-15).

    Returns
    -------
    DemoCube
        ``hdu`` holds float32 data in Jy/beam; ``truth`` holds the parameters, the
        rotation curve and profile (1D), and maps (2D, NaN outside the disk) of the
        model line-of-sight velocity at pixel centres, the intrinsic and beam-smoothed
        integrated intensity and the noise-free beam-smeared first and second moments.

    Notes
    -----
    All velocities (truth and axis) are radio-convention velocities, v = c (1 - f/f0);
    the line profile is Gaussian in that velocity (i.e. in frequency).  The disk is
    infinitely thin and optically thin; no warp, no bar.
    """
    o = _disk_options(
        seed=seed, shape=shape, pixel_scale=pixel_scale, n_channels=n_channels, channel_width=channel_width,
        systemic_velocity=systemic_velocity, flat_velocity=flat_velocity, turnover_radius=turnover_radius,
        position_angle=position_angle, inclination=inclination, dispersion=dispersion,
        expansion_velocity=expansion_velocity, scale_length=scale_length, hole_radius=hole_radius,
        hole_depth=hole_depth, outer_radius=outer_radius, surface_brightness_peak=surface_brightness_peak,
        beam_major=beam_major, beam_minor=beam_minor, beam_pa=beam_pa, noise_rms=noise_rms,
        center_offset=center_offset, reference_position=reference_position, distance=distance,
        oversample=oversample)

    # ---- spectral axis: channel k (0-based) at radio velocity v_k -----------------
    f0 = _HI_REST_FREQUENCY_HZ
    offsets = (np.arange(o.n_chan) - 0.5 * (o.n_chan - 1)) * o.dv
    v_chan = o.v_sys - offsets if frequency_increasing else o.v_sys + offsets
    freq = f0 * (1.0 - v_chan / C_KMS)  # radio convention, exact

    # ---- sky geometry -------------------------------------------------------------
    x_ref, y_ref = o.nx // 2, o.ny // 2  # 0-based reference pixel
    x_c = x_ref - o.east0 / o.pix        # east is -x
    y_c = y_ref + o.north0 / o.pix       # north is +y
    profile_norm = float(np.max(_surface_profile(np.linspace(0, o.r_out + 50, 20001), o.r_d,
                                                 o.r_hole, o.depth, o.r_out, _EDGE_WIDTH)))

    cube, mom0_intr = _thin_disk(o, v_chan, x_c, y_c, profile_norm)
    # ---- beam smoothing: a unit-sum kernel keeps the Jy/beam scale ------------------
    kernel = _beam_kernel(o.bmaj / o.pix, o.bmin / o.pix, o.bpa)
    model = fftconvolve(cube, kernel[None], mode="same", axes=(1, 2))
    data = _with_noise(model, kernel, o, correlated_noise)
    maps = _disk_maps(o, model, v_chan, x_c, y_c)
    beam_area_pix = math.pi / (4.0 * math.log(2.0)) * o.bmaj * o.bmin / o.pix ** 2
    total_flux = float(mom0_intr.sum() / beam_area_pix)  # Jy km/s

    hdu = cube_hdu(data, _disk_cards(o, f0, freq, x_ref, y_ref), [
        ("HISTORY", "Invented demo cube made by kinemap.datasets.generate.make_disk_galaxy."),
        ("HISTORY", "Thin rotating disk, tilted-ring geometry; radio velocity convention."),
    ])
    truth = _disk_truth(o, hdu, f0, x_c, y_c, profile_norm, total_flux, v_chan, mom0_intr, maps)
    return DemoCube(name="galaxy_hi", hdu=hdu, truth=truth)


def _disk_options(*, seed, shape, pixel_scale, n_channels, channel_width, systemic_velocity, flat_velocity,
                  turnover_radius, position_angle, inclination, dispersion, expansion_velocity, scale_length,
                  hole_radius, hole_depth, outer_radius, surface_brightness_peak, beam_major, beam_minor, beam_pa,
                  noise_rms, center_offset, reference_position, distance, oversample) -> SimpleNamespace:
    """The options of :func:`make_disk_galaxy` checked and in plain numbers (km/s, arcsec, deg)."""
    o = SimpleNamespace()
    o.seed = seed_value(seed)
    o.ny, o.nx = spatial_shape(shape, "shape")
    o.pix = scalar(pixel_scale, u.arcsec, "pixel_scale", low=0, low_open=True)
    o.n_chan = integer(n_channels, "n_channels", low=8, high=4096)
    o.dv = scalar(channel_width, KMS, "channel_width", low=0, low_open=True)
    o.v_sys = scalar(systemic_velocity, KMS, "systemic_velocity", low=-0.5 * C_KMS,
                     high=0.5 * C_KMS)
    o.v_flat = scalar(flat_velocity, KMS, "flat_velocity", low=0)
    o.r_turn = scalar(turnover_radius, u.arcsec, "turnover_radius", low=0, low_open=True)
    o.pa = scalar(position_angle, u.deg, "position_angle") % 360.0
    o.inc = scalar(inclination, u.deg, "inclination", low=0, high=85)
    o.sigma = scalar(dispersion, KMS, "dispersion", low=0, low_open=True)
    o.v_exp = scalar(expansion_velocity, KMS, "expansion_velocity")
    o.r_d = scalar(scale_length, u.arcsec, "scale_length", low=0, low_open=True)
    o.r_hole = scalar(hole_radius, u.arcsec, "hole_radius", low=0, low_open=True)
    o.depth = scalar(hole_depth, u.one, "hole_depth", low=0, high=1, high_open=True)
    o.r_out = scalar(outer_radius, u.arcsec, "outer_radius", low=0, low_open=True)
    o.sb_peak = scalar(surface_brightness_peak, u.Jy / u.beam * KMS,
                       "surface_brightness_peak", low=0, low_open=True)
    o.bmaj = scalar(beam_major, u.arcsec, "beam_major", low=0, low_open=True)
    o.bmin = scalar(beam_minor, u.arcsec, "beam_minor", low=0, low_open=True)
    o.bpa = scalar(beam_pa, u.deg, "beam_pa")
    if o.bmin > o.bmaj:
        raise KinemapError(f"'beam_minor' ({o.bmin:g} arcsec) must not exceed 'beam_major' "
                           f"({o.bmaj:g} arcsec); swap them")
    o.noise = scalar(noise_rms, u.Jy / u.beam, "noise_rms", low=0)
    o.east0, o.north0 = pair(center_offset, u.arcsec, "center_offset")
    o.ra0, o.dec0 = pair(reference_position, u.deg, "reference_position")
    check_reference_position(o.ra0, o.dec0)
    o.dist = scalar(distance, u.Mpc, "distance", low=0, low_open=True)
    o.k_os = integer(oversample, "oversample", low=1, high=15)

    o.sin_i = math.sin(math.radians(o.inc))
    o.cos_i = math.cos(math.radians(o.inc))
    # The band must hold the whole line: projected rotation + expansion + 4 sigma.
    need = o.v_flat * o.sin_i + abs(o.v_exp) * o.sin_i + 4.0 * o.sigma
    if 0.5 * o.n_chan * o.dv < need:
        raise KinemapError(
            f"'n_channels' x 'channel_width' = {o.n_chan * o.dv:g} km/s does not hold the line "
            f"(needs at least {2 * need:g} km/s); increase n_channels or channel_width")
    return o


def _thin_disk(o, v_chan, x_c, y_c, profile_norm):
    """Intrinsic cube (Jy/beam, before smoothing) and integrated intensity of the thin disk,
    sampled on ``o.k_os`` x ``o.k_os`` sub-pixels, each line integrated over each channel."""
    v_lo = np.minimum(v_chan - 0.5 * o.dv, v_chan + 0.5 * o.dv)
    v_hi = v_lo + o.dv
    yy, xx = np.mgrid[0:o.ny, 0:o.nx].astype(float)
    cube = np.zeros((o.n_chan, o.ny, o.nx))
    mom0_intr = np.zeros((o.ny, o.nx))
    sub = (np.arange(o.k_os) + 0.5) / o.k_os - 0.5
    for oy in sub:
        for ox in sub:
            east = -(xx + ox - x_c) * o.pix
            north = (yy + oy - y_c) * o.pix
            radius, cos_t, sin_t = _disk_coordinates(east, north, o.pa, o.inc)
            bright = (o.sb_peak / profile_norm / o.cos_i) * _surface_profile(
                radius, o.r_d, o.r_hole, o.depth, o.r_out, _EDGE_WIDTH)
            v_los = o.v_sys + (_rotation_curve(radius, o.v_flat, o.r_turn) * cos_t
                               + o.v_exp * sin_t) * o.sin_i
            # fraction of each Gaussian line inside each channel (top-hat response)
            frac = (ndtr((v_hi[:, None, None] - v_los) / o.sigma)
                    - ndtr((v_lo[:, None, None] - v_los) / o.sigma))
            cube += bright * frac / o.dv
            mom0_intr += bright
    cube /= o.k_os * o.k_os
    mom0_intr /= o.k_os * o.k_os
    return cube, mom0_intr


def _with_noise(model, kernel, o, correlated_noise):
    """The beam-smoothed cube plus seeded noise of rms ``o.noise`` (smoothed by the beam too
    when ``correlated_noise``, then rescaled, as in an interferometer image)."""
    rng = np.random.default_rng(o.seed)
    if o.noise > 0:
        if correlated_noise:
            h = kernel.shape[0] // 2
            white = rng.standard_normal((o.n_chan, o.ny + 2 * h, o.nx + 2 * h))
            noise_cube = fftconvolve(white, kernel[None], mode="valid", axes=(1, 2))
            noise_cube *= o.noise / math.sqrt(float(np.sum(kernel ** 2)))
        else:
            noise_cube = o.noise * rng.standard_normal((o.n_chan, o.ny, o.nx))
        return model + noise_cube
    return model.copy()


def _disk_maps(o, model, v_chan, x_c, y_c) -> dict:
    """Truth maps: model velocity and disk radius at pixel centres (NaN beyond the disk), and
    the noise-free beam-smoothed moments 0, 1, 2 (1 and 2 NaN below 1% of the peak)."""
    yy, xx = np.mgrid[0:o.ny, 0:o.nx].astype(float)
    radius_c, cos_c, sin_c = _disk_coordinates(-(xx - x_c) * o.pix, (yy - y_c) * o.pix, o.pa, o.inc)
    v_map = o.v_sys + (_rotation_curve(radius_c, o.v_flat, o.r_turn) * cos_c
                       + o.v_exp * sin_c) * o.sin_i
    v_map[radius_c > o.r_out + 4 * _EDGE_WIDTH] = np.nan
    mom0_smooth = model.sum(axis=0) * o.dv
    signal = mom0_smooth > 0.01 * np.nanmax(mom0_smooth)
    with np.errstate(invalid="ignore", divide="ignore"):
        w_sum = model.sum(axis=0)
        mom1 = np.einsum("k,kyx->yx", v_chan, model) / w_sum
        mom2 = np.sqrt(np.einsum("kyx,kyx->yx", (v_chan[:, None, None] - mom1) ** 2, model)
                       / w_sum)
    mom1[~signal] = np.nan
    mom2[~signal] = np.nan
    return {"v_map": v_map, "radius": radius_c, "mom0": mom0_smooth, "mom1": mom1, "mom2": mom2}


def _disk_cards(o, f0, freq, x_ref, y_ref, name: str = "demo disk galaxy") -> list:
    """Header cards (key, value, comment) of an HI disk cube (the galaxy's, the dwarf's)."""
    return [
        ("OBJECT", name, "invented demo source, not a real object"),
        ("BUNIT", "Jy/beam", "brightness unit"),
        ("BMAJ", o.bmaj / 3600.0, "[deg] beam major axis FWHM"),
        ("BMIN", o.bmin / 3600.0, "[deg] beam minor axis FWHM"),
        ("BPA", o.bpa, "[deg] beam position angle, east of north"),
        *celestial_cards("SIN", o.ra0, o.dec0, x_ref, y_ref, o.pix),
        ("CTYPE3", "FREQ", ""), ("CUNIT3", "Hz", ""),
        ("CRVAL3", float(freq[0]), "[Hz] frequency of the first channel"),
        ("CRPIX3", 1.0, ""),
        ("CDELT3", float(freq[1] - freq[0]), "[Hz] channel width"),
        ("RESTFRQ", f0, "[Hz] HI 21 cm rest frequency"),
        ("SPECSYS", "BARYCENT", "spectral reference frame"),
        ("RADESYS", "ICRS", ""),
        ("DEMOSEED", o.seed, "seed of the noise generator"),
    ]


def _observing_truth(o, hdu, x_c, y_c) -> dict[str, Any]:
    """Truth keys of how an HI disk cube (the galaxy's, the dwarf's) was observed: where
    its centre is, its pixels, channels, beam, noise and distance."""
    centre = WCS(hdu.header).celestial.pixel_to_world(x_c, y_c)
    return {
        "center_x_pix": float(x_c),
        "center_y_pix": float(y_c),
        "center_ra_deg": float(centre.ra.deg),
        "center_dec_deg": float(centre.dec.deg),
        "pixel_scale_arcsec": o.pix,
        "channel_width_kms": o.dv,
        "beam_major_arcsec": o.bmaj,
        "beam_minor_arcsec": o.bmin,
        "beam_pa_deg": o.bpa,
        "noise_rms_jy_beam": o.noise,
        "distance_mpc": o.dist,
    }


def _disk_truth(o, hdu, f0, x_c, y_c, profile_norm, total_flux, v_chan, mom0_intr, maps) -> dict[str, Any]:
    """The truth of the galaxy cube (every numeric key with its unit in its name)."""
    r_curve = np.arange(0.0, o.r_out + 2 * o.pix, o.pix / 2.0)
    kpc_per_arcsec = o.dist * 1e3 * math.radians(1.0 / 3600.0)
    return {
        "name": "galaxy_hi",
        "description": "invented HI cube of a thin rotating disk (demo disk galaxy)",
        "velocity_convention": "radio",
        "spectral_frame": "BARYCENT",
        "seed": o.seed,
        "rest_frequency_hz": f0,
        "systemic_velocity_kms": o.v_sys,
        "position_angle_deg": o.pa,
        "inclination_deg": o.inc,
        "dispersion_kms": o.sigma,
        "expansion_velocity_kms": o.v_exp,
        "flat_velocity_kms": o.v_flat,
        "turnover_radius_arcsec": o.r_turn,
        "scale_length_arcsec": o.r_d,
        "hole_radius_arcsec": o.r_hole,
        "hole_depth": o.depth,
        "outer_radius_arcsec": o.r_out,
        "edge_width_arcsec": _EDGE_WIDTH,
        "surface_brightness_peak_jy_beam_kms": o.sb_peak,
        **_observing_truth(o, hdu, x_c, y_c),
        "total_flux_jy_kms": total_flux,
        "max_projected_velocity_kms": float(np.nanmax(np.abs(maps["v_map"] - o.v_sys))),
        "channel_velocity_kms": frozen(v_chan),
        "radius_arcsec": frozen(r_curve),
        "radius_kpc": frozen(r_curve * kpc_per_arcsec),
        "rotation_velocity_kms": frozen(_rotation_curve(r_curve, o.v_flat, o.r_turn)),
        "surface_brightness_face_on_jy_beam_kms": frozen(
            o.sb_peak / profile_norm
            * _surface_profile(r_curve, o.r_d, o.r_hole, o.depth, o.r_out, _EDGE_WIDTH)),
        "velocity_los_kms": frozen(maps["v_map"]),
        "radius_map_arcsec": frozen(maps["radius"]),
        "moment0_intrinsic_jy_beam_kms": frozen(mom0_intr),
        "moment0_jy_beam_kms": frozen(maps["mom0"]),
        "moment1_beam_smeared_kms": frozen(maps["mom1"]),
        "moment2_beam_smeared_kms": frozen(maps["mom2"]),
    }


def _beam_kernel(major_pix: float, minor_pix: float, pa_deg: float) -> np.ndarray:
    """Elliptical Gaussian kernel (FWHM in pixels) normalised to unit sum.

    The major axis points ``pa_deg`` east of north.  With north = +y and east = -x, the
    major-axis direction in (x, y) is (-sin PA, cos PA), i.e. an angle of 90 deg + PA
    counter-clockwise from +x (the same rotation radio_beam's ``as_kernel`` uses).
    """
    s_maj = major_pix / FWHM_PER_SIGMA
    s_min = minor_pix / FWHM_PER_SIGMA
    half = int(math.ceil(5.0 * s_maj))
    yy, xx = np.mgrid[-half:half + 1, -half:half + 1].astype(float)
    pa = math.radians(pa_deg)
    along = -xx * math.sin(pa) + yy * math.cos(pa)   # along the major axis
    across = xx * math.cos(pa) + yy * math.sin(pa)   # along the minor axis
    kernel = np.exp(-0.5 * ((along / s_maj) ** 2 + (across / s_min) ** 2))
    return kernel / kernel.sum()


def _disk_coordinates(east, north, pa_deg, inc_deg):
    """Disk-plane radius and azimuth of sky offsets (arcsec) for a thin inclined disk.

    ``cos(theta)`` is 1 on the receding half of the major axis (at PA); ``sin(theta)``
    is positive on the minor-axis half at PA + 90 deg.  Begeman (1989) geometry.
    """
    pa = math.radians(pa_deg)
    cos_i = math.cos(math.radians(inc_deg))
    major = east * math.sin(pa) + north * math.cos(pa)
    minor = east * math.cos(pa) - north * math.sin(pa)
    radius = np.hypot(major, minor / cos_i)
    with np.errstate(invalid="ignore", divide="ignore"):
        cos_t = np.where(radius > 0, major / radius, 1.0)
        sin_t = np.where(radius > 0, minor / (cos_i * np.where(radius > 0, radius, 1.0)),
                         0.0)
    return radius, cos_t, sin_t


def _rotation_curve(radius, v_flat, r_turn):
    """v(R) = v_flat (1 - exp(-R / R_turn)), km/s."""
    return v_flat * (1.0 - np.exp(-np.asarray(radius, dtype=float) / r_turn))


def _surface_profile(radius, scale_length, hole_radius, hole_depth, outer_radius,
                     edge_width):
    """Unnormalised face-on profile: exponential with a central depression and soft edge."""
    r = np.asarray(radius, dtype=float)
    hole = 1.0 - hole_depth * np.exp(-0.5 * (r / hole_radius) ** 2)
    # a logistic taper keeps the edge smooth (no ringing after the beam)
    with np.errstate(over="ignore"):
        edge = 1.0 / (1.0 + np.exp((r - outer_radius) / edge_width))
    return np.exp(-r / scale_length) * hole * edge
