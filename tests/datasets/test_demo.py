"""`kinemap demo` end to end on the invented demo cubes: every product, and the truth table."""
import json
import re

import pytest

from kinemap.cli import main


@pytest.fixture(scope="module")
def demo_out(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "out"
    cache = tmp_path_factory.mktemp("cache")
    mp = pytest.MonkeyPatch()
    mp.setenv("KINEMAP_CACHE", str(cache))
    try:
        assert main(["demo", "--out", str(out), "--no-progress"]) == 0
    finally:
        mp.undo()
    return out


def test_demo_writes_every_product_and_an_index(demo_out):
    html = (demo_out / "index.html").read_text()
    for name in ("galaxy_hi", "nebula_halpha", "dwarf_hi"):
        manifest = json.loads((demo_out / name / "manifest.json").read_text())
        for key, entry in manifest["products"].items():
            assert (demo_out / name / entry["path"]).exists(), key
            assert f"{name}/{entry['path']}" in html
        for fig in manifest["figures"].values():
            assert f"{name}/{fig['path']}" in html
        assert manifest["conventions"]["velocity_convention"] == {
            "galaxy_hi": "radio", "nebula_halpha": "optical", "dwarf_hi": "radio"}[name]


def test_demo_dwarf_shows_the_3d_fit(demo_out):
    """The dwarf's section carries the 3D figures and the 2D-vs-3D rows."""
    html = (demo_out / "index.html").read_text()
    for fig in ("rings3d_curve.png", "rings3d_channels.png", "rings3d_pv.png"):
        assert f"dwarf_hi/{fig}" in html
    assert "inclination (3D fit)" in html and "inclination (2D route)" in html
    assert "v_circ" in html


def test_demo_truth_table_agrees(demo_out):
    """Rows with a tolerance must be green: the measurement matches the invented truth."""
    html = (demo_out / "index.html").read_text()
    assert html.count("class='ok'") >= 4
    assert "class='off'" not in html, re.findall(r"<tr><td class='q'>([^<]*)</td><td class='off'>", html)


def test_demo_refuses_non_empty_output(demo_out, capsys):
    assert main(["demo", "--out", str(demo_out), "--no-progress"]) == 2
    assert "not empty" in capsys.readouterr().err
