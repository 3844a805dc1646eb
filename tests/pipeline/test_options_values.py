"""Option values that cannot be used: one line naming the option, exit 2, nothing written,
and before the cube is read.

The cube is a text file: had the run read it, the error would have been the reader's
("not a readable FITS file"), so the option's error proves it came first."""
from __future__ import annotations

import socket
import threading

import pytest

from conftest import run_cli


def _one_error_line(err):
    lines = [ln for ln in err.strip().splitlines() if not ln.startswith("kinemap: warning")]
    assert len(lines) == 1 and lines[0].startswith("kinemap: error: "), err
    assert "Traceback" not in err and "internal error" not in err
    return lines[0]


WIDTHS = ["widths", "--lines", "Halpha,NII_6583,NII_6548"]
BAD = [
    ("max-memory-inf", ["maps", "--max-memory", "inf"], "max_memory"),
    ("max-memory-nan", ["maps", "--max-memory", "nan"], "max_memory"),
    ("max-memory-negative", ["maps", "--max-memory=-1GB"], "max_memory"),
    ("max-memory-zero", ["maps", "--max-memory", "0"], "max_memory"),
    ("temperature-word", [*WIDTHS, "--temperature", "abc"], "temperature"),
    ("temperature-nan", [*WIDTHS, "--temperature", "nan K"], "finite temperature"),
    ("temperature-negative", [*WIDTHS, "--temperature=-20 K"], "above 0 K"),
    ("temperature-not-a-temperature", [*WIDTHS, "--temperature", "1e4 km"], "temperature"),
    ("temperature-err-negative", [*WIDTHS, "--temperature", "1e4 K", "--temperature-err=-1"],
     "temperature_err"),
    ("ratio-junk", [*WIDTHS, "--temperature", "1e4 K", "--ratio", "junk"], "flux ratios like"),
    ("ratio-unknown-lines", [*WIDTHS, "--temperature", "1e4 K", "--ratio", "FOO/BAR=3"],
     "'FOO', which is not a catalogue line"),
    ("ratio-nan", [*WIDTHS, "--temperature", "1e4 K", "--ratio", "NII_6583/NII_6548=nan"],
     "finite positive flux ratio"),
]


@pytest.mark.parametrize("name,args,match", BAD, ids=[b[0] for b in BAD])
def test_bad_value_is_one_line_before_reading(tmp_path, name, args, match):
    cube = tmp_path / "broken.fits"
    cube.write_text("not a FITS file")
    out = tmp_path / "out"
    code, _, err = run_cli(args[0], str(cube), *args[1:], "--out", str(out))
    assert code == 2, err
    line = _one_error_line(err)
    assert match in line, line
    assert "readable FITS" not in err
    assert not out.exists() and [p.name for p in tmp_path.iterdir()] == ["broken.fits"]


def test_region_that_is_a_folder(tmp_path):
    cube = tmp_path / "broken.fits"
    cube.write_text("not a FITS file")
    (tmp_path / "regions").mkdir()
    code, _, err = run_cli("maps", str(cube), "--region", str(tmp_path / "regions"),
                           "--out", str(tmp_path / "out"))
    assert code == 2
    assert "[input] region" in _one_error_line(err) and "is a folder" in err
    assert not (tmp_path / "out").exists()


def _not_a_scheduler():
    """A TCP service that answers everything with HTTP text (not dask's protocol)."""
    srv = socket.socket()
    srv.bind(("127.0.0.1", 0))
    srv.listen(8)

    def serve():
        while True:
            try:
                conn, _ = srv.accept()
            except OSError:
                return
            with conn:
                try:
                    conn.recv(1024)
                    conn.sendall(b"HTTP/1.1 400 Bad Request\r\nContent-Length: 0\r\n\r\n" * 50)
                except OSError:
                    pass

    threading.Thread(target=serve, daemon=True).start()
    return srv


def test_scheduler_that_is_not_dask(tmp_path):
    """Before: 'out of memory' (the HTTP reply read as a frame length)."""
    cube = tmp_path / "broken.fits"
    cube.write_text("not a FITS file")
    srv = _not_a_scheduler()
    try:
        port = srv.getsockname()[1]
        code, _, err = run_cli("maps", str(cube), "--scheduler", f"tcp://127.0.0.1:{port}",
                               "--out", str(tmp_path / "out"))
    finally:
        srv.close()
    assert code == 2
    line = _one_error_line(err)
    assert "is not a dask scheduler" in line and "memory" not in line.split("(")[0]
    assert not (tmp_path / "out").exists()
