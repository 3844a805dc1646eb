"""Compiled kernels are cached per user and version and survive a re-install.

A re-install is imitated by copying the package to a fresh folder twice (new files, new
time stamps, no ``__pycache__``) at the same path; each run is a fresh interpreter.
"""
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

SRC = Path(__file__).resolve().parents[1] / "src" / "kinemap"

PROBE = """
import json, os
import numpy as np
import kinemap
from kinemap.maps._noise_kernel import tile_noise
tile = np.array([[1.0], [-1.0], [0.5], [-0.5], [0.0]])  # one spectrum, channel by channel
sigma, kept, nfinite = np.empty(1), np.empty(1, np.int64), np.empty(1, np.int64)
tile_noise(tile, 1, 0, False, np.ones(5, np.bool_), 1.0, 3.0, 1.0, sigma, kept, nfinite)
s = tile_noise.stats
print(json.dumps({"dir": os.environ.get("NUMBA_CACHE_DIR"), "hits": sum(s.cache_hits.values()),
                  "misses": sum(s.cache_misses.values()), "kept": int(kept[0])}))
"""


def _install(site: Path):
    """Copy the package without its caches; files get new time stamps (copyfile)."""
    if site.exists():
        shutil.rmtree(site)
    shutil.copytree(SRC, site / "kinemap", copy_function=shutil.copyfile,
                    ignore=shutil.ignore_patterns("__pycache__"))


def _run(site: Path, cache_home: Path, **extra_env):
    env = {k: v for k, v in os.environ.items() if k not in ("NUMBA_CACHE_DIR", "PYTHONPATH")}
    env.update(PYTHONPATH=str(site), XDG_CACHE_HOME=str(cache_home), **extra_env)
    p = subprocess.run([sys.executable, "-c", PROBE], capture_output=True, text=True,
                       env=env, timeout=300, cwd=str(site))
    assert p.returncode == 0, p.stderr
    return json.loads(p.stdout.strip().splitlines()[-1])


def test_reinstall_of_the_same_version_reuses_compiled_kernels(tmp_path):
    site, cache_home = tmp_path / "site", tmp_path / "cache"
    _install(site)
    first = _run(site, cache_home)
    assert first["kept"] == 5
    version_dir = Path(first["dir"])
    assert version_dir.parent.parent == cache_home / "kinemap"
    assert version_dir.name == "numba"
    assert first["misses"] == 1 and first["hits"] == 0  # compiled and written
    assert list(version_dir.rglob("*.nbi")), "no cache index written under the user cache"
    assert not list((site / "kinemap").rglob("*.nbi"))  # nothing beside the sources

    _install(site)  # the re-install: same contents, new files
    second = _run(site, cache_home)
    assert second["dir"] == first["dir"]
    assert second["hits"] == 1 and second["misses"] == 0


def test_edited_source_recompiles(tmp_path):
    site, cache_home = tmp_path / "site", tmp_path / "cache"
    _install(site)
    _run(site, cache_home)
    kernel = site / "kinemap" / "maps" / "_noise_kernel.py"
    kernel.write_text(kernel.read_text() + "\n# edited\n")
    again = _run(site, cache_home)
    assert again["misses"] == 1 and again["hits"] == 0


def test_numba_cache_dir_set_by_the_user_is_kept(tmp_path):
    site, mine = tmp_path / "site", tmp_path / "mine"
    _install(site)
    out = _run(site, tmp_path / "cache", NUMBA_CACHE_DIR=str(mine))
    assert out["dir"] == str(mine)
    assert list(mine.rglob("*.nbi"))
    assert not (tmp_path / "cache" / "kinemap").exists()
