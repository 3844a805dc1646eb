"""Thermal physics and the per-pixel line-width budget."""
import dataclasses

import astropy.constants as const
import astropy.units as u
import numpy as np
import pytest
from scipy.optimize import curve_fit

from kinemap.errors import KinemapError
from kinemap.status import Status
from kinemap.widths import (
    K_OVER_AMU,
    channel_dispersion,
    get_line,
    sound_speed,
    thermal_dispersion,
    width_budget,
)

KMS = u.km / u.s
FS_HALPHA = 10.233  # km^2/s^2, Garcia-Diaz et al. 2008, RMxAA 44, 181 (from memory)


def th2(t_k, m_amu):
    """sigma_th^2 in km^2/s^2 computed directly with astropy.constants (reference)."""
    return (const.k_B * t_k * u.K / (m_amu * const.u)).to_value(KMS**2)


# ---------------------------------------------------------------- thermal physics

def test_thermal_dispersion_hydrogen_1e4K():
    # Spitzer 1978, Physical Processes in the ISM: H at 1e4 K has sigma = 9.08 km/s
    sig = thermal_dispersion(1e4 * u.K, 1.008 * u.u)
    assert sig.unit == KMS
    assert sig.value == pytest.approx(9.08, abs=0.005)
    # and with astropy.constants directly (reference library)
    assert sig.value == pytest.approx(np.sqrt(th2(1e4, 1.008)), rel=1e-12)


def test_thermal_dispersion_13co_10K():
    # shared/data/README.md: 13CO (29 amu) at 10 K is about 0.054 km/s
    assert thermal_dispersion(10 * u.K, get_line("13CO_1-0")).value == pytest.approx(0.054, abs=0.0005)


def test_thermal_dispersion_accepts_maps_and_celsius():
    t = np.array([[10.0, 100.0], [1e3, np.nan]]) * u.K
    sig = thermal_dispersion(t, 28.0)
    assert sig.shape == (2, 2) and np.isnan(sig[1, 1])
    np.testing.assert_allclose(sig.value[0], np.sqrt([th2(10, 28), th2(100, 28)]), rtol=1e-12)
    # 0 degC = 273.15 K through astropy's temperature equivalency
    assert thermal_dispersion(0 * u.deg_C, 28.0).value == pytest.approx(np.sqrt(th2(273.15, 28.0)), rel=1e-12)


def test_sound_speed_molecular_10K():
    # Kauffmann et al. 2008 (from memory): c_s = 0.188 km/s at 10 K for mu = 2.33
    assert sound_speed(10 * u.K).to_value(KMS) == pytest.approx(0.188, abs=0.0005)
    assert sound_speed(10 * u.K, mu=2.33).to_value(KMS) == pytest.approx(0.188, abs=0.0005)
    # ionized gas, mu = 0.6, 1e4 K: sqrt(kT / (0.6 m_H)) from astropy.constants (~11.7 km/s)
    ref = np.sqrt((const.k_B * 1e4 * u.K / (0.6 * 1.008 * const.u)).to_value(KMS**2))
    assert sound_speed(1e4 * u.K, mu=0.6).to_value(KMS) == pytest.approx(ref, rel=1e-12)


def test_channel_dispersion_top_hat():
    # A top-hat channel of width dv has sigma = dv / sqrt(12) (exact; DESIGN.md)
    assert channel_dispersion(66.42361 * u.m / u.s).to_value(KMS) == pytest.approx(0.06642361 / np.sqrt(12))
    assert channel_dispersion(-2.0 * KMS).to_value(KMS) == pytest.approx(2 / np.sqrt(12))


def test_k_over_amu_constant():
    # k_B / u from astropy.constants: 8.314 m^2 s^-2 K^-1 (the gas constant per gram; common practice)
    assert K_OVER_AMU == pytest.approx(8.314462618e-3, rel=1e-8)


@pytest.mark.parametrize("bad, match", [
    ("5 km/s", r"'temperature' must be in units convertible to K, got 5.0 km / s"),
    (5 * KMS, r"'temperature' must be in units convertible to K"),
    (-5 * u.K, r"'temperature' must be above 0 K"),
    ("hot", r"could not read 'temperature' = 'hot' as a number with a unit"),
])
def test_temperature_validation(bad, match):
    with pytest.raises(KinemapError, match=match):
        thermal_dispersion(bad, 1.008)
    with pytest.raises(KinemapError, match=match):
        width_budget({"Halpha": 20 * KMS}, {"Halpha": 0.1 * KMS}, intrinsic=True, temperature=bad)


def test_mu_validation():
    with pytest.raises(KinemapError, match=r"'mu' must be a positive number"):
        sound_speed(10 * u.K, mu=-1)
    with pytest.raises(KinemapError, match=r"'mu' is a mean particle mass in units of m_H"):
        sound_speed(10 * u.K, mu=2.33 * u.kg)


# ---------------------------------------------------------------- one line, assumed temperature

def test_single_line_observed_width_budget():
    # sigma_obs^2 = instr^2 + chan^2 + kT/m + fs + sigma_nt^2, all terms known
    t, snt, instr, chan = 8000.0, 12.0, 15.0, 2.0
    obs = np.sqrt(instr**2 + chan**2 + th2(t, 1.008) + FS_HALPHA + snt**2)
    sig = np.full((3, 4), obs) * KMS
    res = width_budget({"Halpha": sig}, {"Halpha": np.full((3, 4), 0.2) * KMS}, intrinsic=False,
                       instrumental=instr * KMS, channel=chan * KMS, temperature=t * u.K, mu=0.6)
    np.testing.assert_allclose(res.nonthermal_dispersion, snt, rtol=1e-12)
    np.testing.assert_allclose(res.thermal_dispersion, np.sqrt(th2(t, 1.008)), rtol=1e-12)
    np.testing.assert_allclose(res.temperature, t)
    assert res.temperature_err is None and not res.temperature_solved
    # error propagation: d(snt) = d(sigma^2) / (2 snt), Var(sigma^2) = 4 s^2 e^2 + 2 e^4
    expect_err = np.sqrt(4 * obs**2 * 0.2**2 + 2 * 0.2**4) / (2 * snt)
    np.testing.assert_allclose(res.nonthermal_dispersion_err, expect_err, rtol=1e-12)
    cs = np.sqrt(th2(t, 0.6 * 1.008))
    np.testing.assert_allclose(res.sound_speed, cs, rtol=1e-12)
    np.testing.assert_allclose(res.mach_number, np.sqrt(3) * snt / cs, rtol=1e-12)
    np.testing.assert_allclose(res.mach_number_err, np.sqrt(3) * expect_err / cs, rtol=1e-12)
    assert res.width_status.dtype == np.int16 and np.all(res.width_status == Status.OK)
    # the per-line map has instrument and channel removed, fine structure kept
    np.testing.assert_allclose(res.dispersions["Halpha"], np.sqrt(obs**2 - instr**2 - chan**2), rtol=1e-12)


def test_fine_structure_only_for_halpha():
    # Same intrinsic width for H-alpha and H-beta: the H-alpha sigma_nt is smaller because
    # 10.233 km^2/s^2 is fine structure (Garcia-Diaz et al. 2008; from memory); H-beta has
    # no fine-structure term in the catalogue.
    t, s = 1e4, 20.0
    ha = width_budget({"Halpha": s}, {"Halpha": 0.1}, intrinsic=True, temperature=t * u.K)
    hb = width_budget({"Hbeta": s}, {"Hbeta": 0.1}, intrinsic=True, temperature=t * u.K)
    assert ha.nonthermal_dispersion == pytest.approx(np.sqrt(s**2 - th2(t, 1.008) - FS_HALPHA), rel=1e-12)
    assert hb.nonthermal_dispersion == pytest.approx(np.sqrt(s**2 - th2(t, 1.008)), rel=1e-12)


def test_single_line_with_temperature_map_and_error_pull():
    # Seeded synthetic 13CO maps: known sigma_nt map and T map; pull test of the sigma_nt error
    rng = np.random.default_rng(20240611)
    ny, nx = 60, 70
    t_map = rng.uniform(8.0, 25.0, (ny, nx))
    snt_true = rng.uniform(0.3, 1.2, (ny, nx))
    chan = 0.0664 / np.sqrt(12)
    true_obs = np.sqrt(chan**2 + th2(t_map, 29.0) + snt_true**2)
    e = 0.02
    obs = true_obs + rng.normal(0, e, (ny, nx))
    res = width_budget({"13CO_1-0": obs * KMS}, {"13CO_1-0": np.full((ny, nx), e) * KMS},
                       intrinsic=False, instrumental=0 * KMS, channel=chan * KMS, temperature=t_map * u.K)
    pull = (res.nonthermal_dispersion - snt_true) / res.nonthermal_dispersion_err
    assert abs(np.mean(pull)) < 0.1
    assert 0.93 < np.std(pull) < 1.07
    np.testing.assert_allclose(res.temperature, t_map)


def test_temperature_error_propagates():
    # sigma_nt^2 = z - kT/m: Var adds (k/m)^2 Var(T); Mach error includes c_s error
    s, t, dt = 1.0, 10.0, 3.0
    res = width_budget({"13CO_1-0": s * KMS}, {"13CO_1-0": 0.0 * KMS}, intrinsic=True,
                       temperature=t * u.K, temperature_err=dt * u.K)
    b = s**2 - th2(t, 29.0)
    assert res.nonthermal_dispersion_err == pytest.approx(th2(dt, 29.0) / (2 * np.sqrt(b)), rel=1e-12)
    assert res.temperature_err == pytest.approx(dt)
    cs = np.sqrt(th2(t, 2.33 * 1.008))
    assert res.sound_speed_err == pytest.approx(cs * dt / (2 * t), rel=1e-12)
    # Monte Carlo check of the Mach-number error (seeded; first-order propagation to ~5 %)
    rng = np.random.default_rng(7)
    tt = t + dt * 0.05 * rng.standard_normal(200000)  # small errors: linear regime
    res_small = width_budget({"13CO_1-0": s}, {"13CO_1-0": 0.0}, intrinsic=True,
                             temperature=t * u.K, temperature_err=0.05 * dt * u.K)
    mach_mc = np.sqrt(3) * np.sqrt(s**2 - th2(tt, 29.0)) / np.sqrt(th2(tt, 2.33 * 1.008))
    assert res_small.mach_number_err == pytest.approx(np.std(mach_mc), rel=0.05)


# ---------------------------------------------------------------- several lines, fitted temperature

def _synthetic_optical(rng, shape, e):
    t = rng.uniform(6000.0, 12000.0, shape)
    snt = rng.uniform(10.0, 20.0, shape)
    instr, chan = 12.0, 3.0
    true = {}
    for name, m, fs in (("Halpha", 1.008, FS_HALPHA), ("NII_6583", 14.007, 0.0), ("SII_6716", 32.06, 0.0)):
        true[name] = np.sqrt(instr**2 + chan**2 + th2(t, m) + fs + snt**2)
    obs = {k: (v + rng.normal(0, e, shape)) * KMS for k, v in true.items()}
    errs = {k: np.full(shape, e) * KMS for k in true}
    return t, snt, instr, chan, true, obs, errs


def test_two_lines_exact_recovery_observed_and_intrinsic_agree():
    rng = np.random.default_rng(3)
    t, snt, instr, chan, true, _, _ = _synthetic_optical(rng, (20, 30), 0.1)
    two = {k: true[k] * KMS for k in ("Halpha", "NII_6583")}
    errs = {k: np.full((20, 30), 0.1) * KMS for k in two}
    res = width_budget(two, errs, intrinsic=False, instrumental=instr * KMS, channel=chan * KMS, mu=0.6)
    np.testing.assert_allclose(res.temperature, t, rtol=1e-8)
    np.testing.assert_allclose(res.nonthermal_dispersion, snt, rtol=1e-8)
    np.testing.assert_allclose(res.chi_square, 0, atol=1e-12)
    intr = {k: np.sqrt(v.value**2 - instr**2 - chan**2) * KMS for k, v in two.items()}
    res2 = width_budget(intr, errs, intrinsic=True, mu=0.6)
    np.testing.assert_allclose(res2.temperature, t, rtol=1e-8)
    np.testing.assert_allclose(res2.nonthermal_dispersion, snt, rtol=1e-8)
    assert res.temperature_solved and res.reference_line == "Halpha"


def test_multiline_recovery_and_temperature_pull():
    # Seeded synthetic pixels with known T and sigma_nt; three lines of masses 1, 14, 32 amu
    rng = np.random.default_rng(12345)
    shape = (50, 80)
    t, snt, instr, chan, _, obs, errs = _synthetic_optical(rng, shape, 0.15)
    res = width_budget(obs, errs, intrinsic=False, instrumental=instr * KMS, channel=chan * KMS, mu=0.6)
    ok = res.width_status == Status.OK
    assert ok.mean() > 0.99
    pull_t = (res.temperature[ok] - t[ok]) / res.temperature_err[ok]
    assert abs(pull_t.mean()) < 0.1
    assert 0.94 < pull_t.std() < 1.06
    pull_s = (res.nonthermal_dispersion[ok] - snt[ok]) / res.nonthermal_dispersion_err[ok]
    assert abs(pull_s.mean()) < 0.1
    assert 0.94 < pull_s.std() < 1.06
    # chi-square of the fit has n_lines - 2 = 1 degree of freedom: mean 1
    assert res.chi_square[ok].mean() == pytest.approx(1.0, abs=0.1)
    # the fitted covariance between T and sigma_nt matches the scatter of the estimates
    # (both are driven by the same noise); correlation from the returned covariance:
    rho = res.temperature_nonthermal_cov[ok] / (res.temperature_err[ok] * res.nonthermal_dispersion_err[ok])
    dt = res.temperature[ok] - t[ok]
    ds = res.nonthermal_dispersion[ok] - snt[ok]
    emp = np.corrcoef(dt / res.temperature_err[ok], ds / res.nonthermal_dispersion_err[ok])[0, 1]
    assert np.median(rho) == pytest.approx(emp, abs=0.05)


def test_weighted_fit_matches_scipy_curve_fit():
    # scipy.optimize.curve_fit (absolute_sigma=True) is the reference library for the
    # per-pixel weighted least squares and its covariance
    rng = np.random.default_rng(99)
    _, _, instr, chan, _, obs, errs = _synthetic_optical(rng, (2, 3), 0.3)
    res = width_budget(obs, errs, intrinsic=False, instrumental=instr * KMS, channel=chan * KMS)
    masses = np.array([1.008, 14.007, 32.06])
    fs = np.array([FS_HALPHA, 0, 0])
    for j in range(2):
        for i in range(3):
            s = np.array([obs[k].value[j, i] for k in ("Halpha", "NII_6583", "SII_6716")])
            e = np.full(3, 0.3)
            z = s**2 - instr**2 - chan**2 - fs
            zerr = np.sqrt(4 * s**2 * e**2 + 2 * e**4)
            popt, pcov = curve_fit(lambda x, a, b: a * x + b, 1 / masses, z, sigma=zerr, absolute_sigma=True)
            assert res.temperature[j, i] == pytest.approx(popt[0] / K_OVER_AMU, rel=1e-7)
            assert res.temperature_err[j, i] == pytest.approx(np.sqrt(pcov[0, 0]) / K_OVER_AMU, rel=1e-6)
            assert res.nonthermal_dispersion[j, i] == pytest.approx(np.sqrt(popt[1]), rel=1e-7)
            assert res.temperature_nonthermal_cov[j, i] == pytest.approx(
                pcov[0, 1] / K_OVER_AMU / (2 * np.sqrt(popt[1])), rel=1e-6)


def test_same_mass_lines_cannot_give_temperature():
    d = {"NII_6548": 20 * KMS, "NII_6583": 20 * KMS}
    with pytest.raises(KinemapError, match=r"'temperature' is needed: lines NII_6548, NII_6583 all have emitter mass 14.007 amu"):
        width_budget(d, d, intrinsic=True)
    with pytest.raises(KinemapError, match=r"'temperature' is needed: line Halpha alone cannot separate"):
        width_budget({"Halpha": 20 * KMS}, {"Halpha": 1 * KMS}, intrinsic=True)
    # with an assumed temperature, same-mass lines are combined by weighted mean
    res = width_budget({"NII_6548": 20.0, "NII_6583": 22.0}, {"NII_6548": 1.0, "NII_6583": 1.0},
                       intrinsic=True, temperature=1e4 * u.K)
    z = np.array([400.0, 484.0]) - th2(1e4, 14.007)
    w = 1 / (4 * np.array([400.0, 484.0]) + 2)
    assert res.nonthermal_dispersion == pytest.approx(np.sqrt(np.sum(w * z) / np.sum(w)), rel=1e-12)


# ---------------------------------------------------------------- status flags, NaN handling

def test_unphysical_and_nodata_flags_single_line():
    t = 1e4
    instr = 20.0
    thermal_plus_fs = np.sqrt(instr**2 + th2(t, 1.008) + FS_HALPHA)
    sig = np.array([[25.0, 19.0, thermal_plus_fs - 0.5, np.nan, 30.0]])
    err = np.array([[0.1, 0.1, 0.1, 0.1, np.nan]])
    res = width_budget({"Halpha": sig * KMS}, {"Halpha": err * KMS}, intrinsic=False,
                       instrumental=instr * KMS, channel=0 * KMS, temperature=t * u.K)
    assert res.width_status.tolist() == [[Status.OK, Status.UNPHYSICAL, Status.UNPHYSICAL,
                                          Status.NO_DATA, Status.NO_DATA]]
    assert np.isfinite(res.nonthermal_dispersion[0, 0])
    for arr in (res.nonthermal_dispersion, res.nonthermal_dispersion_err, res.mach_number,
                res.temperature, res.sound_speed, res.dispersions["Halpha"]):
        assert np.all(np.isnan(arr[0, 1:]))
    s = res.summary
    assert s["pixels"] == 5 and s["ok"] == 1 and s["unphysical"] == 2 and s["no_data"] == 2
    assert s["unphysical_below_instrument"] == 1 and s["unphysical_below_thermal"] == 1


def test_negative_fitted_temperature_is_unphysical():
    # heavier line broader than the lighter one -> kT < 0
    res = width_budget({"Halpha": [15.0, 20.0], "SII_6716": [18.0, 18.0]},
                       {"Halpha": [0.1, 0.1], "SII_6716": [0.1, 0.1]}, intrinsic=True)
    assert res.width_status.tolist() == [Status.UNPHYSICAL, Status.OK]
    assert res.summary["unphysical_negative_temperature"] == 1
    assert np.isnan(res.temperature[0]) and np.isfinite(res.temperature[1])


def test_zero_error_in_weighted_solve_fails_pixel():
    res = width_budget({"Halpha": [20.0, 20.0], "SII_6716": [18.0, 18.0]},
                       {"Halpha": [0.0, 0.1], "SII_6716": [0.0, 0.1]}, intrinsic=True)
    assert res.width_status.tolist() == [Status.FAILED, Status.OK]
    assert res.summary["failed"] == 1


def test_input_status_is_carried():
    sig = {"Halpha": np.full(4, 20.0), "NII_6583": np.full(4, 16.0)}
    err = {"Halpha": np.full(4, 0.2), "NII_6583": np.full(4, 0.2)}
    st = {"Halpha": np.array([Status.OK, Status.TOO_FAINT, Status.AT_BOUND, Status.OK]),
          "NII_6583": np.array([Status.OK, Status.MASKED, Status.OK, Status.NOT_CONVERGED])}
    res = width_budget(sig, err, intrinsic=True, input_status=st)
    assert res.width_status.tolist() == [Status.OK, Status.TOO_FAINT, Status.AT_BOUND, Status.NOT_CONVERGED]
    assert np.isfinite(res.temperature[2]) and np.isnan(res.temperature[1])
    with pytest.raises(KinemapError, match=r"'input_status\['Halpha'\]' must hold kinemap.status.Status codes"):
        width_budget(sig, err, intrinsic=True, input_status={"Halpha": np.array([0, 99, 0, 0])})


# ---------------------------------------------------------------- result object and products

def test_products_keys_units_and_immutability():
    sig = {"Halpha": np.full((2, 2), 20.0) * KMS, "SII_6716": np.full((2, 2), 15.0) * KMS}
    err = {k: np.full((2, 2), 0.2) * KMS for k in sig}
    before = {k: v.copy() for k, v in sig.items()}
    res = width_budget(sig, err, intrinsic=True)
    for k in sig:
        np.testing.assert_array_equal(sig[k], before[k])  # inputs untouched
    prods = res.products()
    keys = [p[0] for p in prods]
    assert keys == ["nonthermal_dispersion", "nonthermal_dispersion_err", "thermal_dispersion",
                    "temperature", "temperature_err", "sound_speed", "mach_number", "width_status",
                    "dispersion_Halpha", "dispersion_SII_6716"]
    units = {p[0]: p[2] for p in prods}
    assert units["temperature"] == "K" and units["mach_number"] == "" and units["sound_speed"] == "km/s"
    for key, arr, unit, desc in prods:
        assert arr.shape == (2, 2) and isinstance(desc, str) and desc
        assert u.Unit(unit) is not None  # unit strings parse (FITS BUNIT)
        assert not arr.flags.writeable
    with pytest.raises(dataclasses.FrozenInstanceError):
        res.temperature = None
    # assumed temperature without error: no temperature_err product
    res1 = width_budget({"Halpha": 20.0}, {"Halpha": 0.2}, intrinsic=True, temperature=1e4 * u.K)
    assert "temperature_err" not in [p[0] for p in res1.products()]


# ---------------------------------------------------------------- bad input

@pytest.mark.parametrize("kwargs, match", [
    (dict(dispersions={"Hgamma": 20.0}, dispersion_errors={"Hgamma": 1.0}, intrinsic=True),
     r"unknown line 'Hgamma'; known lines are Halpha"),
    (dict(dispersions={}, dispersion_errors={}, intrinsic=True), r"'dispersions' must be a non-empty mapping"),
    (dict(dispersions={"Halpha": 20.0}, dispersion_errors={}, intrinsic=True, temperature=1e4 * u.K),
     r"'dispersion_errors' lacks \['Halpha'\]"),
    (dict(dispersions={"Halpha": -20.0}, dispersion_errors={"Halpha": 1.0}, intrinsic=True, temperature=1e4 * u.K),
     r"'dispersions\['Halpha'\]' has negative values"),
    (dict(dispersions={"Halpha": 20.0}, dispersion_errors={"Halpha": -1.0}, intrinsic=True, temperature=1e4 * u.K),
     r"'dispersion_errors\['Halpha'\]' has negative values"),
    (dict(dispersions={"Halpha": 20 * u.K}, dispersion_errors={"Halpha": 1.0}, intrinsic=True, temperature=1e4 * u.K),
     r"'dispersions\['Halpha'\]' must be in units convertible to km / s"),
    (dict(dispersions={"Halpha": 20.0}, dispersion_errors={"Halpha": 1.0}, intrinsic=True,
          instrumental=10 * KMS, temperature=1e4 * u.K), r"'instrumental'/'channel' were given with intrinsic=True"),
    (dict(dispersions={"Halpha": 20.0}, dispersion_errors={"Halpha": 1.0}, intrinsic=False,
          channel=1 * KMS, temperature=1e4 * u.K), r"'instrumental' is needed when intrinsic=False"),
    (dict(dispersions={"Halpha": 20.0}, dispersion_errors={"Halpha": 1.0}, intrinsic="yes",
          temperature=1e4 * u.K), r"'intrinsic' must be True or False"),
    (dict(dispersions={"Halpha": np.ones((3, 4)), "NII_6583": np.ones((4, 3))},
          dispersion_errors={"Halpha": 1.0, "NII_6583": 1.0}, intrinsic=True),
     r"the input maps have shapes that do not fit together"),
    (dict(dispersions={"Halpha": 20.0}, dispersion_errors={"Halpha": 1.0}, intrinsic=True,
          temperature_err=1 * u.K, temperature=None), r"'temperature_err' was given without 'temperature'"),
    (dict(dispersions={"Halpha": 20.0, "NII_6583": 15.0}, dispersion_errors={"Halpha": 1.0, "NII_6583": 1.0},
          intrinsic=False, instrumental={"Halpha": 5 * KMS}, channel=0 * KMS),
     r"'instrumental' must have one entry per line"),
    (dict(dispersions={"Halpha": 20.0}, dispersion_errors={"Halpha": 1.0}, intrinsic=True,
          temperature=1e4 * u.K, mu=0), r"'mu' must be a positive number"),
])
def test_bad_input(kwargs, match):
    with pytest.raises(KinemapError, match=match):
        width_budget(**kwargs)


def test_intrinsic_has_no_default():
    with pytest.raises(TypeError, match="intrinsic"):
        width_budget({"Halpha": 20.0}, {"Halpha": 1.0}, temperature=1e4 * u.K)


def test_per_line_instrumental_mapping():
    # instrumental dispersion differing per line (e.g. constant delta-lambda spectrograph)
    t = 1e4
    snt = 10.0
    ins = {"Halpha": 15.0, "SII_6716": 14.0}
    sig = {"Halpha": np.sqrt(ins["Halpha"]**2 + th2(t, 1.008) + FS_HALPHA + snt**2),
           "SII_6716": np.sqrt(ins["SII_6716"]**2 + th2(t, 32.06) + snt**2)}
    res = width_budget(sig, {k: 0.1 for k in sig}, intrinsic=False,
                       instrumental={k: v * KMS for k, v in ins.items()}, channel=0 * KMS)
    assert res.temperature == pytest.approx(t, rel=1e-8)
    assert res.nonthermal_dispersion == pytest.approx(snt, rel=1e-8)
