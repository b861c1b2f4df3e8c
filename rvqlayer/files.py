"""Atomic file output: the one writer every file of the library and the recipes goes through.

A file is written under a temporary name in its own folder, flushed to disk
(``fsync``), given the permission bits any new file gets under the current
umask, and renamed onto its final name. A reader therefore sees the old file
or the complete new one, never a half-written one, and a killed job leaves
no partial output behind.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import IO

__all__ = ["atomic_path", "atomic_write", "new_file_mode"]


def new_file_mode() -> int:
    """Permission bits of a new file under the current umask (``mkstemp`` alone gives 0600)."""
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


@contextmanager
def atomic_path(target: str | os.PathLike[str]) -> Iterator[Path]:
    """A temporary path beside ``target``, renamed onto it when the block succeeds.

    For writers that want a path (``figure.savefig(tmp)``, ``safetensors``).
    The folder is created if missing; on any exception the temporary file is
    removed and ``target`` is left as it was.

    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as d:
    ...     with atomic_path(f"{d}/a.txt") as tmp:
    ...         _ = tmp.write_text("hello")
    ...     open(f"{d}/a.txt").read()
    'hello'
    """
    final = Path(target)
    final.parent.mkdir(parents=True, exist_ok=True)
    fd, name = tempfile.mkstemp(prefix=f".{final.name}.", suffix=".tmp", dir=final.parent)
    os.close(fd)
    tmp = Path(name)
    try:
        yield tmp
        with open(tmp, "rb+") as f:
            os.fsync(f.fileno())
        os.chmod(tmp, new_file_mode())
        os.replace(tmp, final)
    finally:
        if tmp.exists():
            tmp.unlink()


@contextmanager
def atomic_write(target: str | os.PathLike[str], mode: str = "wb", encoding: str | None = None) -> Iterator[IO]:
    """An open file (``"wb"`` or ``"w"``) whose content replaces ``target`` when the block succeeds."""
    if mode not in ("wb", "w"):
        raise ValueError(f"expected `mode` to be 'wb' or 'w', got {mode!r}")
    with atomic_path(target) as tmp:
        text = {"encoding": encoding or "utf-8"} if mode == "w" else {}
        with open(tmp, mode, **text) as f:
            yield f
            f.flush()
