#!/usr/bin/env python3
"""Set up a virtual environment and run the main job or the tests.

    python3 tasks.py main    # set up, then train the `speech` recipe and print its rate-quality table
    python3 tasks.py test    # set up, then run the test suite

Only python3 is needed. The environment lives in ``.venv`` (``RVQLAYER_VENV``
overrides the path). torch is installed first, pinned to the CPU build
2.13.0, so the project's range is met without pulling a GPU build.
"""

from __future__ import annotations

import os
import subprocess
import sys
import venv
from pathlib import Path

ROOT = Path(__file__).resolve().parent
VENV = Path(os.environ.get("RVQLAYER_VENV", ROOT / ".venv"))
TORCH = "torch==2.13.0"


def _python() -> Path:
    return VENV / ("Scripts" if os.name == "nt" else "bin") / "python"


def _run(*args: str | os.PathLike[str]) -> None:
    print("+", " ".join(str(a) for a in args), flush=True)
    subprocess.run([str(a) for a in args], check=True, cwd=ROOT)


def setup() -> Path:
    """Create the venv if needed and install torch, then the project with its extras."""
    if not _python().exists():
        venv.EnvBuilder(with_pip=True).create(VENV)
    py = _python()
    _run(py, "-m", "pip", "install", "--quiet", "--upgrade", "pip")
    _run(py, "-m", "pip", "install", "--quiet", TORCH)
    _run(py, "-m", "pip", "install", "--quiet", "-e", f"{ROOT}[recipes,export,test]")
    return py


def main(argv: list[str]) -> int:
    if not argv or argv[0] not in ("main", "test"):
        print(__doc__)
        return 2
    py = setup()
    extra = argv[1:]
    try:
        if argv[0] == "main":
            _run(py, "-m", "recipes.cli", "speech", *extra)
        else:
            _run(py, "-m", "pytest", "-q", *extra)
    except subprocess.CalledProcessError as exc:
        return exc.returncode or 1
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
