"""Atomic output directories: a failed run leaves no half-written files."""

from __future__ import annotations

import contextlib
import os
import shutil
import tempfile
from pathlib import Path


def _refuse_to_replace(target: Path, protect) -> None:
    """InputError when ``target`` is, or contains, one of the protected paths."""
    resolved = target.resolve()
    for path, label in protect:
        if not path:
            continue
        guarded = Path(path).resolve()
        if guarded == resolved or resolved in guarded.parents:
            from calib.errors import InputError, Problem

            raise InputError([Problem(str(target), None, None,
                                      f"the output directory holds {label} ({path}) and would be replaced",
                                      "choose a new directory for --out", False)])


@contextlib.contextmanager
def atomic_directory(target: str | os.PathLike, protect=()):
    """Yield a temporary directory beside ``target``; on success it replaces ``target``.

    On any exception the temporary directory is removed and ``target`` is untouched.
    Files the caller writes must go inside the yielded path. ``protect``: (path, label)
    pairs of inputs that must survive; a ``target`` that is or holds one of them is refused
    (InputError) before anything is written.
    """
    target = Path(target)
    _refuse_to_replace(target, protect)
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.partial-", dir=target.parent))
    os.chmod(tmp, 0o755)  # mkdtemp makes the folder private; outputs are ordinary folders
    try:
        yield tmp
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    old = None
    if target.exists():
        old = target.parent / f".{target.name}.old-{os.getpid()}"
        os.replace(target, old)
    os.replace(tmp, target)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def atomic_file(target: str | os.PathLike, data: bytes | str) -> None:
    """Write ``data`` to ``target`` through a temporary file and a rename."""
    target = Path(target)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", dir=target.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data.encode() if isinstance(data, str) else data)
        os.chmod(tmp, 0o644)  # mkstemp makes files private; outputs are ordinary files
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
