"""The library's error type, importable without torch (the numpy runtime uses it too)."""

from __future__ import annotations

from typing import Any


class RvqlayerError(ValueError):
    """Raised for invalid options or input; a subclass of ``ValueError``."""


def fail(arg: str, expected: str, got: Any) -> RvqlayerError:
    """Build the library's error for argument ``arg``."""
    return RvqlayerError(f"expected `{arg}` to be {expected}, got {got}")
