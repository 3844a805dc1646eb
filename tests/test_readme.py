"""The README's Python session runs as written, on the invented demo cubes, and gives the
values the demo scenarios were made with (their truth files)."""
from __future__ import annotations

import re
from pathlib import Path

import astropy.units as u
import numpy as np

README = Path(__file__).resolve().parents[1] / "README.md"


def _python_blocks() -> list[str]:
    text = README.read_text()
    section = text[text.index("## Python API"):]
    return re.findall(r"```python\n(.*?)```", section, flags=re.S)


def test_readme_python_session_runs(tmp_path, monkeypatch, capsys):
    blocks = _python_blocks()
    assert blocks, "the README has no Python session"
    monkeypatch.chdir(tmp_path)
    namespace: dict = {}
    exec(compile("\n".join(blocks), str(README), "exec"), namespace)
    out = capsys.readouterr().out
    assert "km / s" in out
    from kinemap.datasets import demo_cube, load_truth

    truth = load_truth(demo_cube("galaxy_hi"))
    rings = namespace["rings"]
    t = rings.table
    good = (np.asarray(t["status"]) == 0) & ~np.asarray(t["beam_smeared"])
    assert good.sum() >= 3
    assert abs(rings.summary()["position_angle_deg"] - truth["position_angle_deg"]) < 2.0
    assert (tmp_path / "galaxy-rings" / "rotation_curve.ecsv").exists()
    # the SpectralCube route gives the same moment 1
    assert float(np.nanmax(np.abs(namespace["same"].moment1 - namespace["moments"].moment1)
                           ).to_value(u.km / u.s)) < 1e-6
    widths = namespace["widths"]
    nebula = load_truth(demo_cube("nebula_halpha"))
    t_med = float(np.nanmedian(widths.temperature.to_value(u.K)))
    # the demo nebula's electron temperature map (its truth file); 700 K is the demo's own
    # tolerance for the median
    assert abs(t_med - float(np.nanmedian(nebula["electron_temperature_k"]))) < 700
