"""Atomic writes: a file or a whole output folder appears complete or not at all."""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path

from seqsolve.errors import OutputExistsError


def write_text_atomic(path: str | Path, text: str) -> None:
    """Write text to path through a temporary file in the same folder and a rename."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def ensure_writable(outdir: str | Path, force: bool) -> None:
    """Refuse an existing non-empty folder unless force; say how to proceed."""
    outdir = Path(outdir)
    if outdir.exists() and not outdir.is_dir():
        raise OutputExistsError(f"{outdir}: exists and is not a folder; choose another -o/--out path")
    if outdir.is_dir() and any(outdir.iterdir()) and not force:
        raise OutputExistsError(
            f"{outdir}: folder exists and is not empty; choose a new -o/--out folder, or add --force to replace it"
        )


def write_folder(outdir: str | Path, files: dict[str, str], force: bool = False) -> Path:
    """Write {relative path: text} as a fresh folder, swapped in by rename once complete.

    Raises
    ------
    OutputExistsError
        If outdir exists, is not empty and force is False.
    """
    outdir = Path(outdir)
    ensure_writable(outdir, force)
    outdir.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=f".{outdir.name}.partial-", dir=outdir.parent))
    try:
        for rel, text in files.items():
            target = staging / rel
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_text(text, encoding="utf-8", newline="")
        old = None
        if outdir.exists():
            old = outdir.with_name(f".{outdir.name}.old-{os.getpid()}")
            os.replace(outdir, old)
        os.replace(staging, outdir)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    return outdir
