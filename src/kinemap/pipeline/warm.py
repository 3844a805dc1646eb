"""Compile the map kernels at install time (``make setup``), not in a user's first run.

The fused noise-and-moments kernel compiles one version per noise and mask mode (about
20 s in all) and the continuum kernel a few seconds more; numba caches them
(:mod:`kinemap._kernel_cache`).  :func:`warm` runs the default ``maps --method moments``
stages, with the mask and noise modes a run can pick, on tiny invented cubes read from
FITS files (one with a continuum under its line), so the kernels compile with the argument
types real runs pass.  Blocks reach the kernels as float32 whatever the file stores
(:func:`kinemap.parallel.blocks.read_rows`), so no other data type needs compiling.
"""
from __future__ import annotations

import sys
import tempfile
import time
import warnings
from pathlib import Path


def warm() -> None:
    import numpy as np
    from astropy.io import fits

    from kinemap.pipeline.runner import run

    t0 = time.perf_counter()
    print("kinemap: compiling the map kernels (once; about a minute unless cached)", file=sys.stderr, flush=True)
    h = fits.Header()
    h["CTYPE1"], h["CRVAL1"], h["CDELT1"], h["CRPIX1"] = "RA---SIN", 150.0, -2e-3, 4.0
    h["CTYPE2"], h["CRVAL2"], h["CDELT2"], h["CRPIX2"] = "DEC--SIN", 20.0, 2e-3, 4.0
    h["CTYPE3"], h["CRVAL3"], h["CDELT3"], h["CRPIX3"], h["CUNIT3"] = "VRAD", -50.0, 2.0, 1.0, "km/s"
    h["BUNIT"] = "K"
    v = -50.0 + 2.0 * np.arange(48)
    rng = np.random.default_rng(0)
    data = np.exp(-0.5 * (v / 6.0) ** 2)[:, None, None] + rng.normal(0, 0.05, (48, 8, 8))
    with tempfile.TemporaryDirectory(prefix="kinemap-warm-") as tmp, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cube = Path(tmp) / "warm.fits"
        fits.PrimaryHDU(data.astype(np.float32), header=h).writeto(cube)
        for i, mask in enumerate(("none", "threshold", "smooth")):
            for line_free in ("auto", [[-50.0, -20.0]]):
                run({"input": {"cube": str(cube)},
                     "maps": {"method": "moments"},
                     "mask": {"method": mask},
                     "noise": {"line_free": line_free}},
                    out=Path(tmp) / f"o{i}{len(str(line_free))}", plots=False, progress=False)
        # a band wide enough for line-free channels and a continuum under the line: the
        # continuum kernel, and the moments of the subtracted cube (native byte order)
        h["CRVAL3"], h["CDELT3"] = -960.0, 40.0
        wide = Path(tmp) / "continuum.fits"
        fits.PrimaryHDU((data + 3.0).astype(np.float32), header=h).writeto(wide)
        for mask in ("none", "threshold", "smooth"):
            run({"input": {"cube": str(wide)}, "maps": {"method": "moments"},
                 "mask": {"method": mask}},
                out=Path(tmp) / f"c-{mask}", plots=False, progress=False)
    print(f"kinemap: map kernels ready and cached ({time.perf_counter() - t0:.0f} s)",
          file=sys.stderr, flush=True)


if __name__ == "__main__":
    warm()
