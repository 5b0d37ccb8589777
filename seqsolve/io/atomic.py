"""Atomic writes: a file or a whole output folder appears complete or not at all.

A write that fails (read-only folder, full disk, a busy mount point) raises OutputWriteError, which
says what to do, and leaves the previous output as it was. A run killed mid-write leaves a hidden
`.<name>.partial-<pid>-*` folder; the next write to the same place removes those whose process is gone.
"""

from __future__ import annotations

import errno
import os
import re
import shutil
import tempfile
from pathlib import Path

from seqsolve.errors import OutputExistsError, OutputWriteError

_WHY = {
    errno.ENOSPC: "the disk is full; free some space or choose another -o/--out folder",
    errno.EDQUOT: "the disk quota is used up; free some space or choose another -o/--out folder",
    errno.EROFS: "the file system is read-only; choose another -o/--out folder",
    errno.EACCES: "permission denied; choose a folder you can write to",
    errno.EPERM: "permission denied; choose a folder you can write to",
    errno.EBUSY: "it is busy or a mount point; give a new folder inside it (e.g. -o <mount>/designs)",
    errno.EXDEV: "it is on another file system than its parent folder; give a new folder inside it",
}


def write_error(target: str | Path, exc: OSError) -> OutputWriteError:
    """An OutputWriteError naming the target and what to do for the OSError's errno."""
    why = _WHY.get(exc.errno, f"{exc.strerror or exc}; check the folder and the disk")
    return OutputWriteError(f"{target}: cannot write the output: {why}; the previous output, if any, is unchanged")


def write_text_atomic(path: str | Path, text: str) -> None:
    """Write text to path through a temporary file in the same folder and a rename.

    Raises
    ------
    OutputWriteError
        When the folder or disk refuses the write; path is then unchanged.
    """
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    except OSError as exc:
        raise write_error(path, exc) from None
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except OSError as exc:
        Path(tmp).unlink(missing_ok=True)
        raise write_error(path, exc) from None
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def ensure_writable(outdir: str | Path, force: bool) -> None:
    """Refuse an existing non-empty folder unless force; say how to proceed."""
    outdir = Path(outdir)
    try:
        if outdir.exists() and not outdir.is_dir():
            raise OutputExistsError(f"{outdir}: exists and is not a folder; choose another -o/--out path")
        if outdir.is_dir() and any(outdir.iterdir()) and not force:
            raise OutputExistsError(
                f"{outdir}: folder exists and is not empty; choose a new -o/--out folder, or add --force to replace it"
            )
    except OSError as exc:
        raise write_error(outdir, exc) from None


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError, ValueError):
        return True  # someone else's process, or not a pid: leave its folder alone
    return True


def remove_stale_partials(outdir: str | Path) -> list[Path]:
    """Remove `.<name>.partial-<pid>-*` and `.<name>.old-<pid>` folders beside outdir whose process is
    gone (a run killed mid-write); those of a living process are left alone. An `.old-` folder with no
    outdir beside it is the previous output of a run killed mid-swap: it is put back. Returns what was removed."""
    outdir = Path(outdir)
    pattern = re.compile(rf"^\.{re.escape(outdir.name)}\.(?:partial|old)-(\d+)(?:-.*)?$")
    removed = []
    try:
        siblings = list(outdir.parent.iterdir()) if outdir.parent.is_dir() else []
    except OSError:
        return removed
    for p in siblings:
        m = pattern.match(p.name)
        if not (m and p.is_dir() and not p.is_symlink() and not _pid_alive(int(m[1]))):
            continue
        if ".old-" in p.name and not outdir.exists():
            # killed between moving the previous output aside and putting the new one in: restore it
            os.replace(p, outdir)
            continue
        shutil.rmtree(p, ignore_errors=True)
        removed.append(p)
    return removed


def write_folder(outdir: str | Path, files: dict[str, str | bytes], force: bool = False) -> Path:
    """Write {relative path: text (UTF-8) or bytes} as a fresh folder, swapped in by rename once complete.

    Raises
    ------
    OutputExistsError
        If outdir exists, is not empty and force is False.
    OutputWriteError
        If the folder or disk refuses the write; the previous outdir is then unchanged.
    """
    outdir = Path(outdir)
    remove_stale_partials(outdir)
    ensure_writable(outdir, force)
    try:
        outdir.parent.mkdir(parents=True, exist_ok=True)
        staging = Path(tempfile.mkdtemp(prefix=f".{outdir.name}.partial-{os.getpid()}-", dir=outdir.parent))
    except OSError as exc:
        raise write_error(outdir, exc) from None
    try:
        for rel, text in files.items():
            target = staging / rel
            target.parent.mkdir(parents=True, exist_ok=True)
            if isinstance(text, bytes):
                target.write_bytes(text)
            else:
                target.write_text(text, encoding="utf-8", newline="")
        _swap_in(staging, outdir)
    except OSError as exc:
        shutil.rmtree(staging, ignore_errors=True)
        raise write_error(outdir, exc) from None
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    return outdir


def _swap_in(staging: Path, outdir: Path) -> None:
    """Rename staging to outdir; an existing outdir is moved aside first and put back if the rename fails."""
    old = None
    if outdir.exists():
        old = outdir.with_name(f".{outdir.name}.old-{os.getpid()}")
        os.replace(outdir, old)
    try:
        os.replace(staging, outdir)
    except BaseException:
        if old is not None:
            os.replace(old, outdir)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
