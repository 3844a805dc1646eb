"""Tests of the invented demo cubes (kinemap.datasets.generate).

The cubes are checked against things outside the generator: astropy's WCS (wcslib),
spectral-cube, astropy's Doppler equivalencies, SkyCoord position angles, radio_beam's
beam kernel and area, scipy's curve_fit, astropy.constants and published values; each
check names its source beside it.
"""
from __future__ import annotations

import dataclasses
import json
import math
import subprocess
import sys
import warnings
from pathlib import Path

import astropy.constants as const
import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import SkyCoord
from astropy.io import fits
from astropy.wcs import WCS
from scipy.optimize import curve_fit

from kinemap.datasets.generate import DemoCube, make_disk_galaxy, make_nebula, write_demo_cubes
from kinemap.errors import KinemapError

REPO = Path(__file__).resolve().parents[2]
C_KMS = const.c.to_value(u.km / u.s)
# HI 21 cm rest frequency (Hellwig et al. 1970; from memory).
HI_REST = 1420.405751768 * u.MHz
# Air rest wavelengths (NIST ASD; from memory).
HALPHA_AIR = 6562.80 * u.AA
NII6548_AIR = 6548.05 * u.AA
NII6583_AIR = 6583.45 * u.AA
# Vacuum H-alpha (NIST ASD; from memory): 6564.61 Angstrom.
HALPHA_VACUUM_AA = 6564.61


# ----------------------------------------------------------------------------------
# fixtures: each cube is made once per module (about a second in all)
# ----------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def galaxy() -> DemoCube:
    return make_disk_galaxy()


@pytest.fixture(scope="module")
def galaxy_clean() -> DemoCube:
    return make_disk_galaxy(noise_rms=0.0)


@pytest.fixture(scope="module")
def nebula() -> DemoCube:
    return make_nebula()


@pytest.fixture(scope="module")
def nebula_lines() -> DemoCube:
    """The nebula without its continuum: the line checks fit Gaussians alone."""
    return make_nebula(continuum=0.0, continuum_slope=0.0)


def _spectral_cube(hdu):
    spectral_cube = pytest.importorskip("spectral_cube")
    return spectral_cube.SpectralCube.read(hdu)


def _radio_velocities(header) -> np.ndarray:
    """Channel velocities (km/s) from the header through astropy's radio equivalency."""
    wcs = WCS(header)
    freq = wcs.spectral.pixel_to_world(np.arange(header["NAXIS3"]))
    # radio convention v = c (1 - f/f0): astropy.units.doppler_radio (reference library)
    return u.Quantity(freq).to_value(u.km / u.s, equivalencies=u.doppler_radio(HI_REST))


# ----------------------------------------------------------------------------------
# headers
# ----------------------------------------------------------------------------------
@pytest.mark.parametrize("which", ["galaxy", "nebula"])
def test_header_reads_with_astropy_wcs_and_spectral_cube(which, galaxy, nebula):
    cube = galaxy if which == "galaxy" else nebula
    spectral_cube = pytest.importorskip("spectral_cube")
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no FITSFixedWarning, no unit warnings
        wcs = WCS(cube.hdu.header)  # astropy.wcs / wcslib (reference library)
        sc = spectral_cube.SpectralCube.read(cube.hdu)  # spectral-cube (reference library)
        # BUNIT must parse as a FITS-standard unit string (astropy.units 'fits' format)
        unit = u.Unit(cube.hdu.header["BUNIT"], format="fits")
    assert wcs.naxis == 3 and wcs.has_celestial and wcs.has_spectral
    assert sc.shape == cube.hdu.data.shape
    assert cube.hdu.header["SPECSYS"] == "BARYCENT"
    # north up, east left (common practice for sky images)
    assert cube.hdu.header["CDELT1"] < 0 < cube.hdu.header["CDELT2"]
    if which == "galaxy":
        assert unit == u.Jy / u.beam and sc.unit == u.Jy / u.beam
        assert sc.beam.major.to_value(u.arcsec) == pytest.approx(16.0)
        assert sc.beam.minor.to_value(u.arcsec) == pytest.approx(12.0)
        assert sc.beam.pa.to_value(u.deg) == pytest.approx(30.0)
        assert wcs.wcs.restfrq == pytest.approx(HI_REST.to_value(u.Hz), rel=1e-12)
    else:
        assert unit == 1e-20 * u.erg / (u.s * u.cm ** 2 * u.AA)
        assert sc.unit == unit
        assert "BMAJ" not in cube.hdu.header
        assert wcs.wcs.ctype[2] == "AWAV"


def test_nebula_has_no_restwav_by_default(nebula):
    """Cubes holding many lines usually carry no RESTWAV; the demo nebula is such a cube."""
    assert "RESTWAV" not in nebula.hdu.header
    assert nebula.truth["restwav_in_header"] is False


def test_nebula_continuum_is_a_sloped_line_under_the_lines():
    """With the lines and the noise off, the cube is the continuum alone: level at the
    band's middle, +-slope at its ends (exact)."""
    c = make_nebula(noise_rms=0.0, halpha_peak_flux=1e-9)
    spec = c.hdu.data[:, 0, 0].astype(float)
    assert spec.mean() == pytest.approx(5.0, rel=1e-3)
    assert spec[-1] - spec[0] == pytest.approx(4.0, rel=1e-3)


def test_nebula_restwav_is_vacuum_and_wcslib_puts_zero_velocity_at_air_rest():
    nebula = make_nebula(write_restwav=True)
    hdr = nebula.hdu.header
    # RESTWAV is the vacuum rest wavelength in metres (FITS WCS Paper III, Greisen et al.
    # 2006; from memory); vacuum H-alpha is 6564.61 Angstrom (NIST ASD; from memory).
    assert hdr["RESTWAV"] * 1e10 == pytest.approx(HALPHA_VACUUM_AA, abs=0.01)
    spec = WCS(hdr).sub([3])
    spec.wcs.sptr("VOPT-???")  # wcslib's own AWAV -> optical velocity (reference library)
    lam_air = nebula.truth["wavelength_air_angstrom"]
    k = np.arange(lam_air.size)
    v_wcslib = spec.pixel_to_world_values(k) / 1e3
    # optical convention on the air axis with the air rest wavelength (astropy
    # doppler_optical, reference library); within +-100 km/s of the line the two agree
    # to a few m/s (the dispersion of air makes them drift apart by 0.01 km/s at 1400 km/s)
    v_air = (lam_air * u.AA).to_value(u.km / u.s, equivalencies=u.doppler_optical(HALPHA_AIR))
    near = np.abs(v_air) < 100
    assert near.sum() > 10
    np.testing.assert_allclose(v_wcslib[near], v_air[near], atol=0.003)


# ----------------------------------------------------------------------------------
# the galaxy: spectral axis, sky geometry, flux
# ----------------------------------------------------------------------------------
@pytest.mark.parametrize("frequency_increasing", [False, True])
def test_galaxy_velocity_axis_covers_the_rotation(frequency_increasing):
    cube = make_disk_galaxy(frequency_increasing=frequency_increasing, oversample=2)
    t = cube.truth
    v = _radio_velocities(cube.hdu.header)
    # the generator's channel velocities equal astropy's radio-convention velocities
    np.testing.assert_allclose(v, t["channel_velocity_kms"], atol=1e-6)
    assert np.all(np.diff(v) > 0) != frequency_increasing
    np.testing.assert_allclose(np.abs(np.diff(v)), t["channel_width_kms"], rtol=1e-9)
    reach = t["flat_velocity_kms"] * math.sin(math.radians(t["inclination_deg"]))
    assert v.min() < t["systemic_velocity_kms"] - reach - 3 * t["dispersion_kms"]
    assert v.max() > t["systemic_velocity_kms"] + reach + 3 * t["dispersion_kms"]


def _expected_velocity(truth, sky, centre):
    """Tilted-ring line-of-sight velocity (Begeman 1989, A&A 223, 47) at sky positions.

    The offset from the centre is taken from astropy's separation and position angle
    (east of north), not from the generator's pixel geometry.
    """
    sep = centre.separation(sky).to_value(u.arcsec)
    delta = np.radians(centre.position_angle(sky).to_value(u.deg) - truth["position_angle_deg"])
    inc = math.radians(truth["inclination_deg"])
    along = sep * np.cos(delta)
    across = sep * np.sin(delta) / math.cos(inc)
    radius = np.hypot(along, across)
    safe = np.where(radius > 0, radius, 1.0)
    cos_theta = np.where(radius > 0, along / safe, 1.0)
    # theta runs from the receding major axis towards PA + 90 deg (the documented far side)
    sin_theta = np.where(radius > 0, across / safe, 0.0)
    v_rot = truth["flat_velocity_kms"] * (1 - np.exp(-radius / truth["turnover_radius_arcsec"]))
    v_los = truth["systemic_velocity_kms"] + (
        v_rot * cos_theta + truth["expansion_velocity_kms"] * sin_theta) * math.sin(inc)
    return v_los, cos_theta, radius


def _peak_velocity(spectra, v_chan):
    """Velocity of the brightest channel, refined by a parabola through its neighbours."""
    k = np.clip(np.argmax(spectra, axis=0), 1, len(v_chan) - 2)
    idx = np.arange(spectra.shape[1])
    y0, y1, y2 = spectra[k - 1, idx], spectra[k, idx], spectra[k + 1, idx]
    denom = y0 - 2 * y1 + y2
    shift = np.where(denom < 0, 0.5 * (y0 - y2) / np.where(denom < 0, denom, -1), 0.0)
    dv = v_chan[1] - v_chan[0]
    return v_chan[k] + np.clip(shift, -0.5, 0.5) * dv


@pytest.mark.parametrize(
    "position_angle, frequency_increasing, expansion",
    [(140.0, False, 0.0), (320.0, True, 0.0), (35.0, False, 0.0), (250.0, False, 25.0)],
)
def test_galaxy_receding_side_follows_the_position_angle(position_angle, frequency_increasing,
                                                         expansion):
    cube = make_disk_galaxy(position_angle=position_angle, noise_rms=0.0,
                            frequency_increasing=frequency_increasing, oversample=3,
                            expansion_velocity=expansion)
    t = cube.truth
    wcs = WCS(cube.hdu.header)
    centre = SkyCoord(t["center_ra_deg"], t["center_dec_deg"], unit="deg")
    # 60 arcsec from the centre towards the PA (astropy directional_offset_by, position
    # angle east of north) is on the receding major axis; the opposite side approaches.
    for pa_offset, sign in ((0.0, +1), (180.0, -1)):
        sky = centre.directional_offset_by((position_angle + pa_offset) * u.deg, 60 * u.arcsec)
        x, y = (int(round(float(p))) for p in wcs.celestial.world_to_pixel(sky))
        spectrum = cube.hdu.data[:, y, x].astype(float)
        v_peak = _peak_velocity(spectrum[:, None], t["channel_velocity_kms"])[0]
        assert sign * (v_peak - t["systemic_velocity_kms"]) > 100.0

    # every well-lit pixel: brightest-channel velocity against the Begeman formula
    ny, nx = cube.hdu.data.shape[1:]
    yy, xx = np.mgrid[0:ny, 0:nx]
    sky = wcs.celestial.pixel_to_world(xx.ravel(), yy.ravel())
    v_exp, cos_theta, radius = _expected_velocity(t, sky, centre)
    spectra = cube.hdu.data.reshape(cube.hdu.data.shape[0], -1).astype(float)
    lit = (spectra.max(axis=0) > 0.3 * spectra.max()) & (radius > 40) & (radius < 130)
    v_peak = _peak_velocity(spectra[:, lit], t["channel_velocity_kms"])
    # beam smearing and the channel width (8 km/s) allow a few km/s of scatter
    assert np.median(np.abs(v_peak - v_exp[lit])) < 3.0
    assert np.percentile(np.abs(v_peak - v_exp[lit]), 95) < 10.0
    receding = cos_theta[lit] > 0.5
    approaching = cos_theta[lit] < -0.5
    assert receding.sum() > 50 and approaching.sum() > 50
    assert np.all(v_peak[receding] > t["systemic_velocity_kms"])
    assert np.all(v_peak[approaching] < t["systemic_velocity_kms"])


def test_galaxy_receding_side_survives_the_noise(galaxy):
    t = galaxy.truth
    wcs = WCS(galaxy.hdu.header)
    centre = SkyCoord(t["center_ra_deg"], t["center_dec_deg"], unit="deg")
    ny, nx = galaxy.hdu.data.shape[1:]
    yy, xx = np.mgrid[0:ny, 0:nx]
    sky = wcs.celestial.pixel_to_world(xx.ravel(), yy.ravel())
    v_exp, cos_theta, radius = _expected_velocity(t, sky, centre)
    spectra = galaxy.hdu.data.reshape(galaxy.hdu.data.shape[0], -1).astype(float)
    bright = spectra.max(axis=0) > 8 * t["noise_rms_jy_beam"]
    v_peak = _peak_velocity(spectra[:, bright], t["channel_velocity_kms"])
    side = np.sign(cos_theta[bright])
    strong = np.abs(cos_theta[bright]) > 0.5
    assert strong.sum() > 200
    right_side = np.sign(v_peak - t["systemic_velocity_kms"])[strong] == side[strong]
    assert right_side.mean() > 0.99


def _mirror_z(flux, line, sigma, shift):
    """(S_k - S_mirror) / (sqrt(2) sigma) for a mirror centred ``shift`` half-channels up."""
    n = flux.size
    k = np.arange(n)
    j = n - 1 - k + shift
    ok = (j >= 0) & (j < n) & line
    return (flux[k[ok]] - flux[j[ok]]) / (math.sqrt(2) * sigma)


def test_galaxy_flux_per_channel_is_symmetric_about_systemic(galaxy, galaxy_clean):
    t = galaxy.truth
    v = _radio_velocities(galaxy.hdu.header)
    v_sys = t["systemic_velocity_kms"]
    # the band is centred on v_sys: channel k mirrors channel n-1-k (checked via astropy)
    np.testing.assert_allclose(v + v[::-1], 2 * v_sys, atol=1e-6)

    # an elliptical aperture round the disk (astropy separations, tilted-ring geometry)
    # keeps the noise of the channel sums down
    wcs = WCS(galaxy.hdu.header)
    centre = SkyCoord(t["center_ra_deg"], t["center_dec_deg"], unit="deg")
    ny, nx = galaxy.hdu.data.shape[1:]
    yy, xx = np.mgrid[0:ny, 0:nx]
    _, _, radius = _expected_velocity(t, wcs.celestial.pixel_to_world(xx, yy), centre)
    aperture = radius < t["outer_radius_arcsec"] + 30
    flux = galaxy.hdu.data.astype(float)[:, aperture].sum(axis=1)

    # beam smearing mixes velocities but adds none beyond the largest projected one
    reach = t["max_projected_velocity_kms"] + 5 * t["dispersion_kms"] + t["channel_width_kms"]
    line_free = np.abs(v - v_sys) > reach
    assert line_free.sum() >= 8
    sigma = flux[line_free].std(ddof=1)  # noise of a channel sum, measured from the data
    line = ~line_free
    assert flux[line].max() > 8 * sigma
    z = _mirror_z(flux, line, sigma, 0)
    assert np.max(np.abs(z)) < 4.5
    assert np.mean(z ** 2) < 2.5
    # the same test about a centre 16 km/s off fails: it has the power to see that
    z_off = _mirror_z(flux, line, sigma, 4)
    assert np.mean(z_off ** 2) > 4.0
    # flux-weighted mean velocity (first moment of the integrated spectrum)
    v_mean = np.sum(v[line] * flux[line]) / np.sum(flux[line])
    v_err = sigma * math.sqrt(np.sum((v[line] - v_mean) ** 2)) / np.sum(flux[line])
    assert abs(v_mean - v_sys) < 3 * v_err
    # without noise the channel sums mirror each other to float32 rounding
    clean = galaxy_clean.hdu.data.astype(float).sum(axis=(1, 2))
    np.testing.assert_allclose(clean, clean[::-1], rtol=1e-5, atol=1e-6 * clean.max())


def test_galaxy_total_flux_and_beam_kernel_match_radio_beam(galaxy_clean):
    radio_beam = pytest.importorskip("radio_beam")
    from kinemap.datasets.galaxy import _beam_kernel

    t = galaxy_clean.truth
    hdr = galaxy_clean.hdu.header
    beam = radio_beam.Beam.from_fits_header(hdr)  # radio_beam (reference library)
    pix = t["pixel_scale_arcsec"] * u.arcsec
    beam_pix = (beam.sr / pix ** 2).decompose().value
    total = galaxy_clean.hdu.data.astype(float).sum() * t["channel_width_kms"] / beam_pix
    assert total == pytest.approx(t["total_flux_jy_kms"], rel=2e-3)
    # the smoothing kernel has radio_beam's orientation (PA east of north)
    reference = beam.as_kernel(pix, x_size=19, y_size=19).array
    ours = _beam_kernel(16.0 / 4.0, 12.0 / 4.0, 30.0)
    np.testing.assert_allclose(ours, reference / reference.sum(), atol=1e-12)


def test_galaxy_noise_free_moments_match_spectral_cube(galaxy_clean):
    sc = _spectral_cube(galaxy_clean.hdu)
    t = galaxy_clean.truth
    vel = sc.with_spectral_unit(u.km / u.s, velocity_convention="radio", rest_value=HI_REST)
    # spectral-cube moment1 with no mask (reference library), over the disk
    mom1 = vel.moment1().to_value(u.km / u.s)
    mom0 = vel.moment0().to_value(u.Jy / u.beam * u.km / u.s)
    ok = np.isfinite(t["moment1_beam_smeared_kms"])
    assert ok.sum() > 1000
    np.testing.assert_allclose(mom1[ok], t["moment1_beam_smeared_kms"][ok], atol=0.05)
    np.testing.assert_allclose(mom0, t["moment0_jy_beam_kms"], atol=1e-5, rtol=1e-5)


# ----------------------------------------------------------------------------------
# the nebula: Doppler shift and line widths
# ----------------------------------------------------------------------------------
def _bright_pixels(truth, n=3):
    flux = truth["halpha_flux_1e-20_erg_s_cm2"]
    order = np.argsort(flux, axis=None)[::-1]
    picks = [np.unravel_index(order[0], flux.shape)]
    # also a pixel of middling brightness with a different temperature and dispersion
    mid = np.argmin(np.abs(flux - 0.3 * flux.max()))
    picks.append(np.unravel_index(mid, flux.shape))
    return picks[:n]


def test_nebula_halpha_centroid_follows_the_doppler_formula(nebula_lines):
    t = nebula_lines.truth
    lam = WCS(nebula_lines.hdu.header).spectral.pixel_to_world(
        np.arange(nebula_lines.hdu.header["NAXIS3"])).to_value(u.AA)
    np.testing.assert_allclose(lam, t["wavelength_air_angstrom"], atol=1e-6)
    for y, x in _bright_pixels(t):
        spec = nebula_lines.hdu.data[:, y, x].astype(float)
        near = np.abs(lam - HALPHA_AIR.value) < 3.0
        k = np.flatnonzero(near)[np.argmax(spec[near])]
        win = slice(k - 8, k + 9)  # +-2 Angstrom, about +-5 sigma
        centroid = np.sum(lam[win] * spec[win]) / np.sum(spec[win])
        v_true = t["velocity_kms"][y, x]
        # lambda_obs = lambda_rest (1 + v/c), optical convention (common practice)
        expected = HALPHA_AIR.value * (1 + v_true / C_KMS)
        err = 0.5  # km/s, far above the centroid noise at this S/N
        assert centroid == pytest.approx(expected, abs=err / C_KMS * HALPHA_AIR.value)
        # and through astropy's doppler_optical equivalency (reference library)
        v_astropy = (centroid * u.AA).to_value(u.km / u.s,
                                               equivalencies=u.doppler_optical(HALPHA_AIR))
        assert v_astropy == pytest.approx(v_true, abs=err)


def _three_gaussians(lam, a_ha, c_ha, s_ha, a_48, c_48, s_48, a_83, c_83, s_83, base):
    out = np.full_like(lam, base)
    for a, c, s in ((a_ha, c_ha, s_ha), (a_48, c_48, s_48), (a_83, c_83, s_83)):
        out += a / (math.sqrt(2 * math.pi) * s) * np.exp(-0.5 * ((lam - c) / s) ** 2)
    return out


def _thermal_sigma2(temperature, mass_amu):
    """k T / m in km^2/s^2 (astropy.constants, reference library)."""
    return (const.k_B * temperature * u.K / (mass_amu * const.u)).to_value(u.km ** 2 / u.s ** 2)


def test_thermal_width_reference_value():
    # hydrogen at 1e4 K: 9.08 km/s (Spitzer 1978, Physical Processes in the ISM);
    # 1.008 amu is hydrogen's standard atomic weight (IUPAC; from memory)
    assert math.sqrt(_thermal_sigma2(1e4, 1.008)) == pytest.approx(9.08, abs=0.01)


def _fit_three_lines(spec, lam, noise):
    """Fit H-alpha + [N II] 6548/6583 + a constant with scipy curve_fit (reference library)."""
    guess = []
    for rest in (HALPHA_AIR, NII6548_AIR, NII6583_AIR):
        near = np.abs(lam - rest.value) < 2.0
        guess += [spec[near].sum() * (lam[1] - lam[0]), lam[near][np.argmax(spec[near])], 0.4]
    popt, pcov = curve_fit(_three_gaussians, lam, spec, p0=guess + [0.0],
                           sigma=np.full_like(spec, noise), absolute_sigma=True)
    return popt, np.sqrt(np.diag(pcov))


# H-alpha fine structure adds 10.233 km^2/s^2 (Garcia-Diaz et al. 2008, RMxAA 44, 181;
# from memory)
FINE_STRUCTURE_KMS2 = 10.233


def _width_budget(truth, y, x, sigma_instr, *, fine_structure=FINE_STRUCTURE_KMS2):
    """Expected observed sigma (km/s) of H-alpha and [N II]:
    sqrt(kT/m + sigma_nt^2 (+ fine structure) + sigma_instr^2)."""
    temp = truth["electron_temperature_k"][y, x]
    s_nt = truth["nonthermal_dispersion_kms"][y, x]
    # 1.008 and 14.007 amu: standard atomic weights of H and N (IUPAC; from memory)
    ha = math.sqrt(_thermal_sigma2(temp, 1.008) + s_nt ** 2 + fine_structure + sigma_instr ** 2)
    nii = math.sqrt(_thermal_sigma2(temp, 14.007) + s_nt ** 2 + sigma_instr ** 2)
    return ha, nii


def _sigma_instr(header):
    # instrumental sigma from the resolving power: FWHM = c / R (common practice)
    return C_KMS / header["SPEC_RES"] / 2.35482


def test_nebula_line_widths_match_the_budget(nebula_lines):
    t = nebula_lines.truth
    lam = t["wavelength_air_angstrom"]
    noise = t["noise_rms_1e-20_erg_s_cm2_angstrom"]
    sigma_instr = _sigma_instr(nebula_lines.hdu.header)
    for y, x in _bright_pixels(t):
        spec = nebula_lines.hdu.data[:, y, x].astype(float)
        popt, perr = _fit_three_lines(spec, lam, noise)
        expected = _width_budget(t, y, x, sigma_instr)
        for rest, i, exp in ((HALPHA_AIR, 0, expected[0]), (NII6583_AIR, 6, expected[1])):
            sigma_fit = abs(popt[i + 2]) / rest.value * C_KMS
            sigma_err = perr[i + 2] / rest.value * C_KMS
            assert abs(sigma_fit - exp) < 4 * sigma_err, (rest, sigma_fit, sigma_err, exp)
        # [N II] 6583 / 6548 = 3.0 (atomic transition probabilities; common practice)
        ratio = popt[6] / popt[3]
        ratio_err = ratio * math.hypot(perr[6] / popt[6], perr[3] / popt[3])
        assert abs(ratio - 3.0) < 4 * ratio_err
        nii_ha = popt[6] / popt[0]
        assert nii_ha == pytest.approx(t["nii6583_halpha_ratio"][y, x], rel=0.03)
        # all three lines share one velocity through lambda_rest (1 + v/c)
        for rest, i in ((HALPHA_AIR, 0), (NII6548_AIR, 3), (NII6583_AIR, 6)):
            v_fit = (popt[i + 1] / rest.value - 1) * C_KMS
            v_err = perr[i + 1] / rest.value * C_KMS
            assert abs(v_fit - t["velocity_kms"][y, x]) < 4 * v_err


def test_nebula_width_pulls_over_many_pixels(nebula_lines):
    """Pull test of the widths over many bright pixels: mean ~ 0, rms ~ 1."""
    t = nebula_lines.truth
    lam = t["wavelength_air_angstrom"]
    noise = t["noise_rms_1e-20_erg_s_cm2_angstrom"]
    sigma_instr = _sigma_instr(nebula_lines.hdu.header)
    peak = nebula_lines.hdu.data.max(axis=0)
    ys, xs = np.nonzero(peak > 60 * noise)
    pick = np.linspace(0, ys.size - 1, 60).astype(int)
    pulls, pulls_no_fs = [], []
    for y, x in zip(ys[pick], xs[pick]):
        popt, perr = _fit_three_lines(nebula_lines.hdu.data[:, y, x].astype(float), lam, noise)
        to_kms = C_KMS / HALPHA_AIR.value
        ha, nii = _width_budget(t, y, x, sigma_instr)
        ha_no_fs, _ = _width_budget(t, y, x, sigma_instr, fine_structure=0.0)
        pulls.append((abs(popt[2]) * to_kms - ha) / (perr[2] * to_kms))
        pulls.append((abs(popt[8]) - nii / C_KMS * NII6583_AIR.value) / perr[8])
        pulls_no_fs.append((abs(popt[2]) * to_kms - ha_no_fs) / (perr[2] * to_kms))
    pulls = np.array(pulls)
    assert abs(pulls.mean()) < 4 / math.sqrt(pulls.size)
    assert 0.7 < pulls.std() < 1.4
    # leaving out the fine-structure term would be seen: the test has the power
    assert np.mean(pulls_no_fs) > 2.0


def test_nebula_truth_fields_are_in_the_asked_ranges(nebula):
    t = nebula.truth
    temp, s_nt = t["electron_temperature_k"], t["nonthermal_dispersion_kms"]
    assert 8000 <= np.min(temp) < np.max(temp) <= 12000
    assert 5 <= np.min(s_nt) < np.max(s_nt) <= 20
    assert np.max(np.abs(t["velocity_kms"])) < 50
    assert 0.3 <= np.min(t["nii6583_halpha_ratio"]) < np.max(t["nii6583_halpha_ratio"]) <= 0.5
    np.testing.assert_allclose(
        t["nii6583_flux_1e-20_erg_s_cm2"] / t["nii6548_flux_1e-20_erg_s_cm2"], 3.0, rtol=1e-12)
    # H-alpha is detected at peak S/N > 10 over most of the nebula's bright half
    sig_lam = t["halpha_dispersion_observed_kms"] / C_KMS * HALPHA_AIR.value
    peak = t["halpha_flux_1e-20_erg_s_cm2"] / (math.sqrt(2 * math.pi) * sig_lam)
    assert np.mean(peak > 10 * t["noise_rms_1e-20_erg_s_cm2_angstrom"]) > 0.5


# ----------------------------------------------------------------------------------
# seeds, units, errors, immutability, files
# ----------------------------------------------------------------------------------
def test_same_seed_same_cube_and_noise_level():
    a = make_disk_galaxy(seed=7, oversample=2)
    b = make_disk_galaxy(seed=7, oversample=2)
    c = make_disk_galaxy(seed=8, oversample=2)
    clean = make_disk_galaxy(seed=7, oversample=2, noise_rms=0)
    np.testing.assert_array_equal(a.hdu.data, b.hdu.data)
    assert not np.array_equal(a.hdu.data, c.hdu.data)
    resid = a.hdu.data.astype(float) - clean.hdu.data
    assert resid.std() == pytest.approx(a.truth["noise_rms_jy_beam"], rel=0.03)
    n1, n2 = make_nebula(seed=3), make_nebula(seed=3, noise_rms=0.0)
    resid = n1.hdu.data.astype(float) - n2.hdu.data
    assert resid.std() == pytest.approx(n1.truth["noise_rms_1e-20_erg_s_cm2_angstrom"], rel=0.02)


def test_quantities_and_plain_numbers_give_the_same_cube():
    a = make_disk_galaxy(inclination=50 * u.deg, channel_width=8000 * u.m / u.s,
                         pixel_scale=4 / 3600 * u.deg, oversample=2)
    b = make_disk_galaxy(inclination=50.0, channel_width=8.0, pixel_scale=4.0, oversample=2)
    np.testing.assert_array_equal(a.hdu.data, b.hdu.data)
    c = make_nebula(channel_width=25 * u.pm, resolving_power=12000)
    d = make_nebula(channel_width=0.25)
    np.testing.assert_array_equal(c.hdu.data, d.hdu.data)


@pytest.mark.parametrize(
    "maker, kwargs, match",
    [
        (make_disk_galaxy, {"inclination": 95}, r"'inclination' must be in \[0, 85\]"),
        (make_disk_galaxy, {"inclination": 5 * u.km}, r"'inclination' must be in units"),
        (make_disk_galaxy, {"beam_minor": 20}, r"'beam_minor'.*must not exceed 'beam_major'"),
        (make_disk_galaxy, {"n_channels": 16}, r"'n_channels' x 'channel_width'"),
        (make_disk_galaxy, {"seed": -1}, r"'seed' must be a non-negative integer"),
        (make_disk_galaxy, {"shape": (5, 96)}, r"'shape\[0\] \(ny\)' must be an integer"),
        (make_disk_galaxy, {"noise_rms": -1}, r"'noise_rms' must be in \[0, inf\)"),
        (make_nebula, {"wavelength_range": (6555, 6600)}, r"'wavelength_range'.*must cover"),
        (make_nebula, {"channel_width": 0.6}, r"'channel_width'.*undersamples"),
        (make_nebula, {"temperature_range": (12000, 8000)}, r"'temperature_range' must be"),
    ],
)
def test_bad_input_raises_one_line_kinemap_error(maker, kwargs, match):
    with pytest.raises(KinemapError, match=match) as info:
        maker(**kwargs)
    assert "\n" not in str(info.value)


def test_results_are_immutable(nebula):
    with pytest.raises(dataclasses.FrozenInstanceError):
        nebula.truth = {}
    with pytest.raises(ValueError):
        nebula.truth["velocity_kms"][0, 0] = 0.0


def test_write_demo_cubes_round_trip(tmp_path):
    paths = write_demo_cubes(tmp_path / "out")
    assert set(paths) == {"galaxy_hi", "nebula_halpha", "truth_galaxy_hi", "truth_nebula_halpha",
                          "cloud_13co", "truth_cloud_13co", "dwarf_hi", "truth_dwarf_hi"}
    assert paths["galaxy_hi"].name == "demo_galaxy_hi.fits"
    assert paths["nebula_halpha"].name == "demo_nebula_halpha.fits"
    galaxy = make_disk_galaxy()
    with fits.open(paths["galaxy_hi"]) as hdul:
        np.testing.assert_array_equal(hdul[0].data, galaxy.hdu.data)
        assert hdul[0].header["RESTFRQ"] == galaxy.hdu.header["RESTFRQ"]
    truth = json.loads(paths["truth_galaxy_hi"].read_text())
    assert truth["systemic_velocity_kms"] == galaxy.truth["systemic_velocity_kms"]
    assert truth["rotation_velocity_kms"] == pytest.approx(
        list(galaxy.truth["rotation_velocity_kms"]))
    assert truth["velocity_los_kms"]["shape"] == [96, 96]
    neb = json.loads(paths["truth_nebula_halpha"].read_text())
    assert neb["electron_temperature_k"]["max"] <= 12000
    with pytest.raises(KinemapError, match="overwrite=True"):
        write_demo_cubes(tmp_path / "out")
    again = write_demo_cubes(tmp_path / "out", overwrite=True, full_arrays=True, seed=11)
    full = json.loads(again["truth_nebula_halpha"].read_text())
    assert np.array(full["velocity_kms"]).shape == (64, 64)
    with fits.open(again["nebula_halpha"]) as hdul:
        assert hdul[0].header["DEMOSEED"] == 12


def test_generate_script_writes_the_files(tmp_path):
    script = REPO / "demo_cubes" / "generate.py"
    run = subprocess.run([sys.executable, str(script), "--out", str(tmp_path)],
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stderr
    for name in ("demo_galaxy_hi.fits", "demo_nebula_halpha.fits",
                 "truth_galaxy_hi.json", "truth_nebula_halpha.json"):
        assert (tmp_path / name).is_file()
    rerun = subprocess.run([sys.executable, str(script), "--out", str(tmp_path)],
                           capture_output=True, text=True, timeout=120)
    assert rerun.returncode == 2
    assert "overwrite" in rerun.stderr and "Traceback" not in rerun.stderr


def test_dwarf_rotation_lags_the_circular_speed_by_the_asymmetric_drift():
    """The dwarf's truth curves obey V_c^2 = v_rot^2 + V_A^2 with V_A^2 = -R sigma^2
    dln(Sigma sigma^2)/dR (isotropic dispersion, thin disk; the usual HI form), evaluated
    here by differencing the published face-on profile, not by the generator's closed
    form; and its axis is radio velocity (astropy doppler_radio, reference library)."""
    from kinemap.datasets.generate import make_dwarf

    d = make_dwarf(noise_rms=0.0)
    t = d.truth
    v = _radio_velocities(d.hdu.header)
    np.testing.assert_allclose(v, t["channel_velocity_kms"], atol=1e-6)
    r = t["radius_arcsec"]
    sb = t["surface_brightness_face_on_jy_beam_kms"]
    inner = (r > 3.0) & (r < t["outer_radius_arcsec"] - 5 * t["edge_width_arcsec"])
    dln = np.gradient(np.log(sb * t["dispersion_kms"] ** 2), r)
    va2 = -r * t["dispersion_kms"] ** 2 * dln
    np.testing.assert_allclose(t["rotation_velocity_kms"][inner] ** 2 + va2[inner],
                               t["circular_velocity_kms"][inner] ** 2, rtol=0.02, atol=2.0)
    assert np.all(t["circular_velocity_kms"][inner] - t["rotation_velocity_kms"][inner] > 0.5)
    # the band holds the line: projected circular speed + 4 sigma on each side
    reach = t["circular_flat_velocity_kms"] * math.sin(math.radians(t["inclination_deg"]))
    assert np.ptp(v) / 2 > reach + 3 * t["dispersion_kms"]
    # flux sits where the geometry puts it: integrated cube peaks near the true centre
    mom0 = d.hdu.data.sum(axis=0)
    y, x = np.unravel_index(np.argmax(mom0), mom0.shape)
    assert abs(x - t["center_x_pix"]) <= 1.0 and abs(y - t["center_y_pix"]) <= 1.0
