"""Seeded generator of the two invented demo cubes, with their known truth.

Two invented scenarios (no real objects):

* :func:`make_disk_galaxy` -- an HI (21 cm) cube of a "demo disk galaxy" on a frequency
  axis, built from a thin rotating disk (tilted-ring geometry, Begeman 1989, A&A 223, 47),
  integrated over the line of sight with sub-pixel sampling, integrated over each channel
  (top-hat), smoothed by an elliptical Gaussian beam and given seeded noise.
* :func:`make_nebula` -- an optical cube of a "demo nebula" on an air-wavelength axis
  around H-alpha and the [N II] 6548/6583 doublet, with smooth fields of electron
  temperature, non-thermal dispersion, velocity and [N II]/H-alpha ratio, a Gaussian
  instrumental profile of resolving power R, and seeded noise.

:func:`write_demo_cubes` writes both cubes as FITS files with a JSON file of the truth.

Conventions (see DESIGN.md): arrays are (spectral, y, x); velocities in km/s, positive
receding; dispersion is the Gaussian sigma; position angle in degrees east of north to
the receding half of the major axis; inclination 0 face-on, 90 edge-on; north is +y
(CDELT2 > 0) and east is -x (CDELT1 < 0).  Every truth key states its unit in its name
(``_kms``, ``_deg``, ``_arcsec``, ``_hz``, ``_k``, ...).

Randomness comes only from ``numpy.random.default_rng(seed)``; the same arguments give
the same cube, bit for bit.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import astropy.constants as const
import astropy.units as u
import numpy as np
from astropy.io import fits
from astropy.wcs import WCS
from scipy.signal import fftconvolve
from scipy.special import ndtr

from kinemap.units import to_value
from kinemap.errors import KinemapError

__all__ = [
    "DemoCube",
    "make_disk_galaxy",
    "make_nebula",
    "write_demo_cubes",
    "truth_to_json",
]

# The values below describe the demo scenario only; kinemap's line catalogue and unit
# helpers live elsewhere, so these stay private.

# HI 21 cm rest frequency (Hellwig et al. 1970; from memory).
_HI_REST_FREQUENCY_HZ = 1420405751.768
# Air rest wavelengths (NIST ASD; from memory).
_AIR_WAVELENGTHS_ANGSTROM = {"halpha": 6562.80, "nii6548": 6548.05, "nii6583": 6583.45}
# Fine-structure broadening of H-alpha, added to sigma^2 (Garcia-Diaz et al. 2008,
# RMxAA 44, 181; from memory).
_HALPHA_FINE_STRUCTURE_KMS2 = 10.233
# 2 sqrt(2 ln 2): FWHM of a Gaussian in units of its sigma (exact).
_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))

_C_KMS = const.c.to_value(u.km / u.s)
_MASS_AMU = {"H": 1.008, "N": 14.007}  # standard atomic weights (IUPAC; from memory)
_KMS = u.km / u.s
_FLUX_UNIT_KEY = "1e-20_erg_s_cm2"  # unit tag of nebula line fluxes in truth keys

# Names of the files write_demo_cubes produces, keyed by cube name.
_FILE_STEMS = {"galaxy_hi": "demo_galaxy_hi", "nebula_halpha": "demo_nebula_halpha"}


@dataclass(frozen=True)
class DemoCube:
    """An invented cube and the truth it was made from.

    Attributes
    ----------
    name : str
        Short identifier, ``'galaxy_hi'`` or ``'nebula_halpha'``.
    hdu : astropy.io.fits.PrimaryHDU
        The cube, float32, axes (spectral, y, x), with a complete celestial + spectral
        WCS header.
    truth : dict
        The known truth: plain floats, strings (conventions), 1D curves and 2D maps
        (numpy float64 arrays of shape (ny, nx), read-only, NaN where undefined).  Every
        numeric key carries its unit in its name.
    """

    name: str
    hdu: fits.PrimaryHDU
    truth: dict[str, Any]


# ----------------------------------------------------------------------------------
# validation helpers (one-line KinemapError naming parameter, problem and fix)
# ----------------------------------------------------------------------------------
def _scalar(value, unit, name: str, *, low=None, high=None, low_open=False,
            high_open=False, equivalencies=None) -> float:
    """Strip the unit of a scalar input and check its range; raise KinemapError if bad."""
    try:
        out = to_value(value, unit, name=name, equivalencies=equivalencies)
    except (TypeError, ValueError):
        raise KinemapError(f"'{name}' must be a number (in {unit}), got {value!r}") from None
    if np.ndim(out) != 0:
        raise KinemapError(f"'{name}' must be a single number, got an array of shape "
                           f"{np.shape(out)}")
    out = float(out)
    unit_txt = "" if u.Unit(unit) == u.one else f" {u.Unit(unit).to_string()}"
    if not math.isfinite(out):
        raise KinemapError(f"'{name}' must be finite, got {out}{unit_txt}")
    bad_low = low is not None and (out <= low if low_open else out < low)
    bad_high = high is not None and (out >= high if high_open else out > high)
    if bad_low or bad_high:
        lo = "-inf" if low is None else f"{low:g}"
        hi = "inf" if high is None else f"{high:g}"
        lb = "(" if low_open or low is None else "["
        hb = ")" if high_open or high is None else "]"
        raise KinemapError(f"'{name}' must be in {lb}{lo}, {hi}{hb}{unit_txt}, "
                           f"got {out:g}{unit_txt}")
    return out


def _int(value, name: str, *, low: int, high: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise KinemapError(f"'{name}' must be an integer between {low} and {high}, "
                           f"got {value!r}")
    if not low <= int(value) <= high:
        raise KinemapError(f"'{name}' must be an integer between {low} and {high}, "
                           f"got {value}")
    return int(value)


def _shape(value, name: str) -> tuple[int, int]:
    if not (isinstance(value, (tuple, list)) and len(value) == 2):
        raise KinemapError(f"'{name}' must be a pair (ny, nx) of integers, got {value!r}")
    return (_int(value[0], f"{name}[0] (ny)", low=16, high=1024),
            _int(value[1], f"{name}[1] (nx)", low=16, high=1024))


def _pair(value, unit, name: str) -> tuple[float, float]:
    if isinstance(value, u.Quantity) and value.shape == (2,):
        value = (value[0], value[1])
    if not (isinstance(value, (tuple, list)) and len(value) == 2):
        raise KinemapError(f"'{name}' must be a pair of numbers (in {unit}), got {value!r}")
    return (_scalar(value[0], unit, f"{name}[0]"), _scalar(value[1], unit, f"{name}[1]"))


def _seed(seed) -> int:
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise KinemapError(f"'seed' must be a non-negative integer, got {seed!r}")
    return int(seed)


def _frozen(array) -> np.ndarray:
    """A float64 copy that cannot be written to (truth is immutable)."""
    out = np.array(array, dtype=float)
    out.setflags(write=False)
    return out


# ----------------------------------------------------------------------------------
# geometry and beam
# ----------------------------------------------------------------------------------
def _beam_kernel(major_pix: float, minor_pix: float, pa_deg: float) -> np.ndarray:
    """Elliptical Gaussian kernel (FWHM in pixels) normalised to unit sum.

    The major axis points ``pa_deg`` east of north.  With north = +y and east = -x, the
    major-axis direction in (x, y) is (-sin PA, cos PA), i.e. an angle of 90 deg + PA
    counter-clockwise from +x (the same rotation radio_beam's ``as_kernel`` uses).
    """
    s_maj = major_pix / _FWHM_PER_SIGMA
    s_min = minor_pix / _FWHM_PER_SIGMA
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


# ----------------------------------------------------------------------------------
# the disk galaxy
# ----------------------------------------------------------------------------------
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


def _celestial_cards(projection, ra0, dec0, x_ref, y_ref, pix):
    """RA/Dec header cards: north up, east left, pixel (x_ref, y_ref) 0-based at (ra0, dec0)."""
    return [
        ("CTYPE1", f"RA---{projection}", ""), ("CUNIT1", "deg", ""),
        ("CRVAL1", ra0, "[deg]"), ("CRPIX1", float(x_ref + 1), ""),
        ("CDELT1", -pix / 3600.0, "[deg] east is left"),
        ("CTYPE2", f"DEC--{projection}", ""), ("CUNIT2", "deg", ""),
        ("CRVAL2", dec0, "[deg]"), ("CRPIX2", float(y_ref + 1), ""),
        ("CDELT2", pix / 3600.0, "[deg] north is up"),
    ]


def make_disk_galaxy(
    *,
    seed: int = 1,
    shape: tuple[int, int] = (96, 96),
    pixel_scale=4.0 * u.arcsec,
    n_channels: int = 64,
    channel_width=8.0 * _KMS,
    frequency_increasing: bool = False,
    systemic_velocity=1500.0 * _KMS,
    flat_velocity=180.0 * _KMS,
    turnover_radius=20.0 * u.arcsec,
    position_angle=140.0 * u.deg,
    inclination=55.0 * u.deg,
    dispersion=10.0 * _KMS,
    expansion_velocity=0.0 * _KMS,
    scale_length=60.0 * u.arcsec,
    hole_radius=25.0 * u.arcsec,
    hole_depth: float = 0.7,
    outer_radius=150.0 * u.arcsec,
    surface_brightness_peak=0.25 * u.Jy / u.beam * _KMS,
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
    seed = _seed(seed)
    ny, nx = _shape(shape, "shape")
    pix = _scalar(pixel_scale, u.arcsec, "pixel_scale", low=0, low_open=True)
    n_chan = _int(n_channels, "n_channels", low=8, high=4096)
    dv = _scalar(channel_width, _KMS, "channel_width", low=0, low_open=True)
    v_sys = _scalar(systemic_velocity, _KMS, "systemic_velocity", low=-0.5 * _C_KMS,
                    high=0.5 * _C_KMS)
    v_flat = _scalar(flat_velocity, _KMS, "flat_velocity", low=0)
    r_turn = _scalar(turnover_radius, u.arcsec, "turnover_radius", low=0, low_open=True)
    pa = _scalar(position_angle, u.deg, "position_angle") % 360.0
    inc = _scalar(inclination, u.deg, "inclination", low=0, high=85)
    sigma = _scalar(dispersion, _KMS, "dispersion", low=0, low_open=True)
    v_exp = _scalar(expansion_velocity, _KMS, "expansion_velocity")
    r_d = _scalar(scale_length, u.arcsec, "scale_length", low=0, low_open=True)
    r_hole = _scalar(hole_radius, u.arcsec, "hole_radius", low=0, low_open=True)
    depth = _scalar(hole_depth, u.one, "hole_depth", low=0, high=1, high_open=True)
    r_out = _scalar(outer_radius, u.arcsec, "outer_radius", low=0, low_open=True)
    sb_peak = _scalar(surface_brightness_peak, u.Jy / u.beam * _KMS,
                      "surface_brightness_peak", low=0, low_open=True)
    bmaj = _scalar(beam_major, u.arcsec, "beam_major", low=0, low_open=True)
    bmin = _scalar(beam_minor, u.arcsec, "beam_minor", low=0, low_open=True)
    bpa = _scalar(beam_pa, u.deg, "beam_pa")
    if bmin > bmaj:
        raise KinemapError(f"'beam_minor' ({bmin:g} arcsec) must not exceed 'beam_major' "
                           f"({bmaj:g} arcsec); swap them")
    noise = _scalar(noise_rms, u.Jy / u.beam, "noise_rms", low=0)
    east0, north0 = _pair(center_offset, u.arcsec, "center_offset")
    ra0, dec0 = _pair(reference_position, u.deg, "reference_position")
    if not (0 <= ra0 < 360 and -90 < dec0 < 90):
        raise KinemapError(f"'reference_position' must be (RA in [0, 360), Dec in (-90, 90)) "
                           f"deg, got ({ra0:g}, {dec0:g}) deg")
    dist = _scalar(distance, u.Mpc, "distance", low=0, low_open=True)
    k_os = _int(oversample, "oversample", low=1, high=15)

    sin_i = math.sin(math.radians(inc))
    cos_i = math.cos(math.radians(inc))
    # The band must hold the whole line: projected rotation + expansion + 4 sigma.
    need = v_flat * sin_i + abs(v_exp) * sin_i + 4.0 * sigma
    if 0.5 * n_chan * dv < need:
        raise KinemapError(
            f"'n_channels' x 'channel_width' = {n_chan * dv:g} km/s does not hold the line "
            f"(needs at least {2 * need:g} km/s); increase n_channels or channel_width")

    # ---- spectral axis: channel k (0-based) at radio velocity v_k -----------------
    f0 = _HI_REST_FREQUENCY_HZ
    offsets = (np.arange(n_chan) - 0.5 * (n_chan - 1)) * dv
    v_chan = v_sys - offsets if frequency_increasing else v_sys + offsets
    freq = f0 * (1.0 - v_chan / _C_KMS)  # radio convention, exact
    v_lo = np.minimum(v_chan - 0.5 * dv, v_chan + 0.5 * dv)
    v_hi = v_lo + dv

    # ---- sky geometry -------------------------------------------------------------
    x_ref, y_ref = nx // 2, ny // 2  # 0-based reference pixel
    x_c = x_ref - east0 / pix        # east is -x
    y_c = y_ref + north0 / pix       # north is +y
    yy, xx = np.mgrid[0:ny, 0:nx].astype(float)
    edge_width = 5.0
    profile_norm = float(np.max(_surface_profile(np.linspace(0, r_out + 50, 20001), r_d,
                                                 r_hole, depth, r_out, edge_width)))

    # ---- intrinsic cube (Jy/beam, before smoothing): thin disk, sub-pixel samples ----
    cube = np.zeros((n_chan, ny, nx))
    mom0_intr = np.zeros((ny, nx))
    sub = (np.arange(k_os) + 0.5) / k_os - 0.5
    for oy in sub:
        for ox in sub:
            east = -(xx + ox - x_c) * pix
            north = (yy + oy - y_c) * pix
            radius, cos_t, sin_t = _disk_coordinates(east, north, pa, inc)
            bright = (sb_peak / profile_norm / cos_i) * _surface_profile(
                radius, r_d, r_hole, depth, r_out, edge_width)
            v_los = v_sys + (_rotation_curve(radius, v_flat, r_turn) * cos_t
                             + v_exp * sin_t) * sin_i
            # fraction of each Gaussian line inside each channel (top-hat response)
            frac = (ndtr((v_hi[:, None, None] - v_los) / sigma)
                    - ndtr((v_lo[:, None, None] - v_los) / sigma))
            cube += bright * frac / dv
            mom0_intr += bright
    cube /= k_os * k_os
    mom0_intr /= k_os * k_os

    # ---- beam smoothing: a unit-sum kernel keeps the Jy/beam scale ------------------
    kernel = _beam_kernel(bmaj / pix, bmin / pix, bpa)
    model = fftconvolve(cube, kernel[None], mode="same", axes=(1, 2))
    rng = np.random.default_rng(seed)
    if noise > 0:
        if correlated_noise:
            h = kernel.shape[0] // 2
            white = rng.standard_normal((n_chan, ny + 2 * h, nx + 2 * h))
            noise_cube = fftconvolve(white, kernel[None], mode="valid", axes=(1, 2))
            noise_cube *= noise / math.sqrt(float(np.sum(kernel ** 2)))
        else:
            noise_cube = noise * rng.standard_normal((n_chan, ny, nx))
        data = model + noise_cube
    else:
        data = model.copy()

    # ---- truth maps ----------------------------------------------------------------
    radius_c, cos_c, sin_c = _disk_coordinates(-(xx - x_c) * pix, (yy - y_c) * pix, pa, inc)
    v_map = v_sys + (_rotation_curve(radius_c, v_flat, r_turn) * cos_c
                     + v_exp * sin_c) * sin_i
    v_map[radius_c > r_out + 4 * edge_width] = np.nan
    mom0_smooth = model.sum(axis=0) * dv
    signal = mom0_smooth > 0.01 * np.nanmax(mom0_smooth)
    with np.errstate(invalid="ignore", divide="ignore"):
        w_sum = model.sum(axis=0)
        mom1 = np.einsum("k,kyx->yx", v_chan, model) / w_sum
        mom2 = np.sqrt(np.einsum("kyx,kyx->yx", (v_chan[:, None, None] - mom1) ** 2, model)
                       / w_sum)
    mom1[~signal] = np.nan
    mom2[~signal] = np.nan
    beam_area_pix = math.pi / (4.0 * math.log(2.0)) * bmaj * bmin / pix ** 2
    total_flux = float(mom0_intr.sum() / beam_area_pix)  # Jy km/s

    # ---- header ----------------------------------------------------------------------
    hdu = fits.PrimaryHDU(data.astype(np.float32))
    hdr = hdu.header
    cards = [
        ("OBJECT", "demo disk galaxy", "invented demo source, not a real object"),
        ("BUNIT", "Jy/beam", "brightness unit"),
        ("BMAJ", bmaj / 3600.0, "[deg] beam major axis FWHM"),
        ("BMIN", bmin / 3600.0, "[deg] beam minor axis FWHM"),
        ("BPA", bpa, "[deg] beam position angle, east of north"),
        *_celestial_cards("SIN", ra0, dec0, x_ref, y_ref, pix),
        ("CTYPE3", "FREQ", ""), ("CUNIT3", "Hz", ""),
        ("CRVAL3", float(freq[0]), "[Hz] frequency of the first channel"),
        ("CRPIX3", 1.0, ""),
        ("CDELT3", float(freq[1] - freq[0]), "[Hz] channel width"),
        ("RESTFRQ", f0, "[Hz] HI 21 cm rest frequency"),
        ("SPECSYS", "BARYCENT", "spectral reference frame"),
        ("RADESYS", "ICRS", ""),
        ("DEMOSEED", seed, "seed of the noise generator"),
    ]
    for key, value, comment in cards:
        hdr[key] = (value, comment)
    hdr["HISTORY"] = "Invented demo cube made by kinemap.datasets.generate.make_disk_galaxy."
    hdr["HISTORY"] = "Thin rotating disk, tilted-ring geometry; radio velocity convention."

    # ---- truth -------------------------------------------------------------------------
    wcs = WCS(hdr).celestial
    centre = wcs.pixel_to_world(x_c, y_c)
    r_curve = np.arange(0.0, r_out + 2 * pix, pix / 2.0)
    kpc_per_arcsec = dist * 1e3 * math.radians(1.0 / 3600.0)
    truth: dict[str, Any] = {
        "name": "galaxy_hi",
        "description": "invented HI cube of a thin rotating disk (demo disk galaxy)",
        "velocity_convention": "radio",
        "spectral_frame": "BARYCENT",
        "seed": seed,
        "rest_frequency_hz": f0,
        "systemic_velocity_kms": v_sys,
        "position_angle_deg": pa,
        "inclination_deg": inc,
        "dispersion_kms": sigma,
        "expansion_velocity_kms": v_exp,
        "flat_velocity_kms": v_flat,
        "turnover_radius_arcsec": r_turn,
        "scale_length_arcsec": r_d,
        "hole_radius_arcsec": r_hole,
        "hole_depth": depth,
        "outer_radius_arcsec": r_out,
        "edge_width_arcsec": edge_width,
        "surface_brightness_peak_jy_beam_kms": sb_peak,
        "center_x_pix": float(x_c),
        "center_y_pix": float(y_c),
        "center_ra_deg": float(centre.ra.deg),
        "center_dec_deg": float(centre.dec.deg),
        "pixel_scale_arcsec": pix,
        "channel_width_kms": dv,
        "beam_major_arcsec": bmaj,
        "beam_minor_arcsec": bmin,
        "beam_pa_deg": bpa,
        "noise_rms_jy_beam": noise,
        "distance_mpc": dist,
        "total_flux_jy_kms": total_flux,
        "max_projected_velocity_kms": float(np.nanmax(np.abs(v_map - v_sys))),
        "channel_velocity_kms": _frozen(v_chan),
        "radius_arcsec": _frozen(r_curve),
        "radius_kpc": _frozen(r_curve * kpc_per_arcsec),
        "rotation_velocity_kms": _frozen(_rotation_curve(r_curve, v_flat, r_turn)),
        "surface_brightness_face_on_jy_beam_kms": _frozen(
            sb_peak / profile_norm
            * _surface_profile(r_curve, r_d, r_hole, depth, r_out, edge_width)),
        "velocity_los_kms": _frozen(v_map),
        "radius_map_arcsec": _frozen(radius_c),
        "moment0_intrinsic_jy_beam_kms": _frozen(mom0_intr),
        "moment0_jy_beam_kms": _frozen(mom0_smooth),
        "moment1_beam_smeared_kms": _frozen(mom1),
        "moment2_beam_smeared_kms": _frozen(mom2),
    }
    return DemoCube(name="galaxy_hi", hdu=hdu, truth=truth)


# ----------------------------------------------------------------------------------
# the nebula
# ----------------------------------------------------------------------------------
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


def make_nebula(
    *,
    seed: int = 2,
    shape: tuple[int, int] = (64, 64),
    pixel_scale=1.0 * u.arcsec,
    wavelength_range=(6538.0, 6594.0) * u.AA,
    channel_width=0.25 * u.AA,
    resolving_power: float = 12000.0,
    systemic_velocity=12.0 * _KMS,
    velocity_amplitude=25.0 * _KMS,
    temperature_range=(8000.0, 12000.0) * u.K,
    nonthermal_range=(5.0, 20.0) * _KMS,
    nii_ratio_range=(0.3, 0.5),
    halpha_peak_flux: float = 400.0,
    noise_rms: float = 1.0,
    continuum: float = 0.0,
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
        Flat continuum level (default none).
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
    seed = _seed(seed)
    ny, nx = _shape(shape, "shape")
    pix = _scalar(pixel_scale, u.arcsec, "pixel_scale", low=0, low_open=True)
    lam_start, lam_stop = _pair(wavelength_range, u.AA, "wavelength_range")
    dlam = _scalar(channel_width, u.AA, "channel_width", low=0, low_open=True)
    res = _scalar(resolving_power, u.one, "resolving_power", low=100, high=1e6)
    v_sys = _scalar(systemic_velocity, _KMS, "systemic_velocity", low=-3000, high=3000)
    v_amp = _scalar(velocity_amplitude, _KMS, "velocity_amplitude", low=0, high=1000)
    t_lo, t_hi = _pair(temperature_range, u.K, "temperature_range")
    s_lo, s_hi = _pair(nonthermal_range, _KMS, "nonthermal_range")
    q_lo, q_hi = _pair(nii_ratio_range, u.one, "nii_ratio_range")
    for name, lo, hi, floor in (("temperature_range", t_lo, t_hi, 0.0),
                                ("nonthermal_range", s_lo, s_hi, 0.0),
                                ("nii_ratio_range", q_lo, q_hi, 0.0)):
        if not floor <= lo <= hi:
            raise KinemapError(f"'{name}' must be (low, high) with {floor:g} <= low <= high, "
                               f"got ({lo:g}, {hi:g})")
    f_peak = _scalar(halpha_peak_flux, u.one, "halpha_peak_flux", low=0, low_open=True)
    noise = _scalar(noise_rms, u.one, "noise_rms", low=0)
    cont = _scalar(continuum, u.one, "continuum")
    east0, north0 = _pair(center_offset, u.arcsec, "center_offset")
    ra0, dec0 = _pair(reference_position, u.deg, "reference_position")
    if not (0 <= ra0 < 360 and -90 < dec0 < 90):
        raise KinemapError(f"'reference_position' must be (RA in [0, 360), Dec in (-90, 90)) "
                           f"deg, got ({ra0:g}, {dec0:g}) deg")
    n_chan = int(math.floor((lam_stop - lam_start) / dlam + 1e-9)) + 1
    if n_chan < 16:
        raise KinemapError(f"'wavelength_range' holds only {n_chan} channels of "
                           f"{dlam:g} Angstrom; widen it or use narrower channels")
    lam = lam_start + dlam * np.arange(n_chan)

    # ---- line widths and coverage --------------------------------------------------
    sigma_instr = _C_KMS / res / _FWHM_PER_SIGMA
    sig_h_max = math.sqrt(float(_thermal_dispersion_kms(t_hi, _MASS_AMU["H"])) ** 2
                          + s_hi ** 2 + _HALPHA_FINE_STRUCTURE_KMS2 + sigma_instr ** 2)
    v_min, v_max = v_sys - v_amp, v_sys + v_amp
    blue = _AIR_WAVELENGTHS_ANGSTROM["nii6548"] * (1 + (v_min - 5 * sig_h_max) / _C_KMS)
    red = _AIR_WAVELENGTHS_ANGSTROM["nii6583"] * (1 + (v_max + 5 * sig_h_max) / _C_KMS)
    if lam[0] > blue or lam[-1] < red:
        raise KinemapError(
            f"'wavelength_range' ({lam[0]:.2f}-{lam[-1]:.2f} Angstrom) must cover "
            f"{blue:.2f}-{red:.2f} Angstrom to hold both [N II] lines; widen it")
    sig_lam_min = _AIR_WAVELENGTHS_ANGSTROM["nii6548"] * sigma_instr / _C_KMS
    if dlam > 1.5 * sig_lam_min:
        raise KinemapError(
            f"'channel_width' {dlam:g} Angstrom undersamples the instrumental profile "
            f"(sigma {sig_lam_min:.3f} Angstrom); use at most {1.5 * sig_lam_min:.3f} "
            f"Angstrom or a lower 'resolving_power'")

    # ---- smooth fields on the sky (arcsec from the nebula centre) -------------------
    x_ref, y_ref = nx // 2, ny // 2
    x_c = x_ref - east0 / pix
    y_c = y_ref + north0 / pix
    yy, xx = np.mgrid[0:ny, 0:nx].astype(float)
    east = -(xx - x_c) * pix
    north = (yy - y_c) * pix
    half_size = 0.5 * min(nx, ny) * pix
    # the shapes scale with the field so that any shape keeps the nebula in view
    r_ring, w_ring, r_core = 0.5 * half_size, 0.16 * half_size, 0.33 * half_size
    pa_major = math.radians(30.0)  # long axis of the elliptical shell, east of north
    along = east * math.sin(pa_major) + north * math.cos(pa_major)
    across = east * math.cos(pa_major) - north * math.sin(pa_major)
    r_ell = np.hypot(along, across / 0.8)
    radius = np.hypot(east, north)
    shape_ha = (np.exp(-0.5 * ((r_ell - r_ring) / w_ring) ** 2)
                + 0.35 * np.exp(-0.5 * (radius / r_core) ** 2))
    f_ha = f_peak * shape_ha / shape_ha.max()

    pa_grad = math.radians(60.0)  # direction of the velocity gradient, east of north
    u_grad = east * math.sin(pa_grad) + north * math.cos(pa_grad)
    w_grad = east * math.cos(pa_grad) - north * math.sin(pa_grad)
    # |0.8 tanh| + |0.2 sin| <= 1 keeps |v - v_sys| <= velocity_amplitude
    velocity = v_sys + v_amp * (0.8 * np.tanh(u_grad / (0.4 * half_size))
                                + 0.2 * np.sin(math.pi * w_grad / half_size))
    g_t = (0.7 * np.tanh(-north / (0.5 * half_size))
           + 0.3 * np.cos(math.pi * east / (1.2 * half_size)))
    temperature = 0.5 * (t_lo + t_hi) + 0.5 * (t_hi - t_lo) * g_t
    sigma_nt = s_lo + (s_hi - s_lo) * np.exp(-0.5 * (radius / (0.45 * half_size)) ** 2)
    ratio = q_lo + (q_hi - q_lo) * (1.0 - np.exp(-0.5 * (radius / (0.6 * half_size)) ** 2))
    f_n83 = ratio * f_ha
    f_n48 = f_n83 / 3.0

    sig_h = np.sqrt(_thermal_dispersion_kms(temperature, _MASS_AMU["H"]) ** 2
                    + sigma_nt ** 2 + _HALPHA_FINE_STRUCTURE_KMS2)
    sig_n = np.sqrt(_thermal_dispersion_kms(temperature, _MASS_AMU["N"]) ** 2
                    + sigma_nt ** 2)
    sig_h_obs = np.hypot(sig_h, sigma_instr)
    sig_n_obs = np.hypot(sig_n, sigma_instr)

    # ---- cube ------------------------------------------------------------------------
    data = np.full((n_chan, ny, nx), cont)
    for key, flux, sig in (("halpha", f_ha, sig_h_obs), ("nii6548", f_n48, sig_n_obs),
                           ("nii6583", f_n83, sig_n_obs)):
        lam0 = _AIR_WAVELENGTHS_ANGSTROM[key]
        centre = lam0 * (1.0 + velocity / _C_KMS)   # optical convention, exact
        sig_lam = lam0 * sig / _C_KMS
        data += (flux / (math.sqrt(2 * math.pi) * sig_lam)
                 * np.exp(-0.5 * ((lam[:, None, None] - centre) / sig_lam) ** 2))
    rng = np.random.default_rng(seed)
    if noise > 0:
        data += noise * rng.standard_normal(data.shape)

    # ---- header ------------------------------------------------------------------------
    restwav_vac = _air_to_vacuum_m(_AIR_WAVELENGTHS_ANGSTROM["halpha"] * 1e-10)
    hdu = fits.PrimaryHDU(data.astype(np.float32))
    hdr = hdu.header
    cards = [
        ("OBJECT", "demo nebula", "invented demo source, not a real object"),
        ("BUNIT", "10**(-20) erg/(s cm2 Angstrom)", "flux density per pixel"),
        *_celestial_cards("TAN", ra0, dec0, x_ref, y_ref, pix),
        ("CTYPE3", "AWAV", "air wavelength"), ("CUNIT3", "Angstrom", ""),
        ("CRVAL3", float(lam[0]), "[Angstrom] air wavelength of the first channel"),
        ("CRPIX3", 1.0, ""),
        ("CDELT3", dlam, "[Angstrom] channel width"),
        ("RESTWAV", restwav_vac, "[m] H-alpha rest wavelength IN VACUUM"),
        ("SPECSYS", "BARYCENT", "spectral reference frame"),
        ("RADESYS", "ICRS", ""),
        ("SPEC_RES", res, "resolving power lambda/FWHM of the instrument"),
        ("DEMOSEED", seed, "seed of the noise generator"),
    ]
    for key, value, comment in cards:
        hdr[key] = (value, comment)
    hdr["COMMENT"] = ("RESTWAV is the vacuum wavelength (FITS WCS Paper III); the air rest "
                      "wavelength of H-alpha is 6562.80 Angstrom.")
    hdr["HISTORY"] = "Invented demo cube made by kinemap.datasets.generate.make_nebula."
    hdr["HISTORY"] = "H-alpha + [N II] 6548/6583; optical velocity convention; no seeing."

    wcs = WCS(hdr).celestial
    centre_sky = wcs.pixel_to_world(x_c, y_c)
    fk = _FLUX_UNIT_KEY
    truth: dict[str, Any] = {
        "name": "nebula_halpha",
        "description": "invented H-alpha + [N II] cube of an ionised nebula (demo nebula)",
        "velocity_convention": "optical",
        "spectral_frame": "BARYCENT",
        "wavelength_medium": "air",
        "seed": seed,
        "rest_wavelength_air_halpha_angstrom": _AIR_WAVELENGTHS_ANGSTROM["halpha"],
        "rest_wavelength_air_nii6548_angstrom": _AIR_WAVELENGTHS_ANGSTROM["nii6548"],
        "rest_wavelength_air_nii6583_angstrom": _AIR_WAVELENGTHS_ANGSTROM["nii6583"],
        "restwav_header_vacuum_m": restwav_vac,
        "mass_hydrogen_amu": _MASS_AMU["H"],
        "mass_nitrogen_amu": _MASS_AMU["N"],
        "halpha_fine_structure_kms2": _HALPHA_FINE_STRUCTURE_KMS2,
        "resolving_power": res,
        "instrumental_dispersion_kms": sigma_instr,
        "nii_doublet_ratio": 3.0,
        "systemic_velocity_kms": v_sys,
        "velocity_amplitude_kms": v_amp,
        "channel_width_angstrom": dlam,
        "pixel_scale_arcsec": pix,
        "noise_rms_1e-20_erg_s_cm2_angstrom": noise,
        "continuum_1e-20_erg_s_cm2_angstrom": cont,
        "center_x_pix": float(x_c),
        "center_y_pix": float(y_c),
        "center_ra_deg": float(centre_sky.ra.deg),
        "center_dec_deg": float(centre_sky.dec.deg),
        "wavelength_air_angstrom": _frozen(lam),
        "velocity_kms": _frozen(velocity),
        "electron_temperature_k": _frozen(temperature),
        "nonthermal_dispersion_kms": _frozen(sigma_nt),
        f"halpha_flux_{fk}": _frozen(f_ha),
        f"nii6548_flux_{fk}": _frozen(f_n48),
        f"nii6583_flux_{fk}": _frozen(f_n83),
        "nii6583_halpha_ratio": _frozen(ratio),
        "halpha_dispersion_intrinsic_kms": _frozen(sig_h),
        "nii_dispersion_intrinsic_kms": _frozen(sig_n),
        "halpha_dispersion_observed_kms": _frozen(sig_h_obs),
        "nii_dispersion_observed_kms": _frozen(sig_n_obs),
    }
    return DemoCube(name="nebula_halpha", hdu=hdu, truth=truth)


# ----------------------------------------------------------------------------------
# writing
# ----------------------------------------------------------------------------------
def _json_value(value, full_arrays: bool):
    """Plain JSON value: NaN -> None, 1D arrays listed, 2D maps listed or summarised."""
    if isinstance(value, np.ndarray):
        if value.ndim <= 1 or full_arrays:
            return _nan_to_none(value.tolist())
        finite = value[np.isfinite(value)]
        if finite.size == 0:
            return {"shape": list(value.shape), "n_finite": 0}
        return {
            "shape": list(value.shape),
            "n_finite": int(finite.size),
            "min": float(finite.min()),
            "max": float(finite.max()),
            "mean": float(finite.mean()),
            "median": float(np.median(finite)),
        }
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    return value


def _nan_to_none(obj):
    if isinstance(obj, list):
        return [_nan_to_none(item) for item in obj]
    return obj if math.isfinite(obj) else None


def truth_to_json(truth: dict[str, Any], *, full_arrays: bool = False) -> dict[str, Any]:
    """JSON-ready copy of a truth dict.

    1D arrays are listed; 2D maps are summarised (shape, finite count, min, max, mean,
    median) unless ``full_arrays``, which lists them row by row (y, then x).  NaN
    becomes null.
    """
    out = {key: _json_value(value, full_arrays) for key, value in truth.items()}
    out["arrays_note"] = ("2D maps are listed row by row (y, x)" if full_arrays else
                          "2D maps are summarised; regenerate with kinemap.datasets.generate "
                          "and the same seed for the full arrays")
    return out


def write_demo_cubes(
    directory,
    *,
    seed: int | None = None,
    overwrite: bool = False,
    full_arrays: bool = False,
) -> dict[str, Path]:
    """Write both demo cubes and their truth to ``directory``.

    Parameters
    ----------
    directory : str or path-like
        Output folder (created if missing).
    seed : int, optional
        If given, the galaxy uses ``seed`` and the nebula ``seed + 1``; otherwise the
        defaults of :func:`make_disk_galaxy` and :func:`make_nebula`.
    overwrite : bool
        Replace existing files; otherwise an existing file is an error.
    full_arrays : bool
        List 2D truth maps in full in the JSON instead of summarising them.

    Returns
    -------
    dict[str, pathlib.Path]
        ``'galaxy_hi'`` -> demo_galaxy_hi.fits, ``'nebula_halpha'`` ->
        demo_nebula_halpha.fits, ``'truth_galaxy_hi'`` -> truth_galaxy_hi.json and
        ``'truth_nebula_halpha'`` -> truth_nebula_halpha.json.
    """
    try:
        out_dir = Path(directory)
    except TypeError:
        raise KinemapError(f"'directory' must be a path, got {directory!r}") from None
    if out_dir.exists() and not out_dir.is_dir():
        raise KinemapError(f"'directory' {str(out_dir)!r} is a file; give a folder path")
    kwargs_g: dict[str, Any] = {}
    kwargs_n: dict[str, Any] = {}
    if seed is not None:
        kwargs_g["seed"] = _seed(seed)
        kwargs_n["seed"] = _seed(seed) + 1
    targets = {}
    for name, stem in _FILE_STEMS.items():
        targets[name] = out_dir / f"{stem}.fits"
        targets[f"truth_{name}"] = out_dir / f"truth_{name}.json"
    if not overwrite:
        existing = [str(p) for p in targets.values() if p.exists()]
        if existing:
            raise KinemapError(f"'directory' already holds {existing[0]}; pass "
                               f"overwrite=True (--overwrite) or choose another folder")
    out_dir.mkdir(parents=True, exist_ok=True)
    for cube in (make_disk_galaxy(**kwargs_g), make_nebula(**kwargs_n)):
        cube.hdu.writeto(targets[cube.name], overwrite=True)
        with open(targets[f"truth_{cube.name}"], "w", encoding="utf-8") as fh:
            json.dump(truth_to_json(cube.truth, full_arrays=full_arrays), fh, indent=1)
            fh.write("\n")
    return targets
