"""The recipes' own input error (the library's ``RvqlayerError`` stays the library's).

Every message has the command line's shape: "expected `--option` to be ...,
got ...". The command prints it as one line on stderr and exits with status 2.
"""

from __future__ import annotations

from typing import Any


class RecipeInputError(ValueError):
    """A bad option, data file, output folder or checkpoint given to ``rvqlayer-recipe``."""


def input_error(arg: str, expected: str, got: Any) -> RecipeInputError:
    """Build the error for option ``arg``.

    >>> str(input_error("--stages", "an int in [1, 64]", 0))
    'expected `--stages` to be an int in [1, 64], got 0'
    """
    return RecipeInputError(f"expected `{arg}` to be {expected}, got {got}")
