"""Property tests: a header mutation of a valid cube ends in finite products or one clear error.

Whatever is done to one keyword of a small valid cube (removed, NaN, a string, zero, huge,
tiny, negative, a contradictory unit), reading it and taking its moment maps must either
give moment maps with finite values and velocities below the speed of light, or raise
:class:`KinemapError` with a one-line message: never another exception, never a hang.
The same holds for the command line (a few cases as subprocesses: exit 0, or exit 2 and
one line on stderr).  hypothesis draws the mutations, derandomised, so every run tries the
same examples.
"""
from __future__ import annotations

import signal
import warnings
from contextlib import contextmanager

import numpy as np
import pytest
from astropy.io import fits
from conftest import gaussian_cube, make_header, run_cli
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from kinemap.errors import KinemapError

C_KMS = 299792.458  # speed of light in km/s (common practice)
F0 = 1.420405751768e9  # HI rest frequency, Hz (Hellwig et al. 1970; from memory)
HANG_SECONDS = 120  # a guard against an endless loop, not a speed check

RAW_VALUES = st.sampled_from(["NaN", "'abc'", "0", "0.0", "1E30", "-1E30", "1E-30", "-1.0", "''",
                              "'km/s'", "'Hz'", "'deg'", "'K'", "T", "3"])


def _settings(n):
    # derandomized: every run draws the same examples; no shrinking (a failure prints the
    # example it failed on, which is one keyword and one value here)
    return settings(max_examples=n, derandomize=True, deadline=None, database=None,
                    phases=[Phase.explicit, Phase.generate], suppress_health_check=[HealthCheck.function_scoped_fixture,
                                           HealthCheck.too_slow])


def _valid_header():
    h = make_header("FREQ", nchan=24, ny=12, nx=10, crval=F0, cdelt=-4.7e4,
                    extra={"RESTFRQ": F0, "SPECSYS": "LSRK", "BMAJ": 5e-3, "BMIN": 5e-3,
                           "BPA": 0.0})
    h["CRPIX3"] = 12.5
    return h


def _cards(header, changes):
    """The header's 80-character cards with raw values set (None removes the keyword);
    raw text lets a card hold what astropy will not write (NaN, a wrong type)."""
    cards = [header.tostring()[i:i + 80] for i in range(0, len(header.tostring()), 80)]
    cards = [c for c in cards if c.strip() and not c.startswith("END ")]
    for key, raw in changes.items():
        cards = [c for c in cards if c[:8].rstrip() != key]
        if raw is not None:
            cards.append(f"{key:<8}= {raw:>20}".ljust(80)[:80])
    text = "".join(cards) + "END".ljust(80)
    return (text + " " * ((-len(text)) % 2880)).encode("ascii")


def _write(path, changes, data=None):
    h = _valid_header()
    if data is None:
        data = gaussian_cube(24, 12, 10, centre_chan=11.5, sigma_chan=2.0, amp=3.0, noise=0.1)
    raw = np.asarray(data, dtype=">f4").tobytes()
    with open(path, "wb") as fh:
        fh.write(_cards(h, changes) + raw + b"\0" * ((-len(raw)) % 2880))
    return str(path)


@contextmanager
def _no_hang():
    def stop(signum, frame):
        raise AssertionError(f"no answer after {HANG_SECONDS} s: a hang")
    old = signal.signal(signal.SIGALRM, stop)
    signal.alarm(HANG_SECONDS)
    try:
        yield
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, old)


def check_moments(path, mask=None):
    """The property: finite moment maps with |v| < c, or a one-line KinemapError.
    ``mask``: a mask method, run as the maps command runs it (noise, mask, moments)."""
    from kinemap import compute_moments, estimate_noise, make_mask, read_cube

    with _no_hang(), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            cube = read_cube(path)
            if mask is None:
                maps = compute_moments(cube)
            else:
                noise = estimate_noise(cube)
                maps = compute_moments(cube, noise=noise,
                                       mask=make_mask(cube, noise=noise, method=mask))
        except KinemapError as exc:
            msg = str(exc)
            assert msg and "\n" not in msg, f"not one line: {msg!r}"
            return "refused"
    m0, m1 = maps.arrays["moment0"], maps.arrays["moment1"]
    assert np.isfinite(m0).any(), "moment 0 has no finite value"
    if not np.isfinite(m1).any():
        # moment 1 is undefined where moment 0 is not positive (a cube scaled or offset
        # below zero, e.g. BSCALE or BZERO -1): legal FITS, an empty velocity map is right
        assert not (m0 > 0).any(), "moment 1 has no finite value where moment 0 is positive"
        return "ok"
    assert np.nanmax(np.abs(m1)) < C_KMS, f"moment 1 reaches {np.nanmax(np.abs(m1)):.4g} km/s"
    assert np.isfinite(cube.velocity).all(), "velocity axis not finite"
    return "ok"


# the keywords mutated one at a time: the axes, the rest value, the beam, scaling, frames
_KEYS = ["CTYPE3", "CRVAL3", "CDELT3", "CRPIX3", "CUNIT3", "RESTFRQ", "SPECSYS",
         "CTYPE1", "CRVAL1", "CDELT1", "CRPIX1", "CUNIT1", "CTYPE2", "CDELT2", "CUNIT2",
         "BMAJ", "BMIN", "BPA", "BUNIT", "BSCALE", "BZERO", "BLANK", "EQUINOX", "MJD-OBS"]


@pytest.mark.parametrize("key", _KEYS)
def test_one_keyword_mutated(tmp_path, key):
    """Remove or set one keyword to a drawn value (10 examples a keyword)."""
    @_settings(10)
    @given(raw=st.one_of(st.none(), RAW_VALUES))
    def prop(raw):
        check_moments(_write(tmp_path / "cube.fits", {key: raw}))
    prop()


@_settings(40)
@given(nchan=st.sampled_from([1, 2, 3, 5, 24]), ny=st.sampled_from([1, 2, 3, 12]),
       nx=st.sampled_from([1, 2, 10]), blank=st.sampled_from([0.0, 0.6, 0.95, 1.0]),
       mask=st.sampled_from(["smooth", "threshold", "none"]))
def test_odd_shapes_and_blank_spectra(tmp_path_factory, nchan, ny, nx, blank, mask):
    """Cubes of one channel, one row or column, or mostly blank spectra, through noise,
    mask and moments: finite maps or a one-line refusal."""
    rng = np.random.default_rng(5)
    data = gaussian_cube(nchan, ny, nx, centre_chan=nchan / 2, sigma_chan=1.5, amp=3.0,
                         noise=0.1, seed=6)
    data[:, rng.random((ny, nx)) < blank] = np.nan
    h = _valid_header()
    h["NAXIS1"], h["NAXIS2"], h["NAXIS3"] = nx, ny, nchan
    h["CRPIX3"] = (nchan + 1) / 2
    path = tmp_path_factory.mktemp("shape") / "cube.fits"
    fits.PrimaryHDU(data.astype(np.float32), h).writeto(path)
    check_moments(str(path), mask=mask)


_COMMAND_KEYS = ["CDELT3", "CUNIT3", "RESTFRQ", "CDELT1", "BMAJ", "BUNIT"]


@_settings(4)
@given(key=st.sampled_from(_COMMAND_KEYS), raw=st.one_of(st.none(), RAW_VALUES),
       command=st.sampled_from([("maps", "--method", "moments"), ("info",)]))
def test_command_line_answers_in_one_line(tmp_path_factory, key, raw, command):
    """The command itself, as a subprocess: exit 0, or exit 2 with one line on stderr
    (kinemap's own warnings may precede it); never a traceback, never an internal error."""
    folder = tmp_path_factory.mktemp("cli")
    path = _write(folder / "cube.fits", {key: raw})
    out = [] if command[0] == "info" else ["--out", str(folder / "o"), "--no-plots",
                                            "--no-progress"]
    code, stdout, stderr = run_cli(*command[:1], path, *command[1:], *out, timeout=HANG_SECONDS)
    lines = [ln for ln in stderr.splitlines() if ln.strip()]
    assert code in (0, 2), stderr
    assert "Traceback" not in stderr and "internal error" not in stderr, stderr
    if code == 2:
        assert lines[-1].startswith("kinemap: error: "), stderr
        assert all(ln.startswith("kinemap: warning") for ln in lines[:-1]), stderr
        assert not (folder / "o").exists(), "a refused run left an output folder"
