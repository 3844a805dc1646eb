"""The flux-conserving sub-channel shift of kinemap.stacking.shift."""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.special import erf

from kinemap.stacking.shift import fourier_shift, shift_to_rest, stack_axis


def _channel_gaussian(v, centre, sigma, dv):
    """Mean of a unit-area Gaussian over each channel [v - dv/2, v + dv/2] (the Gaussian
    integral through the error function; common practice)."""
    z = np.sqrt(2.0) * sigma
    return 0.5 * (erf((v + dv / 2 - centre) / z) - erf((v - dv / 2 - centre) / z)) / dv


@pytest.mark.parametrize("ascending", [True, False])
@pytest.mark.parametrize("velocity", [150.3, 133.0, 171.77, 128.6])
def test_gaussian_shifted_by_a_sub_channel_amount_is_the_analytic_shifted_gaussian(
        ascending, velocity):
    dv = 2.0
    v = 100.0 + dv * np.arange(64)
    if not ascending:
        v = v[::-1]
    spec = _channel_gaussian(v, velocity, 5.0, dv)
    axis = stack_axis(v)
    shifted, covered = shift_to_rest(spec[None], np.array([velocity]), axis)
    # analytic: the same channel-averaged Gaussian centred on offset 0 of the stack axis
    expected = _channel_gaussian(axis.offsets, 0.0, 5.0, dv)
    # the band cuts the line's tails 5.7 sigma out at worst (1e-7 of the peak there)
    assert np.abs(shifted[0] - expected).max() < 1e-7 * expected.max()
    assert covered[0].sum() == 64


def test_shift_matches_scipy_fourier_shift():
    # scipy.ndimage.fourier_shift (reference library) on the same zero-padded row; an odd
    # length has no Nyquist term, where the two would differ (scipy leaves it complex)
    from scipy import ndimage

    rng = np.random.default_rng(3)
    row = np.zeros(127)
    row[32:96] = rng.normal(size=64)
    for s in (0.5, -3.25, 10.9):
        ours = fourier_shift(row[None], np.array([s]))[0]
        ref = np.fft.ifft(ndimage.fourier_shift(np.fft.fft(row), s)).real
        assert np.allclose(ours, ref, rtol=0, atol=1e-12)
        assert np.isclose(ours.sum(), row.sum(), rtol=0, atol=1e-12)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(-40.0, 40.0), min_size=1, max_size=6), st.integers(0, 2 ** 31))
def test_shifting_conserves_flux_to_1e_6(shifts, seed):
    rng = np.random.default_rng(seed)
    nchan = 48
    v = -100.0 + 4.0 * np.arange(nchan)
    axis = stack_axis(v)
    spectra = rng.normal(0.0, 1.0, (len(shifts), nchan)) + 5.0
    vel = v[0] + (nchan - 1) * 4.0 * (np.asarray(shifts) + 40.0) / 80.0  # inside the band
    shifted, _ = shift_to_rest(spectra, vel, axis)
    total = spectra.sum(axis=1)
    assert np.all(np.abs(shifted.sum(axis=1) - total) <= 1e-6 * np.abs(total))


def test_nan_channels_count_as_missing():
    v = np.arange(32) * 1.0
    spec = np.ones((1, 32))
    spec[0, 10] = np.nan
    axis = stack_axis(v)
    shifted, covered = shift_to_rest(spec, np.array([16.0]), axis)
    assert covered[0].sum() == 31
    assert np.isclose(shifted.sum(), 31.0)
