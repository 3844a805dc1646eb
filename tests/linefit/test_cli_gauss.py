"""`kinemap maps --method gauss`: products, real-cube widths, radio and optical axes."""
import json

import astropy.constants as const
import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits
from scipy.special import erf

from conftest import make_header, write_cube
from kinemap.cli import main
from kinemap.status import Status

C_KMS = const.c.to_value(u.km / u.s)


def test_real_cube_median_dispersion(real_cube_path, tmp_path):
    """13CO in a molecular cloud: median sigma 0.5-0.75 km/s where peak S/N > 8
    (a scipy curve_fit reference measured by the project gives 0.61 km/s)."""
    out = tmp_path / "o"
    assert main(["maps", real_cube_path, "--method", "gauss", "--no-mask", "--out", str(out),
                 "--no-plots", "--no-progress"]) == 0
    sigma = fits.getdata(out / "dispersion.fits")
    snr = fits.getdata(out / "snr.fits")
    status = fits.getdata(out / "fit_status.fits")
    good = (snr > 8) & (status == Status.OK)
    assert good.sum() > 1000
    assert 0.5 < np.median(sigma[good]) < 0.75
    manifest = json.loads((out / "manifest.json").read_text())
    for key in ("velocity", "velocity_err", "dispersion", "dispersion_err", "amplitude",
                "amplitude_err", "integrated", "baseline", "chi2_reduced", "fit_status", "n_components"):
        assert key in manifest["products"], key
    assert any("fit" in k for k in manifest["timings"])
    assert "STATCODE" in fits.getheader(out / "fit_status.fits")


def _tophat_line(edges_lo, edges_hi, amp, v0, sig):
    """Channel-averaged Gaussian over [lo, hi] (exact integral, common practice)."""
    a = (edges_lo - v0) / (np.sqrt(2) * sig)
    b = (edges_hi - v0) / (np.sqrt(2) * sig)
    return amp * sig * np.sqrt(np.pi / 2) * (erf(b) - erf(a)) / (edges_hi - edges_lo)


@pytest.mark.parametrize("axis", ["FREQ", "AWAV"])
def test_velocities_on_frequency_and_air_wavelength_axes(tmp_path, axis):
    """Lines placed with the radio convention on a frequency axis (astropy doppler_radio) and
    with lambda = lambda0 (1 + v/c) on an air-wavelength axis are found where they were put."""
    rng = np.random.default_rng(21)
    ny, nx, nchan = 12, 12, 96
    vtrue = rng.uniform(-40, 40, (ny, nx))
    sig = 12.0
    if axis == "FREQ":
        rest = 1420.405751768e6  # HI, Hellwig et al. 1970 (from memory)
        f0, df = rest * (1 + 150 / C_KMS), -rest * 4.0 / C_KMS  # ~4 km/s channels
        freqs = f0 + df * np.arange(nchan)
        edges = np.concatenate([[f0 - df / 2], freqs + df / 2])
        v_edges = (edges * u.Hz).to_value(u.km / u.s, equivalencies=u.doppler_radio(rest * u.Hz))
        h = make_header("FREQ", nchan=nchan, ny=ny, nx=nx, crval=f0, cdelt=df, cunit="Hz",
                        extra={"RESTFRQ": rest})
    else:
        rest_air = 6562.80  # H-alpha in air, NIST ASD (from memory)
        l0, dl = rest_air * (1 - 150 / C_KMS), 0.08
        lam = l0 + dl * np.arange(nchan)
        edges = np.concatenate([[l0 - dl / 2], lam + dl / 2])
        v_edges = C_KMS * (edges / rest_air - 1)  # optical convention
        h = make_header("AWAV", nchan=nchan, ny=ny, nx=nx, crval=l0, cdelt=dl, cunit="Angstrom",
                        extra={"RESTWAV": 6564.61289406447e-10})
    lo = np.minimum(v_edges[:-1], v_edges[1:])
    hi = np.maximum(v_edges[:-1], v_edges[1:])
    noise = 0.05
    data = _tophat_line(lo[:, None, None], hi[:, None, None], 1.0, vtrue[None], sig)
    data = data + rng.normal(0, noise, data.shape)
    path = write_cube(tmp_path / "c.fits", data, h)
    out = tmp_path / "o"
    assert main(["maps", path, "--method", "gauss", "--no-mask", "--out", str(out), "--no-plots",
                 "--no-progress"]) == 0
    v = fits.getdata(out / "velocity.fits")
    e = fits.getdata(out / "velocity_err.fits")
    s = fits.getdata(out / "dispersion.fits")
    pull = (v - vtrue) / e
    assert np.isfinite(pull).all()
    assert abs(np.mean(pull)) < 0.3 and 0.7 < np.std(pull) < 1.3
    assert np.median(s) == pytest.approx(sig, rel=0.03)


def test_two_components_and_model_cube(tmp_path):
    rng = np.random.default_rng(22)
    nchan, ny, nx = 120, 6, 6
    v = -240.0 + 4.0 * np.arange(nchan)
    lo, hi = v - 2.0, v + 2.0
    data = (_tophat_line(lo, hi, 1.0, -30.0, 10.0) + _tophat_line(lo, hi, 0.6, 40.0, 12.0))[:, None, None]
    data = data + rng.normal(0, 0.03, (nchan, ny, nx))
    h = make_header("VRAD", nchan=nchan, ny=ny, nx=nx, crval=-240.0, cdelt=4.0, cunit="km/s")
    path = write_cube(tmp_path / "c.fits", data, h)
    out = tmp_path / "o"
    assert main(["maps", path, "--method", "gauss", "--components", "auto", "--order", "velocity",
                 "--no-mask", "--write-model", "--out", str(out), "--no-plots", "--no-progress"]) == 0
    assert (fits.getdata(out / "n_components.fits") == 2).all()
    np.testing.assert_allclose(fits.getdata(out / "velocity_1.fits"), -30.0, atol=2.0)
    np.testing.assert_allclose(fits.getdata(out / "velocity_2.fits"), 40.0, atol=2.0)
    model = fits.getdata(out / "model.fits")
    resid = fits.getdata(out / "residual.fits")
    assert model.shape == (nchan, ny, nx)
    np.testing.assert_allclose(model + resid, data, atol=1e-5)
    assert np.std(resid) == pytest.approx(0.03, rel=0.1)
    hdr = fits.getheader(out / "model.fits")
    assert hdr["NAXIS"] == 3 and hdr["CTYPE3"].startswith("VRAD")
