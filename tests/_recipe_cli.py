"""Run the recipe command in this process and capture what it prints (shared by the recipe tests)."""

from __future__ import annotations

import contextlib
import io


def run_cli(argv: list[str]) -> tuple[int, str, str]:
    """Exit status, stdout and stderr of ``rvqlayer-recipe argv``."""
    from recipes import cli

    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        rc = cli.main(argv)
    return rc, out.getvalue(), err.getvalue()
