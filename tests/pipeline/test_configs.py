"""The example configs in configs/ are valid, and the demo ones run end to end."""
from pathlib import Path

import pytest

from kinemap.cli import main
from kinemap.pipeline.config import load_config

CONFIGS = sorted((Path(__file__).resolve().parents[2] / "configs").glob("*.toml"))


def test_there_is_one_config_per_use_case():
    names = {p.stem for p in CONFIGS}
    assert {"disk_galaxy_hi", "nebula_halpha_nii", "molecular_cloud_13co"} <= names


@pytest.mark.parametrize("path", CONFIGS, ids=[p.stem for p in CONFIGS])
def test_config_is_valid(path):
    cfg = load_config(path)
    assert cfg["input"]["cube"].endswith(".fits")


@pytest.mark.parametrize("name,maker", [("disk_galaxy_hi", "make_disk_galaxy"),
                                        ("nebula_halpha_nii", "make_nebula")])
def test_demo_configs_run(tmp_path, name, maker):
    import kinemap.datasets.generate as dd

    cube = tmp_path / "cube.fits"
    getattr(dd, maker)().hdu.writeto(cube)
    text = (Path(__file__).resolve().parents[2] / "configs" / f"{name}.toml").read_text()
    text = "\n".join(f'cube = "{cube}"' if line.startswith("cube =") else line
                     for line in text.splitlines())
    cfg = tmp_path / f"{name}.toml"
    cfg.write_text(text)
    assert main(["run", str(cfg), "--out", str(tmp_path / "out")]) == 0
    assert (tmp_path / "out" / "manifest.json").exists()
