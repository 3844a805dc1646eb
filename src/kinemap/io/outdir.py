"""The output folder: refuse to mix runs, stage files, move them in only when all succeeded.

Products are written into a hidden staging folder next to the output folder and moved in
with ``os.replace`` (atomic per file on one file system) after every product was written,
so an interrupted or failed run leaves the output folder as it was.
"""
from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path

from kinemap.errors import KinemapError

__all__ = ["check_output_dir", "StagedOutput"]


def check_output_dir(path, *, overwrite: bool) -> Path:
    """Fail early when ``path`` is a non-empty folder and ``overwrite`` is false."""
    p = Path(path)
    if p.exists() and not p.is_dir():
        raise KinemapError(f"output path {p} exists and is not a folder; choose another --out")
    if p.is_dir() and any(p.iterdir()) and not overwrite:
        raise KinemapError(
            f"output folder {p} is not empty; choose another --out or add --overwrite")
    return p


class StagedOutput:
    """Context manager: ``with StagedOutput(out, overwrite=...) as stage: stage.path / 'x.fits'``.

    On a clean exit every file in the staging folder is moved into ``out``; on an
    exception the staging folder is removed and ``out`` is untouched.
    """

    def __init__(self, out, *, overwrite: bool = False):
        self.out = check_output_dir(out, overwrite=overwrite)
        self.overwrite = overwrite
        self.path: Path | None = None

    def __enter__(self) -> "StagedOutput":
        parent = self.out.resolve().parent
        parent.mkdir(parents=True, exist_ok=True)
        self.path = Path(tempfile.mkdtemp(prefix=f".{self.out.name}.staging-", dir=parent))
        return self

    def file(self, name: str) -> Path:
        return self.path / name

    def __exit__(self, exc_type, exc, tb):
        try:
            if exc_type is None:
                self.out.mkdir(parents=True, exist_ok=True)
                for root, _dirs, files in os.walk(self.path):
                    rel = Path(root).relative_to(self.path)
                    (self.out / rel).mkdir(parents=True, exist_ok=True)
                    for f in files:
                        os.replace(Path(root) / f, self.out / rel / f)
        finally:
            shutil.rmtree(self.path, ignore_errors=True)
        return False
