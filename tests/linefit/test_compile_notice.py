"""The one-line notice before the fitting kernels compile (numba, ~40 s on first use)."""
import numpy as np

from kinemap.linefit import _compile
from kinemap.linefit.fit import fit_spectra


def test_notice_printed_once_when_kernels_need_compiling(monkeypatch, capsys):
    calls = []
    monkeypatch.setattr(_compile, "_checked", False)
    monkeypatch.setattr(_compile, "needs_compile", lambda: True)
    monkeypatch.setattr(_compile, "_compile_all", lambda: calls.append(1))
    _compile.announce_compile()
    _compile.announce_compile()
    err = capsys.readouterr().err
    assert err.count(_compile.MESSAGE) == 1
    assert "compiled in" in err and calls == [1]


def test_silent_when_cached(monkeypatch, capsys):
    monkeypatch.setattr(_compile, "_checked", False)
    monkeypatch.setattr(_compile, "needs_compile", lambda: False)
    monkeypatch.setattr(_compile, "_compile_all", lambda: 1 / 0)
    _compile.announce_compile()
    assert capsys.readouterr().err == ""


def test_kernels_count_as_compiled_after_a_fit(monkeypatch):
    # the detection itself: after a fit in this process every entry kernel is compiled,
    # and the notice's warm-up path fits without error
    monkeypatch.setattr(_compile, "_checked", True)
    v = np.linspace(-10.0, 10.0, 30)
    fit_spectra(np.exp(-0.5 * v ** 2 / 4.0)[None], 0.05, v)
    _compile._compile_all()
    assert not _compile.needs_compile()
    assert _compile.warm() is False
