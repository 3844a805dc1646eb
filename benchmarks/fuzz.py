"""Fuzzing pass: malformed and unusual cubes through every command, classified.

About 200 variants of a small valid cube (``_fuzz_variants.py``: header keywords removed
or set to NaN, strings, zero, huge values; contradictory units; truncated and archived
files; scaled integers; one channel, one row, 60 % blank, 2D images, a degenerate Stokes
axis, other axis orders, no beam, ...) are each run through ``info``, ``maps --method
moments``, ``maps --method gauss``, ``rings`` and ``widths``, every run in its own
process with a timeout, and each run is put in one class:

  ok              exit 0 and finite products
  clean refusal   exit 2, one line "kinemap: error: ..." (kinemap's own warning lines may
                  precede it), no traceback, no library log lines
  unclean refusal exit 2 but more lines, library log lines, or a generic message that
                  does not say what is wrong
  internal error  any other exit code, a traceback, or "internal error"
  hang            killed at the timeout
  silent nonsense exit 0, but the command's main products are all NaN (or absent), or a
                  velocity product reaches |v| > c

The runs are processes forked from this one after it has imported kinemap (a fresh
interpreter per run would spend most of the time importing); ``--spawn`` starts a fresh
``python -m kinemap.cli`` per run instead.  It is a benchmark script, not a test:

    PYTHONPATH=src .venv/bin/python benchmarks/fuzz.py [--quick] [--jobs 2] [--timeout 60]
"""
from __future__ import annotations

import argparse
import contextlib
import importlib
import io
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from collections import Counter, defaultdict

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import _fuzz_variants  # noqa: E402

C_KMS = 299792.458  # speed of light, km/s (common practice)

COMMANDS = {
    "info": ["info", "{cube}"],
    "moments": ["maps", "{cube}", "--method", "moments"],
    "gauss": ["maps", "{cube}", "--method", "gauss"],
    "rings": ["rings", "{cube}"],
    "widths": ["widths", "{cube}", "--lines", "HI_21cm", "--temperature", "100 K"],
}
COMMON = ["--out", "{out}", "--no-plots", "--no-progress"]
# The products whose having no finite value means the command said nothing useful.
MAIN_PRODUCTS = {"moments": ["moment0", "moment1"], "gauss": ["velocity", "dispersion"],
                 "widths": ["nonthermal_dispersion"]}
VELOCITY_PRODUCTS = ("moment1", "velocity", "velocity_at_peak", "line_velocity",
                     "velocity_model")
# Messages that name no cause: a refusal with one of these is not a clean one.
GENERIC = [re.compile(p, re.I) for p in (
    r"not a readable FITS file\W*$", r"ERROR \d+ in wcs", r"^kinemap: error: invalid\W*$",
    r"\bnan\b.*not convertible", r"unknown error")]

QUICK = {"valid", "CRVAL3=nan", "CDELT3-removed", "CDELT3=zero", "CDELT3=str", "CUNIT3=km/s-on-FREQ",
         "RESTFRQ=1Hz", "CRVAL3-far-1GHz", "CDELT1=nan", "BMAJ=huge", "no-beam", "one-channel",
         "one-row", "one-column", "60pct-blank", "all-nan", "2D-image", "4D-stokes-last",
         "spectral-axis-first", "truncated-half-data", "header-only", "gzip", "tile-RICE_1",
         "int16-scaled", "uint16-BZERO32768", "named-pipe", "name-non-ascii", "CTYPE1=numeric",
         "PC-mixes-spectral", "cube-behind-2D-primary", "BITPIX-missing", "NAXIS3-larger"}


def _child(argv, folder):
    """In a forked process: run the command with stdout/stderr in files; never returns."""
    try:
        os.setpgid(0, 0)
        os.chdir(folder)
        for fd, name in ((1, "stdout"), (2, "stderr")):
            f = os.open(os.path.join(folder, name), os.O_WRONLY | os.O_CREAT | os.O_TRUNC)
            os.dup2(f, fd)
            os.close(f)
        sys.stdout = io.TextIOWrapper(os.fdopen(1, "wb", 0), write_through=True)
        sys.stderr = io.TextIOWrapper(os.fdopen(2, "wb", 0), write_through=True)
        sys.argv = ["kinemap", *argv]
        from kinemap.cli import main
        try:
            rc = main(argv)
        except SystemExit as exc:
            rc = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
        sys.stdout.flush()
        sys.stderr.flush()
    except BaseException:  # the harness itself failed: report it like an uncaught crash
        import traceback
        traceback.print_exc()
        rc = 99
    os._exit(rc or 0)


class Run:
    def __init__(self, variant, command, folder, argv, spawn):
        self.variant, self.command, self.folder, self.argv = variant, command, folder, argv
        self.start = time.monotonic()
        if spawn:
            out = open(os.path.join(folder, "stdout"), "wb")
            err = open(os.path.join(folder, "stderr"), "wb")
            self.proc = subprocess.Popen([sys.executable, "-m", "kinemap.cli", *argv], cwd=folder,
                                         stdout=out, stderr=err, start_new_session=True)
            self.pid = self.proc.pid
        else:
            self.proc = None
            self.pid = os.fork()
            if self.pid == 0:
                _child(argv, folder)

    def poll(self):
        """Exit code, None while running."""
        if self.proc is not None:
            return self.proc.poll()
        pid, status = os.waitpid(self.pid, os.WNOHANG)
        if pid == 0:
            return None
        return os.waitstatus_to_exitcode(status)

    def kill(self):
        with contextlib.suppress(ProcessLookupError, PermissionError):
            os.killpg(self.pid, signal.SIGKILL)
        if self.proc is not None:
            self.proc.wait()
        else:
            with contextlib.suppress(ChildProcessError):
                os.waitpid(self.pid, 0)


def _products(out):
    """{stem: float array} of the FITS products in ``out``; rings' table as 'v_rot'."""
    from astropy.io import fits
    from astropy.table import Table

    found = {}
    if not os.path.isdir(out):
        return found
    for name in os.listdir(out):
        path = os.path.join(out, name)
        if name.endswith(".fits"):
            with fits.open(path) as hdul:
                data, bunit = hdul[0].data, str(hdul[0].header.get("BUNIT", "")).strip()
            if data is not None:
                scale = 1e-3 if bunit == "m/s" else 1.0
                found[name[:-5]] = np.asarray(data, dtype=float) * scale
        elif name == "rotation_curve.ecsv":
            t = Table.read(path, format="ascii.ecsv")
            found["v_rot"] = np.asarray(t["v_rot"], dtype=float)
            found["v_sys"] = np.asarray(t["v_sys"], dtype=float)
    return found


def _nonsense(command, out, stdout):
    """Why an exit-0 run's output cannot be right, or None."""
    if command == "info":
        m = re.search(r"velocity\s+(\S+) to (\S+) km/s", stdout)
        if m is None:
            return "info shows no velocity range"
        lo, hi = (float(x) for x in m.groups())
        if not (np.isfinite(lo) and np.isfinite(hi)) or max(abs(lo), abs(hi)) > C_KMS:
            return f"info velocity range {lo} to {hi} km/s"
        return None
    prods = _products(out)
    if not prods:
        return "no products written"
    for name in MAIN_PRODUCTS.get(command, []) + (["v_rot"] if command == "rings" else []):
        if name not in prods or not np.isfinite(prods[name]).any():
            return f"{name} all-NaN or missing"
    for name in VELOCITY_PRODUCTS + ("v_sys",):
        v = prods.get(name)
        if v is not None and np.isfinite(v).any() and np.nanmax(np.abs(v)) > C_KMS:
            return f"{name} beyond the speed of light"
    return None


def classify(rc, stdout, stderr, command, out):
    """(class, message) of one finished run."""
    lines = [ln for ln in stderr.splitlines() if ln.strip()]
    if rc == 0:
        why = _nonsense(command, out, stdout)
        return ("silent nonsense", why) if why else ("ok", "")
    said = [ln for ln in lines if "error" in ln.lower()]
    last = (said or lines or ["(nothing on stderr)"])[-1]
    if rc != 2 or "Traceback" in stderr or "internal error" in stderr:
        return "internal error", last
    errors = [ln for ln in lines if ln.startswith("kinemap: error")]
    foreign = [ln for ln in lines if not ln.startswith("kinemap: warning") and ln not in errors]
    if len(errors) != 1 or foreign or lines[-1] != errors[0]:
        return "unclean refusal", " | ".join(lines[-3:])
    if any(g.search(errors[0]) for g in GENERIC):
        return "unclean refusal", errors[0]
    return "clean refusal", errors[0]


def _normalise(message):
    """A message with paths and numbers blurred, to group runs by cause."""
    m = re.sub(r"(?<!\w)/[\w./-]+", "<path>", message)
    m = re.sub(r"[-+]?\d[\d.eE+-]*", "<n>", m)
    return m[:200]


def run_all(variants, commands, *, jobs, timeout, spawn, root):
    todo = []
    for name, build in variants:
        vdir = os.path.join(root, re.sub(r"[^\w.+=-]", "_", name))
        os.makedirs(vdir)
        cube = build(vdir)
        for command in commands:
            folder = os.path.join(vdir, command)
            os.makedirs(folder)
            argv = [a.format(cube=cube, out=os.path.join(folder, "out"))
                    for a in COMMANDS[command] + ([] if command == "info" else COMMON)]
            todo.append((name, command, folder, argv))
    results, running = [], []
    try:
        _drive(todo, running, results, jobs=jobs, timeout=timeout, spawn=spawn)
    except KeyboardInterrupt:
        print("interrupted: the counts below are of the runs that finished", flush=True)
        for r in running:
            r.kill()
    return results


def _drive(todo, running, results, *, jobs, timeout, spawn):
    total, done = len(todo), 0
    while todo or running:
        while todo and len(running) < jobs:
            running.append(Run(*todo.pop(0), spawn))
        time.sleep(0.05)
        for r in list(running):
            rc = r.poll()
            hung = rc is None and time.monotonic() - r.start > timeout
            if rc is None and not hung:
                continue
            if hung:
                r.kill()
            running.remove(r)
            stdout = open(os.path.join(r.folder, "stdout"), errors="replace").read()
            stderr = open(os.path.join(r.folder, "stderr"), errors="replace").read()
            kind, msg = (("hang", f"no exit after {timeout} s") if hung else
                         classify(rc, stdout, stderr, r.command, os.path.join(r.folder, "out")))
            results.append(dict(variant=r.variant, command=r.command, rc=rc, cls=kind,
                                message=msg, seconds=round(time.monotonic() - r.start, 1)))
            done += 1
            if kind not in ("ok", "clean refusal"):
                print(f"[{done}/{total}] {kind}: {r.variant} / {r.command}: {msg}", flush=True)


_GROUPS = {"header": _fuzz_variants.header_variants, "units": _fuzz_variants.unit_variants,
           "shapes": _fuzz_variants.shape_variants, "files": _fuzz_variants.file_variants}
CLASSES = ["ok", "clean refusal", "unclean refusal", "internal error", "hang", "silent nonsense"]


def report(results):
    by_cmd = {c: Counter() for c in dict.fromkeys(r["command"] for r in results)}
    by_cmd["ALL"] = Counter()
    for r in results:
        by_cmd[r["command"]][r["cls"]] += 1
        by_cmd["ALL"][r["cls"]] += 1
    width = max(len(c) for c in CLASSES)
    print("\ncounts per class and command")
    print(f"{'':<{width}} " + " ".join(f"{c:>8}" for c in by_cmd))
    for cls in CLASSES:
        print(f"{cls:<{width}} " + " ".join(f"{by_cmd[c][cls]:>8}" for c in by_cmd))
    groups = defaultdict(list)
    for r in results:
        if r["cls"] not in ("ok", "clean refusal"):
            groups[(r["cls"], _normalise(r["message"]))].append(f"{r['variant']}/{r['command']}")
    print(f"\n{len(groups)} distinct failures (class: message <- variant/command ...)")
    for (cls, msg), where in sorted(groups.items()):
        print(f"- {cls}: {msg}\n    <- {', '.join(where)}")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help=f"only {len(QUICK)} chosen variants")
    ap.add_argument("--jobs", type=int, default=2, help="runs at a time (default 2)")
    ap.add_argument("--timeout", type=float, default=60.0, help="seconds before a run is a hang")
    ap.add_argument("--commands", default=",".join(COMMANDS), help="comma-separated subset")
    ap.add_argument("--only", help="a regular expression on variant names")
    ap.add_argument("--group", choices=sorted(_GROUPS), help="one group of variants")
    ap.add_argument("--spawn", action="store_true", help="a fresh interpreter per run")
    ap.add_argument("--json", help="write every run's result to this file")
    ap.add_argument("--keep", help="keep the variants and outputs in this folder")
    args = ap.parse_args(argv)
    os.environ.setdefault("MPLBACKEND", "Agg")
    variants = _fuzz_variants.all_variants()
    if args.quick:
        variants = [v for v in variants if v[0] in QUICK]
    if args.group:
        names = {name for name, _ in _GROUPS[args.group]()}
        variants = [v for v in variants if v[0] in names]
    if args.only:
        variants = [v for v in variants if re.search(args.only, v[0])]
    commands = args.commands.split(",")
    if not args.spawn:  # imported once, before the forks
        for module in ("kinemap.cli", "kinemap.pipeline.info", "kinemap.pipeline.runner"):
            importlib.import_module(module)
    root = args.keep or tempfile.mkdtemp(prefix="kinemap-fuzz-")
    os.makedirs(root, exist_ok=True)
    t0 = time.monotonic()
    print(f"{len(variants)} variants x {len(commands)} commands, {args.jobs} at a time, "
          f"timeout {args.timeout:g} s, in {root}", flush=True)
    try:
        results = run_all(variants, commands, jobs=args.jobs, timeout=args.timeout,
                          spawn=args.spawn, root=root)
    finally:
        if not args.keep:
            shutil.rmtree(root, ignore_errors=True)
    report(results)
    print(f"\n{len(results)} runs in {time.monotonic() - t0:.0f} s")
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(results, fh, indent=1)


if __name__ == "__main__":
    main()
