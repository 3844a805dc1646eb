"""The output folder: whole or absent, one run at a time, inputs never replaced.

A run writes every file into a staging folder beside the target
(``.NAME.staging-PID-XXXX``) and publishes it with one ``os.rename`` of the whole folder,
so at every moment the target is absent, the earlier run's folder, or the new run's
folder complete.  With ``overwrite`` an existing target is renamed away
(``.NAME.replaced-PID-XXXX``), the staging folder renamed in, and the old one deleted;
files in it that the earlier run did not write (its manifest lists what it wrote) are
hard-linked into the new folder first and named in a warning.

While a run stages, it holds a lock beside the target (``.NAME.kinemap-lock``, an
``flock`` that the kernel releases when the process dies, with the pid inside for the
message), so a second run into the same folder stops at once with a clear line.  Under
the lock, folders left by runs that were killed (SIGKILL, power cut) are removed when
their pid is dead, or restored when the target itself went missing between the two
renames, and named otherwise.

SIGINT and SIGTERM (the command turns SIGTERM into KeyboardInterrupt too) are held back
while the lock, the staging folder and the renames are being set up or undone, so an
interrupt never cuts those steps in half; :func:`published` tells the command whether the
products were complete when an interrupt arrived.
"""
from __future__ import annotations

import contextlib
import errno
import json
import os
import re
import shutil
import signal
import tempfile
import threading
import warnings
from pathlib import Path

from kinemap.errors import KinemapError, OutputWarning

__all__ = ["check_output_dir", "StagedOutput", "published", "writing_into", "os_error_message"]

_PUBLISHED: list[Path] = []  # folders this process published (for the interrupt message)


def published() -> list[Path]:
    """Output folders this process has published completely (newest last)."""
    return list(_PUBLISHED)


def _lock_name(target: Path) -> Path:
    return target.parent / f".{target.name}.kinemap-lock"


def _leftover(target: Path, name: str):
    """``(kind, pid)`` of a staging or replaced folder of ``target``; None for others.
    pid is None for folders of older versions (no pid in the name)."""
    m = re.fullmatch(re.escape(f".{target.name}.") + r"(staging|replaced)-(?:(\d+)-)?\w+", name)
    if m is None:
        return None
    return m.group(1), (int(m.group(2)) if m.group(2) else None)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # someone else's process
        return True
    return True


def _errno_of(exc: BaseException) -> int | None:
    """The errno of ``exc`` or of the error it wraps: libraries re-raise an OSError as a
    new one holding only the old one's text ("[Errno 27] File too large")."""
    seen = 0
    while exc is not None and seen < 5:
        if getattr(exc, "errno", None):
            return exc.errno
        m = re.match(r"\[Errno (\d+)\]", str(exc))
        if m:
            return int(m.group(1))
        exc, seen = exc.__cause__ or exc.__context__, seen + 1
    return None


def os_error_message(exc: OSError, where) -> str:
    """One line for an OSError met while writing into ``where``, with the fix."""
    code = _errno_of(exc)
    name = f"{Path(exc.filename).name} into {where}" if exc.filename else where
    if code in (errno.ENOSPC, errno.EDQUOT):
        return (f"no space left on the device while writing {name}; free some space or choose "
                "another --out (nothing was written)")
    if code == errno.EFBIG:
        return (f"{name} would exceed the file-size limit (ulimit -f); raise the limit or choose "
                "another --out (nothing was written)")
    if code in (errno.EACCES, errno.EPERM):
        return (f"cannot write the output folder {where}: permission denied; choose another "
                "--out or fix the folder's permissions")
    if code == errno.EROFS:
        return (f"cannot write the output folder {where}: the file system is read-only; choose "
                "another --out")
    if code == errno.ENOTDIR:
        return f"cannot make the output folder {where}: a part of that path is a file; choose another --out"
    return f"cannot write the output folder {where}: {exc.strerror or exc}; choose another --out"


@contextlib.contextmanager
def writing_into(where):
    """Turn an OSError raised while writing products into one line naming the folder."""
    try:
        yield
    except OSError as exc:
        raise KinemapError(os_error_message(exc, where)) from None


@contextlib.contextmanager
def _signals_held():
    """Hold SIGINT and SIGTERM back (main thread only; elsewhere Python runs no handlers)
    and deliver a held one as KeyboardInterrupt when the block is done."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    caught = []
    previous = {}
    for sig in (signal.SIGINT, signal.SIGTERM):
        previous[sig] = signal.signal(sig, lambda s, _f: caught.append(s))
    try:
        yield
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
    if caught:
        raise KeyboardInterrupt


def _first_existing(p: Path) -> Path:
    while not p.exists() and p != p.parent:
        p = p.parent
    return p


def check_output_dir(path, *, overwrite: bool, inputs=()) -> Path:
    """Refuse, before any computation, an output folder the run could not or must not
    write: a file (or a path below one), a folder that is not empty (unless ``overwrite``),
    a folder or parent without write permission, the current folder, or a folder that
    holds one of the run's ``inputs`` when ``overwrite`` would replace it."""
    try:
        return _check_output_dir(Path(path), overwrite=overwrite, inputs=inputs)
    except OSError as exc:  # e.g. a folder that cannot be listed
        raise KinemapError(os_error_message(exc, path)) from None


def _check_output_dir(p: Path, *, overwrite: bool, inputs) -> Path:
    base = _first_existing(p)
    if base.exists() and not base.is_dir():
        if base == p:
            raise KinemapError(f"output path {p} exists and is not a folder; choose another --out")
        raise KinemapError(f"cannot make the output folder {p}: {base} is a file, not a folder; "
                           "choose another --out")
    if p.is_dir():
        _check_existing(p, overwrite=overwrite, inputs=inputs)
        base = p.resolve().parent
    if not os.access(base, os.W_OK | os.X_OK):
        raise KinemapError(f"cannot write in {base}: permission denied; choose another --out or "
                           "fix the folder's permissions")
    return p


def _check_existing(p: Path, *, overwrite: bool, inputs) -> None:
    target = os.path.realpath(p)
    for item in inputs if overwrite else ():
        if os.path.realpath(item).startswith(target + os.sep):
            raise KinemapError(
                f"the input {item} lies in the output folder {p}, which --overwrite replaces; "
                "move the input out or choose another --out")
    cwd = os.path.realpath(os.getcwd())
    if cwd == target or cwd.startswith(target + os.sep):
        raise KinemapError(f"the output folder {p} is the current folder or holds it; kinemap "
                           "replaces its output folder as a whole, so give it a folder of its "
                           "own with --out (e.g. --out kinemap-out)")
    if any(p.iterdir()) and not overwrite:
        raise KinemapError(
            f"output folder {p} is not empty; choose another --out or add --overwrite")
    if not os.access(p, os.W_OK | os.X_OK):
        raise KinemapError(f"cannot write in {p}: permission denied; choose another --out or fix "
                           "the folder's permissions")


def _kinemap_files(folder: Path) -> set[str] | None:
    """Relative paths of the files the run that made ``folder`` wrote, from its manifest
    (None when there is no readable manifest)."""
    try:
        doc = json.loads((folder / "manifest.json").read_text())
    except (OSError, ValueError):
        return None
    if not isinstance(doc, dict):
        return None
    if isinstance(doc.get("files"), list):
        return {str(f) for f in doc["files"]}
    out = {"manifest.json"}  # a manifest of an older version: its products and figures
    for section in ("products", "figures"):
        for entry in (doc.get(section) or {}).values():
            if isinstance(entry, dict) and entry.get("path"):
                out.add(str(entry["path"]))
    return out


def _record_files(stage: Path, kept=()) -> None:
    """Write into the staged manifest.json the list of every file the run wrote (so a later
    --overwrite knows which files are kinemap's; ``kept`` are the user's); a folder without
    a manifest gets a small one."""
    files = sorted(set(str(Path(root, f).relative_to(stage)) for root, _d, fs in os.walk(stage)
                       for f in fs) - set(kept))
    path = stage / "manifest.json"
    doc = {}
    if path.exists():
        doc = json.loads(path.read_text())
    else:
        from kinemap._version import __version__

        doc = {"kinemap_version": __version__}
        files.append("manifest.json")
    doc["files"] = sorted(set(files))
    path.write_text(json.dumps(doc, indent=2) + "\n")


class StagedOutput:
    """``with StagedOutput(out, overwrite=...) as stage:`` write into ``stage.path``.

    Entering checks the folder (:func:`check_output_dir`), takes the lock and makes the
    staging folder, so a run that cannot write fails before it computes anything.  A clean
    exit publishes the folder whole; an exception or an interrupt removes the staging
    folder (and any parent folders it made) and leaves ``out`` as it was.
    """

    def __init__(self, out, *, overwrite: bool = False, inputs=()):
        self.out = check_output_dir(out, overwrite=overwrite, inputs=inputs)
        self.overwrite = overwrite
        self.inputs = tuple(inputs)
        self.path: Path | None = None
        self._target = Path(os.path.abspath(self.out))
        self._lock = None
        self._made: list[Path] = []

    def file(self, name: str) -> Path:
        return self.path / name

    # -- entering ---------------------------------------------------------------------
    def __enter__(self) -> "StagedOutput":
        try:
            with _signals_held():
                try:
                    self._made = self._make_parent()
                    self._target = Path(os.path.realpath(self._target))  # a symlinked folder
                    self._take_lock()
                    self._tidy()
                    # again under the lock: another run may have published in the meantime
                    check_output_dir(self.out, overwrite=self.overwrite, inputs=self.inputs)
                    self.path = Path(tempfile.mkdtemp(
                        prefix=f".{self._target.name}.staging-{os.getpid()}-",
                        dir=self._target.parent))
                except OSError as exc:
                    raise KinemapError(os_error_message(exc, self.out)) from None
        except BaseException:
            # also a signal held during the block, raised as it ends: __exit__ will not
            # run for a failed __enter__, so the lock and the staging folder go here
            self._undo()
            raise
        return self

    def _make_parent(self) -> list[Path]:
        made = []
        p = self._target.parent
        while not p.exists():
            made.append(p)
            p = p.parent
        for d in reversed(made):
            d.mkdir()
        return made

    def _take_lock(self) -> None:
        import fcntl

        path = _lock_name(self._target)
        while True:
            fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                pid = os.read(fd, 32).decode(errors="replace").strip() or "unknown"
                os.close(fd)
                raise KinemapError(
                    f"another kinemap run (pid {pid}) is writing to {self.out}; wait for it to "
                    "finish or choose another --out") from None
            try:
                same = os.stat(path).st_ino == os.fstat(fd).st_ino
            except FileNotFoundError:
                same = False
            if same:  # not a lock file its last holder unlinked while we opened it
                os.ftruncate(fd, 0)
                os.write(fd, f"{os.getpid()}\n".encode())
                self._lock = (fd, path)
                return
            os.close(fd)

    def _tidy(self) -> None:
        """Remove (or name) what killed runs into this folder left behind."""
        for entry in sorted(self._target.parent.iterdir()):
            found = _leftover(self._target, entry.name)
            if found is None or (self.path is not None and entry == self.path):
                continue
            kind, pid = found
            if pid is None or _alive(pid):
                warnings.warn(f"{entry} was left by an interrupted run{'' if pid is None else f' (pid {pid} still exists)'}; "
                              "delete it when no kinemap run is using it", OutputWarning,
                              stacklevel=2)
            elif kind == "replaced" and not self._target.exists():
                os.rename(entry, self._target)  # killed between the two renames: undo the first
                warnings.warn(f"restored {self.out} from {entry.name}, which a killed run had "
                              "renamed it to", OutputWarning, stacklevel=2)
            else:
                shutil.rmtree(entry, ignore_errors=True)
                warnings.warn(f"removed {entry}, left by an interrupted run (pid {pid})",
                              OutputWarning, stacklevel=2)

    # -- leaving ----------------------------------------------------------------------
    def __exit__(self, exc_type, exc, tb):
        with _signals_held():
            try:
                if exc_type is None:
                    try:
                        self._publish()
                    except OSError as err:
                        raise KinemapError(os_error_message(err, self.out)) from None
            finally:
                self._undo()
        return False

    def _undo(self) -> None:
        """Remove the staging folder (if still there), release the lock, and remove the
        parent folders this run made when they are empty."""
        if self.path is not None and self.path.exists():
            shutil.rmtree(self.path, ignore_errors=True)
        if self._lock is not None:
            fd, path = self._lock
            with contextlib.suppress(OSError):
                os.unlink(path)
            os.close(fd)
            self._lock = None
        if not self._target.exists():
            for d in self._made:
                with contextlib.suppress(OSError):
                    d.rmdir()

    def _publish(self) -> None:
        target = self._target
        kept = []
        if target.is_dir() and any(target.iterdir()):
            kept = self._keep_user_files()
        _record_files(self.path, kept)
        if not target.exists() or not any(target.iterdir()):
            os.rename(self.path, target)  # replaces an empty folder too
        else:
            old = Path(tempfile.mkdtemp(prefix=f".{target.name}.replaced-{os.getpid()}-",
                                        dir=target.parent))
            os.rename(target, old)  # over the empty placeholder
            os.rename(self.path, target)
            shutil.rmtree(old, ignore_errors=True)
            if old.exists():
                warnings.warn(f"could not delete the earlier run's folder {old}; delete it by "
                              "hand", OutputWarning, stacklevel=3)
        _PUBLISHED.append(Path(self.out))
        if kept:
            shown = ", ".join(kept[:8]) + (f" and {len(kept) - 8} more" if len(kept) > 8 else "")
            warnings.warn(f"kept {len(kept)} file(s) in {self.out} that the earlier run did not "
                          f"write: {shown}", OutputWarning, stacklevel=3)

    def _keep_user_files(self) -> list[str]:
        """Hard-link (or copy) into the staging folder the files of ``out`` its earlier run
        did not write; refuse when a new product has the same name as one of them."""
        target = self._target
        ours = _kinemap_files(target) or set()
        kept, clash = [], []
        for root, dirs, files in os.walk(target):
            rel_root = Path(root).relative_to(target)
            for d in dirs:
                (self.path / rel_root / d).mkdir(exist_ok=True)
            for f in files:
                rel = str(rel_root / f) if str(rel_root) != "." else f
                if rel in ours:
                    continue
                dest = self.path / rel
                if dest.exists() or dest.is_symlink():
                    clash.append(rel)
                    continue
                try:
                    os.link(Path(root) / f, dest, follow_symlinks=False)
                except OSError:
                    shutil.copy2(Path(root) / f, dest, follow_symlinks=False)
                kept.append(rel)
        if clash:
            raise KinemapError(
                f"{self.out} holds files the earlier run did not write with the names of new "
                f"products ({', '.join(clash[:5])}); move them away or choose another --out "
                "(nothing was written)")
        # folders that only held the earlier run's files are not kept empty
        for root, dirs, files in os.walk(self.path, topdown=False):
            if root != str(self.path) and not os.listdir(root):
                os.rmdir(root)
        return kept
