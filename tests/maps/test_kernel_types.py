"""After `make setup` (kinemap.pipeline.warm) no cube a user is likely to give makes numba
compile another version of a map kernel in the user's run (each costs 5-35 s in silence).

Blocks reach the kernels as float32 whatever the file stores (float64, scaled int16,
big-endian or native float32, a cube given as an array), a continuum-subtracted cube is a
native float32 cube, and the smooth mask works in blocks too.  A fresh interpreter runs the
warm-up, notes the versions every map kernel has, runs those cubes through `maps` with each
mask method and lists any kernel that gained a version.
"""
import json
import subprocess
import sys
from pathlib import Path

PROBE = r"""
import json, sys, warnings
from pathlib import Path
import numpy as np
from astropy.io import fits
warnings.simplefilter("ignore")
sys.path.insert(0, sys.argv[1])
from conftest import make_header
import kinemap
from kinemap.pipeline.warm import warm
from kinemap.pipeline.runner import run
from kinemap.maps import (_continuum_kernel, _fused_kernel, _moments_kernel, _noise_kernel,
                          _smooth_kernel)

def versions():
    out = {}
    for mod in (_continuum_kernel, _fused_kernel, _moments_kernel, _noise_kernel, _smooth_kernel):
        for name, obj in vars(mod).items():
            if hasattr(obj, "signatures") and hasattr(obj, "py_func"):
                out[f"{mod.__name__}.{name}"] = len(obj.signatures)
    return out

warm()
before = versions()
tmp = Path(sys.argv[2])
rng = np.random.default_rng(0)
v = -300 + 10.0 * np.arange(60)
d = np.exp(-0.5 * (v / 15.0) ** 2)[:, None, None] + rng.normal(0, 0.1, (60, 30, 30))
h = make_header("VRAD", nchan=60, ny=30, nx=30, crval=-300.0, cdelt=10.0, cunit="km/s")
cubes = {}
fits.writeto(tmp / "f64.fits", d.astype(">f8"), h); cubes["float64"] = tmp / "f64.fits"
hdu = fits.PrimaryHDU(d.astype(np.float32), h); hdu.scale("int16", bscale=1e-4)
hdu.writeto(tmp / "i16.fits"); cubes["int16"] = tmp / "i16.fits"
fits.writeto(tmp / "cont.fits", (d + 5.0).astype(np.float32), h); cubes["continuum"] = tmp / "cont.fits"
for name, path in cubes.items():
    for mask in ("none", "threshold", "smooth"):
        run({"input": {"cube": str(path)}, "maps": {"method": "moments"}, "mask": {"method": mask}},
            out=tmp / f"{name}-{mask}", plots=False, progress=False)
cube = kinemap.read_cube((d.astype("<f8"), h))        # an array in memory, float64
kinemap.compute_moments(cube, mask=kinemap.make_mask(cube))
after = versions()
print(json.dumps({k: [before.get(k, 0), n] for k, n in after.items() if n != before.get(k, 0)}))
"""


def test_no_map_kernel_compiles_again_after_the_warm_up(tmp_path):
    tests = Path(__file__).resolve().parents[1]
    p = subprocess.run([sys.executable, "-c", PROBE, str(tests), str(tmp_path)],
                       capture_output=True, text=True, timeout=900)
    assert p.returncode == 0, p.stderr[-2000:]
    grown = json.loads(p.stdout.strip().splitlines()[-1])
    assert grown == {}, f"kernels compiled again (versions before, after): {grown}"
