"""Output folders, checked before work starts: can a file be written there, and is there room?

Building a corpus, training a run and writing results each call `check_output_folder` with
what they are about to write, so an unwritable folder or a full disk is one clear sentence
before any work, not a failure an hour in. Files themselves are always written to a temporary
name and renamed (`lab.evaluate.write_atomic`, `config.save`, `lab.resume.AtomicCheckpoints`, a
corpus folder as a whole), so a disk that fills up later leaves no half-written file behind.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path

from tinyrnnt.config import ConfigError

MB = 1_000_000


class OutputError(ConfigError):
    """An output folder cannot be written, or its disk lacks the room the work needs."""


def check_output_folder(folder: str | Path, need_bytes: int, what: str) -> None:
    """Raise OutputError unless a file can be made in `folder` (or, when it does not exist yet,
    in the nearest folder above it, where it would be made) and its disk has `need_bytes` free.

    >>> import tempfile; check_output_folder(tempfile.gettempdir(), 0, "demo")  # writable, no need
    >>> check_output_folder(tempfile.gettempdir(), 10 ** 18, "demo")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    tinyrnnt.files.OutputError: demo ...: needs about 1000000000000 MB, its disk has ... MB free; ...
    """
    folder = Path(folder)
    existing = folder
    while not existing.exists() and existing != existing.parent:
        existing = existing.parent
    if not existing.is_dir():
        raise OutputError(f"{what} {folder}: {existing} is a file, not a folder, so nothing can be written "
                          "under it; pick another place")
    try:
        fd, probe = tempfile.mkstemp(dir=existing, prefix=".write-check-", suffix=".tmp")
        os.close(fd)
        os.unlink(probe)
    except OSError as err:
        raise OutputError(f"{what} {folder}: cannot write in {existing} ({err.strerror}); "
                          "pick a writable place") from None
    free = shutil.disk_usage(existing).free
    if free < need_bytes:
        raise OutputError(f"{what} {folder}: needs about {_mb(need_bytes)} MB, its disk has {_mb(free)} MB free; "
                          "free some space or pick a folder on another disk")


def _mb(n: int) -> str:
    return f"{n / MB:.0f}" if n >= 10 * MB else f"{n / MB:.1f}"


def put_in_place(built: Path, out_dir: Path) -> None:
    """Move a folder built under a temporary name to `out_dir`, replacing one already there only
    once the new one is whole (the old one is renamed aside first, then removed)."""
    if out_dir.exists():
        old = out_dir.parent / f".{out_dir.name}.old-{os.getpid()}"
        out_dir.rename(old)
        built.rename(out_dir)
        shutil.rmtree(old)
    else:
        built.rename(out_dir)
