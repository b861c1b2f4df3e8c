"""A run's settings: the range of each, its check, and how the command line, a checkpoint
and the recipe's defaults combine.

One check per setting serves both the command line and ``--resume``, so a
value read from a checkpoint is held to the same rule, with the same message,
as the option that would have set it.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ._errors import input_error
from .registry import RecipeSpec

# Settings that fix the model's shape or its data stream: a resumed run must keep them.
FIXED_ON_RESUME = ("stages", "entries", "code_dim", "seed", "data")
# Settings only some recipes take (named in their RecipeSpec.options); None for every other recipe.
RECIPE_SPECIFIC = ("data", "frame_rate", "refine")
# Defaults of recipe-specific settings for the recipes that take them (None: left out).
_SPECIFIC_DEFAULTS = {"data": None, "frame_rate": None, "refine": 0}


def _int_in(low: int, high: int) -> Callable[[str, Any], int]:
    def check(flag: str, value: Any) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise input_error(flag, "an int", repr(value))
        if not low <= value <= high:
            raise input_error(flag, f"an int in [{low}, {high}]", value)
        return value

    return check


def _positive_float(flag: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise input_error(flag, "a number", repr(value))
    if not (math.isfinite(value) and value > 0):
        raise input_error(flag, "a finite number > 0", value)
    return float(value)


def _path_text(flag: str, value: Any) -> str:
    if not isinstance(value, str) or not value:
        raise input_error(flag, "a file name", repr(value))
    return value


@dataclass(frozen=True)
class Setting:
    """One setting: its option, a check of a value of the right type, and a text parser for argparse."""

    key: str
    check: Callable[[str, Any], Any]
    kind: type
    optional: bool = False  # None allowed (after defaults)

    @property
    def flag(self) -> str:
        return "--" + self.key.replace("_", "-")

    def parse(self, text: str) -> Any:
        """Command-line text to a checked value (raises ``RecipeInputError``)."""
        try:
            value = self.kind(text)
        except ValueError:
            raise input_error(self.flag, "an int" if self.kind is int else "a number", repr(text)) from None
        return self.check(self.flag, value)

    def validate(self, value: Any) -> Any:
        if value is None and self.optional:
            return None
        return self.check(self.flag, value)


SETTINGS: dict[str, Setting] = {
    s.key: s
    for s in (
        Setting("stages", _int_in(1, 64), int),
        Setting("entries", _int_in(2, 16384), int),
        Setting("code_dim", _int_in(1, 1 << 20), int, optional=True),
        Setting("steps", _int_in(1, 10_000_000), int),
        Setting("batch_size", _int_in(1, 65536), int),
        Setting("seed", _int_in(0, 2**32 - 1), int),
        Setting("frame_rate", _positive_float, float, optional=True),
        Setting("data", _path_text, str, optional=True),
        Setting("refine", _int_in(0, 20), int, optional=True),
    )
}


def check_stored(stored: Any, spec: RecipeSpec, where: str) -> dict[str, Any]:
    """The settings kept in a checkpoint, each held to its option's rule.

    ``where`` names the checkpoint in messages. Unknown keys are ignored.
    """
    if not isinstance(stored, dict):
        raise input_error("--resume", "a checkpoint written by a recipe", f"one without its settings ({where})")
    if stored.get("recipe") != spec.name:
        raise input_error("--resume", f"a checkpoint of the {spec.name!r} recipe", f"one of {stored.get('recipe')!r}")
    if not isinstance(stored.get("quick", False), bool):
        raise input_error("--quick", "True or False", f"{stored['quick']!r} (read from {where})")
    checked: dict[str, Any] = {"recipe": spec.name, "quick": bool(stored.get("quick", False))}
    for key, setting in SETTINGS.items():
        if key not in stored:
            continue
        try:
            checked[key] = setting.validate(stored[key])
        except ValueError as err:
            raise type(err)(f"{err} (read from {where})") from None
        if checked[key] is not None and key in RECIPE_SPECIFIC and key not in spec.options:
            raise input_error(
                setting.flag, f"absent for the {spec.name!r} recipe", f"{stored[key]!r} (read from {where})"
            )
    shape = stored.get("data_shape")
    if shape is not None:
        if not (
            isinstance(shape, (list, tuple))
            and len(shape) in (2, 3)
            and all(isinstance(n, int) and not isinstance(n, bool) and n > 0 for n in shape)
        ):
            raise input_error("--data", "a data shape [N, dim] or [N, T, dim]", f"{shape!r} (read from {where})")
        checked["data_shape"] = [int(n) for n in shape]
    return checked


def combine(given: dict[str, Any], stored: dict[str, Any] | None, spec: RecipeSpec, quick: bool) -> dict[str, Any]:
    """Settings of the run: the command line, then the checkpoint's (on resume), then the defaults.

    ``given`` holds the command line's values (``None`` where left out).
    """
    if stored is not None:
        for key in FIXED_ON_RESUME:
            mine = str(Path(given[key]).resolve()) if key == "data" and given[key] else given[key]
            if mine is not None and mine != stored.get(key):
                raise input_error(
                    SETTINGS[key].flag, f"{stored.get(key)!r} as in the checkpoint (or left out)", given[key]
                )
        quick = bool(stored.get("quick")) or quick
    defaults = dict(spec.defaults) | (dict(spec.quick) if quick else {})
    settings: dict[str, Any] = {"recipe": spec.name, "quick": quick, "seed": 0}
    settings |= {k: _SPECIFIC_DEFAULTS[k] if k in spec.options else None for k in RECIPE_SPECIFIC}
    settings |= defaults
    if stored is not None:
        settings |= {k: v for k, v in stored.items() if k in SETTINGS and v is not None}
        if "code_dim" in stored:  # None in a checkpoint is a choice (no projection), not "left out"
            settings["code_dim"] = stored["code_dim"]
    settings |= {k: v for k, v in given.items() if v is not None}
    return settings
