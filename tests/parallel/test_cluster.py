"""Blocks on a dask.distributed cluster give the same maps as the in-process run."""
import os
import subprocess
import sys
import time
import warnings

import numpy as np
import pytest

from conftest import gaussian_cube, make_header, write_cube
from kinemap.io.reader import read_cube
from kinemap.maps.masks import make_mask
from kinemap.maps.moments import compute_moments
from kinemap.maps.noise import estimate_noise


@pytest.fixture(scope="module")
def client():
    from distributed import Client, LocalCluster

    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                           dashboard_address=None)
    c = Client(cluster)
    yield c
    c.close()
    cluster.close()


def test_local_cluster_equals_in_process(tmp_path, client):
    rng = np.random.default_rng(11)
    centre = 30 + 5 * rng.standard_normal((40, 36))
    data = gaussian_cube(64, 40, 36, centre_chan=centre, sigma_chan=4.0, noise=0.1, seed=12)
    h = make_header("VRAD", nchan=64, ny=40, nx=36, crval=-100.0, cdelt=4.0, cunit="km/s")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cube = read_cube(write_cube(tmp_path / "c.fits", data, h))
    small = 64 * 36 * 8 * 6 * 7  # a few rows per block, so there are several tasks
    local_noise = estimate_noise(cube, max_memory=small)
    dist_noise = estimate_noise(cube, max_memory=small, client=client)
    np.testing.assert_array_equal(local_noise.sigma, dist_noise.sigma)
    for method in ("threshold", "smooth"):
        mask = make_mask(cube, noise=local_noise, method=method)
        a = compute_moments(cube, mask=mask, noise=local_noise, max_memory=small)
        b = compute_moments(cube, mask=mask, noise=local_noise, max_memory=small, client=client)
        for key in ("moment0", "moment1", "moment2", "moment1_err", "peak", "nchan"):
            np.testing.assert_array_equal(getattr(a, key), getattr(b, key), err_msg=key)


def test_unreachable_scheduler_fails_fast(tmp_path, tmp_cube):
    path = tmp_cube("VRAD", crval=-100.0, cdelt=5.0, cunit="km/s")
    exe = os.path.join(os.path.dirname(sys.executable), "kinemap")
    t0 = time.perf_counter()
    p = subprocess.run([exe, "maps", path, "--out", str(tmp_path / "o"),
                        "--scheduler", "tcp://127.0.0.1:9"], capture_output=True, text=True,
                       timeout=120)
    elapsed = time.perf_counter() - t0
    assert p.returncode == 2, p.stderr
    assert "cannot reach the dask scheduler" in p.stderr and "Traceback" not in p.stderr
    assert elapsed < 30  # 5 s connection timeout plus start-up, not a hang
    assert not (tmp_path / "o").exists()


def test_max_memory_too_small_for_one_spectrum(tmp_path, tmp_cube):
    path = tmp_cube("VRAD", crval=-100.0, cdelt=5.0, cunit="km/s")
    exe = os.path.join(os.path.dirname(sys.executable), "kinemap")
    p = subprocess.run([exe, "maps", path, "--out", str(tmp_path / "o"), "--max-memory", "100B"],
                       capture_output=True, text=True, timeout=120)
    assert p.returncode == 2 and "cannot hold one spectrum" in p.stderr, p.stderr
