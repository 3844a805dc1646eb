"""Start-up stays light: the command imports only what a run uses (structural, not timed).

Each check runs a fresh interpreter (this process has imported everything already) and
lists which heavy packages ended up in ``sys.modules``.
"""
import json
import os
import subprocess
import sys

from conftest import gaussian_cube, make_header, write_cube

# packages a `kinemap maps --method moments --no-plots` run has no use for
UNUSED_BY_MOMENTS = ("matplotlib", "dask", "distributed", "regions", "spectral_cube",
                     "scipy.optimize", "radio_beam")

PROBE = """
import json, sys
from kinemap import cli
try:
    cli.main(json.loads(sys.argv[1]))
except SystemExit as e:
    code = e.code
else:
    code = 0
print(json.dumps({"code": code, "modules": sorted(sys.modules)}))
"""


def _loaded(argv):
    env = dict(os.environ)
    src = os.path.join(os.path.dirname(os.path.dirname(__file__)), "src")
    env["PYTHONPATH"] = os.pathsep.join([src, env.get("PYTHONPATH", "")])
    p = subprocess.run([sys.executable, "-c", PROBE, json.dumps(argv)], capture_output=True,
                       text=True, timeout=300, env=env)
    assert p.returncode == 0, p.stderr
    out = json.loads(p.stdout.strip().splitlines()[-1])
    return out["code"], set(out["modules"])


def _heavy(modules, names):
    return sorted(n for n in names if n in modules)


def test_help_imports_no_science_stack():
    code, modules = _loaded(["maps", "--help"])
    assert code == 0
    assert _heavy(modules, ("matplotlib", "dask", "numba", "scipy", "astropy.wcs",
                            *UNUSED_BY_MOMENTS)) == []


def test_moments_run_without_plots_skips_unused_packages(tmp_path):
    cube = gaussian_cube(32, 6, 5, centre_chan=15.0, sigma_chan=3.0, noise=0.05)
    path = write_cube(tmp_path / "c.fits", cube, make_header("VRAD", nchan=32, ny=6, nx=5,
                                                             crval=0.0, cdelt=2000.0,
                                                             cunit="m/s"))
    code, modules = _loaded(["maps", path, "--method", "moments", "--no-mask", "--no-plots",
                             "--no-progress", "--out", str(tmp_path / "out")])
    assert code == 0
    assert (tmp_path / "out" / "moment1.fits").exists()
    assert _heavy(modules, UNUSED_BY_MOMENTS) == []
    # the run did import what it needs: the compiled moments kernels
    assert "numba" in modules


def test_moments_run_with_plots_draws_its_maps_in_other_processes(tmp_path):
    """With PNGs: where the run forks drawing processes (Linux, more than one core), they
    import matplotlib and the run's own process does not; elsewhere the run imports it
    (the counterpart: the probe does see a package a run uses)."""
    cube = gaussian_cube(32, 6, 5, centre_chan=15.0, sigma_chan=3.0, noise=0.05)
    path = write_cube(tmp_path / "c.fits", cube, make_header("VRAD", nchan=32, ny=6, nx=5,
                                                             crval=0.0, cdelt=2000.0,
                                                             cunit="m/s"))
    code, modules = _loaded(["maps", path, "--method", "moments", "--no-mask",
                             "--no-progress", "--out", str(tmp_path / "out")])
    assert code == 0
    assert (tmp_path / "out" / "moment1.png").exists()
    forks = sys.platform.startswith("linux") and (os.cpu_count() or 1) > 1
    assert ("matplotlib" in modules) is not forks
