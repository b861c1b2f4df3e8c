"""The output folder of a run: checked before anything is written, created with nothing left behind on failure."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

from ._errors import input_error


def check_output_dir(path: Path) -> None:
    """Fail unless ``path`` is, or can become, a folder this process can write to.

    Creates nothing: the nearest existing ancestor must be a folder with write
    permission (a plain file, or a folder such as ``/proc`` that refuses new
    entries even for root, is rejected when :func:`make_output_dir` tries).
    """
    path = Path(path)
    if path.exists() and not path.is_dir():
        raise input_error("--out", "a folder", f"{str(path)!r}, which is a file")
    probe = path
    while not probe.exists():
        if probe.parent == probe:
            break
        probe = probe.parent
    if not probe.is_dir():
        raise input_error("--out", "a writable folder", f"{str(path)!r}: {str(probe)!r} is not a folder")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise input_error("--out", "a writable folder", f"{str(path)!r}: no write permission in {str(probe)!r}")


def make_output_dir(path: Path) -> Path:
    """Create ``path`` (and missing parents) and prove it writable with a probe file.

    On failure every folder this call created is removed again, so a rejected
    output folder leaves nothing behind.
    """
    path = Path(path)
    check_output_dir(path)
    missing: list[Path] = []
    probe = path
    while not probe.exists():
        missing.append(probe)
        probe = probe.parent
    created: list[Path] = []
    try:
        for folder in reversed(missing):
            folder.mkdir()
            created.append(folder)
        fd, name = tempfile.mkstemp(prefix=".write-probe-", dir=path)
        os.close(fd)
        os.unlink(name)
    except OSError as exc:
        for folder in reversed(created):
            try:
                folder.rmdir()
            except OSError:
                pass
        raise input_error(
            "--out", "a writable folder", f"{str(path)!r} ({exc.strerror or type(exc).__name__})"
        ) from None
    return path
