"""Size-linewidth from the maps against spectra averaged in the cube, and the sonic scale."""
import numpy as np
import pytest

import kinemap
from conftest import make_header
from kinemap.turbulence import fit_power_law, size_linewidth_arrays, sonic_scale
from kinemap.turbulence.linewidth import _box_sums, aperture_sizes


def test_apertures_equal_spectra_averaged_in_the_cube():
    """Reference: average the cube's spectra over each box and take the second moment of
    the average, channel by channel (brute force).  The maps give the same value through
    the law of total variance, exactly for moments over the same channels."""
    rng = np.random.default_rng(21)
    ny, nx, nchan = 24, 30, 200
    axis = np.linspace(-10, 10, nchan)
    v = rng.normal(0, 1.5, (ny, nx))
    s = rng.uniform(0.4, 1.0, (ny, nx))
    a = rng.uniform(0.5, 2.0, (ny, nx))
    cube = a * np.exp(-0.5 * ((axis[:, None, None] - v) / s) ** 2)
    h = make_header("VRAD", nchan=nchan, ny=ny, nx=nx, crval=axis[0],
                    cdelt=axis[1] - axis[0], cunit="km/s")
    mom = kinemap.compute_moments(kinemap.read_cube((cube, h)), mask=np.ones(cube.shape, bool),
                                  channel_response="none")
    m0, m1, m2 = (mom.arrays[k] for k in ("moment0", "moment1", "moment2"))
    res = size_linewidth_arrays(m0, m1, m2, pixel_scale=1.0)
    for b, sigma in zip(aperture_sizes((ny, nx)), res["sigma"]):
        spectra = np.stack([_box_sums(cube[k], b) for k in range(nchan)])  # (nchan, my, mx)
        w = spectra.sum(0)
        mean = (spectra * axis[:, None, None]).sum(0) / w
        disp = np.sqrt((spectra * (axis[:, None, None] - mean) ** 2).sum(0) / w)
        assert sigma == pytest.approx(disp.mean(), rel=1e-8)


def test_sonic_scale_of_an_exact_power_law():
    # sigma_nt = c_s (L / L_s)^0.5 (the usual form with Larson-like slope; common practice):
    # the fit and the inversion give back L_s
    sizes = np.geomspace(20, 800, 9)
    cs, ls = 0.188, 150.0  # c_s at 10 K, mu 2.33: 0.188 km/s (Kauffmann et al. 2008; from memory)
    sig = cs * (sizes / ls) ** 0.5
    fit = fit_power_law(sizes, sig, 0.02 * sig)
    out = sonic_scale(fit, cs, 0.0, sizes=sizes)
    assert out["scale"] == pytest.approx(ls, rel=1e-9)
    assert out["reached"]
    assert not sonic_scale(fit, 0.01, sizes=sizes)["reached"]  # far below the smallest size


def test_sonic_scale_errors_pass_a_pull_test():
    """Pull test: 5% Gaussian errors on the points and on c_s, 300 draws; the pulls of the
    sonic scale have unit spread (first-order propagation, so a loose band)."""
    rng = np.random.default_rng(8)
    sizes = np.geomspace(20, 800, 9)
    cs, ls = 0.188, 150.0
    true = cs * (sizes / ls) ** 0.5
    pulls = []
    for _ in range(300):
        sig = true * (1 + 0.05 * rng.standard_normal(sizes.size))
        c = cs * (1 + 0.05 * rng.standard_normal())
        out = sonic_scale(fit_power_law(sizes, sig, 0.05 * true), c, 0.05 * cs, sizes=sizes)
        pulls.append((out["scale"] - ls) / out["scale_err"])
    pulls = np.asarray(pulls)
    assert abs(np.median(pulls)) < 0.2
    assert 0.8 < np.std(pulls) < 1.25
