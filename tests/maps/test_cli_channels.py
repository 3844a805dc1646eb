"""`kinemap channels` through the command: pages, the PDF, the table, bad input, and the
demo and real cubes."""
from __future__ import annotations

import json

import numpy as np
import pytest
from astropy.table import Table

from conftest import run_cli


def _pdf_pages(path) -> int:
    """Pages of a PDF: its page objects (PDF 1.7, ISO 32000-1, 7.7.3.3; common practice)."""
    data = path.read_bytes()
    return data.count(b"/Type /Page\n") + data.count(b"/Type /Page ") + data.count(b"/Type /Page>")


@pytest.fixture(scope="module")
def galaxy():
    from kinemap.datasets.cache import demo_cube

    return demo_cube("galaxy_hi")


def test_demo_galaxy_channel_maps_are_paged(galaxy, tmp_path):
    out = tmp_path / "o"
    code, stdout, err = run_cli("channels", galaxy, "--every", "3", "--levels", "-3,3,9,27",
                                "--out", str(out), "--no-progress")
    assert code == 0, err
    assert "22 channel maps (3 channel(s) each) on 2 page(s)" in stdout  # ceil(64 / 3) = 22
    assert (out / "channel_maps_p1.png").exists() and (out / "channel_maps_p2.png").exists()
    assert not (out / "channel_maps_p3.png").exists()
    assert _pdf_pages(out / "channel_maps.pdf") == 2
    t = Table.read(out / "channel_maps.ecsv")
    assert len(t) == 22 and t["velocity"].unit == "km / s" and t["noise"].unit == "Jy / beam"
    assert t.meta["contour_levels_in_noise"] == [-3.0, 3.0, 9.0, 27.0]
    # the demo galaxy's band is centred on v_sys = 1500 km/s with 8 km/s channels (truth)
    assert np.mean(t["velocity"].value) == pytest.approx(1500.0 - 4.0 / 22, abs=8.0)
    # panel noise: 1 mJy/beam per channel (demo truth) over sqrt(3) channels
    assert np.median(t["noise"].value) == pytest.approx(1e-3 / np.sqrt(3), rel=0.15)
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["figures"]["channel_maps"]["path"] == "channel_maps.pdf"
    assert manifest["summary"]["channels"]["pages"] == 2


@pytest.mark.parametrize("args, message", [
    (["--every", "0"], "[channels] every must be a whole number of channels >= 1"),
    (["--levels", "3,x"], "must be numbers like '3,6,12'"),
    (["--levels", "0,3"], "'levels' must be non-zero multiples of the noise"),
])
def test_bad_options_are_one_line_and_exit_2(galaxy, tmp_path, args, message):
    code, _, err = run_cli("channels", galaxy, *args, "--out", str(tmp_path / "x"),
                           "--no-progress")
    assert code == 2, err
    lines = [x for x in err.strip().splitlines() if not x.startswith("kinemap: warning")]
    assert len(lines) == 1 and lines[0].startswith("kinemap: error"), err
    assert message in lines[0]
    assert not (tmp_path / "x").exists()


def test_real_cube_channel_maps(real_cube_path, tmp_path):
    out = tmp_path / "r"
    code, stdout, err = run_cli("channels", real_cube_path, "--every", "4", "--out", str(out),
                                "--no-progress")
    assert code == 0, err
    assert "14 channel maps" in stdout  # ceil(53 / 4)
    assert _pdf_pages(out / "channel_maps.pdf") == 1
    t = Table.read(out / "channel_maps.ecsv")
    # the cube's optical-convention LSRK axis (data README) is what the panels state
    assert t.meta["convention"] == "optical" and t.meta["frame"] == "LSRK"
