"""Say so before the fitting kernels compile, instead of sitting silent for ~40 s.

The kernels are compiled by numba on their first call and cached (``cache=True``) in the
per-user, per-version folder :mod:`kinemap._kernel_cache` sets, so only the first fit of a
version (or after the sources change) pays; re-installing the same version does not.  :func:`announce_compile` runs before the first kernel call of a
process: when a kernel has neither been compiled in this process nor has a usable cache
entry, it prints one line to stderr and, on a terminal, the seconds elapsed while numba
works.  :func:`warm` compiles them on purpose (``make setup`` calls it).
"""
from __future__ import annotations

import sys
import threading
import time

__all__ = ["announce_compile", "needs_compile", "warm", "MESSAGE"]

MESSAGE = "kinemap: compiling the fitting kernels, once, about 40 s"
_checked = False


def _entry_kernels():
    from kinemap.linefit import _kernels as K

    return (K.guess_kernel, K.fit_kernel, K.model_kernel)


def _cached(dispatcher) -> bool:
    """True when ``dispatcher`` is compiled here or its on-disk cache index has entries.

    numba keeps an index per function stamped with a hash of the source file's contents;
    a stale stamp reads as empty.  This peeks at numba's private cache objects: if they
    change shape, assume cached (stay quiet) rather than announce a compile every run.
    """
    if dispatcher.signatures:
        return True
    try:
        return bool(dispatcher._cache._cache_file._load_index())
    except Exception:  # noqa: BLE001 - private API: never let the notice break a fit
        return True


def needs_compile() -> bool:
    """Whether the first fit of this process will compile a fitting kernel."""
    return not all(_cached(d) for d in _entry_kernels())


def _ticker(stop: threading.Event, t0: float):
    """Seconds elapsed, rewritten in place on a terminal, until ``stop`` is set (numba's
    compiler is Python code, so this thread gets its turns)."""
    while not stop.wait(1.0):
        sys.stderr.write(f"\rkinemap: compiling ... {time.perf_counter() - t0:4.0f} s")
        sys.stderr.flush()


class _Notice:
    """Context of the first kernel call: the message, the ticker, the closing line."""

    def __init__(self):
        self.stop = threading.Event()
        self.t0 = time.perf_counter()
        self.thread = None

    def __enter__(self):
        print(MESSAGE, file=sys.stderr, flush=True)
        if sys.stderr.isatty():
            self.thread = threading.Thread(target=_ticker, args=(self.stop, self.t0),
                                           daemon=True)
            self.thread.start()
        return self

    def __exit__(self, *exc):
        self.stop.set()
        if self.thread is not None:
            self.thread.join()
            sys.stderr.write("\n")
        if exc[0] is None:
            print(f"kinemap: fitting kernels compiled in {time.perf_counter() - self.t0:.0f} s "
                  "and cached", file=sys.stderr, flush=True)
        return False


def announce_compile():
    """Before the first kernel call of the process: compile with a notice when needed.

    Compiling here (through :func:`warm`) rather than inside the caller's call keeps the
    notice's closing line honest and the caller's timing free of the compile.
    """
    global _checked
    if _checked:
        return
    _checked = True
    if needs_compile():
        with _Notice():
            _compile_all()


def _compile_all():
    """Call every entry kernel once on a tiny problem: numba compiles each with the argument
    types the fitting code always passes (float64 arrays), which is what later calls use."""
    import numpy as np

    from kinemap.linefit.fit import fit_spectra, model_spectra

    v = np.linspace(-20.0, 20.0, 41)
    y = 1.0 + 0.0 * v[None, :]
    y = y * np.exp(-0.5 * (v / 3.0) ** 2)[None, :]
    res = fit_spectra(y, 0.05, v)  # the first guess and the fit
    model_spectra(res.params, v)


def warm() -> bool:
    """Compile the fitting kernels now if they are not cached; True when it compiled."""
    global _checked
    _checked = True
    if not needs_compile():
        return False
    with _Notice():
        _compile_all()
    return True
