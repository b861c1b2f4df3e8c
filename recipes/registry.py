"""The recipes' interface: one registry of names, summaries and defaults, and what a module provides.

Adding a recipe is one :class:`RecipeSpec` in :data:`RECIPES` plus its module
``recipes/<name>.py`` providing the functions of :class:`Recipe`. The
command line (``rvqlayer-recipe``), its ``--help`` and the tests read
everything else from here.

A run's *settings* are a plain dict (so that checkpoints hold plain values):
``recipe``, ``quick``, ``seed``, ``stages``, ``entries``, ``code_dim``
(``None``: the quantizer's input size, no projection), ``steps``,
``batch_size``, ``data``, ``frame_rate``, ``refine`` (rounds of codebook
refinement; 0 for the recipes that take it, else ``None``) and, when the
recipe reads a data file, ``data_shape``.
"""

from __future__ import annotations

import importlib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import TYPE_CHECKING, Any, Protocol, runtime_checkable

if TYPE_CHECKING:
    from ._table import RateTable
    from ._training import RecipeModule

Settings = Mapping[str, Any]


@dataclass(frozen=True)
class Prepared:
    """What :meth:`Recipe.prepare` returns: the data, and what the command line checks about it.

    Attributes:
        data: whatever the recipe's ``build`` and ``run`` need (arrays, a
            generator seed, ...).
        input_size: the quantizer's input size, the largest allowed ``code_dim``.
        shape: shape of a user-given data file (kept in the checkpoint and
            compared on ``--resume``); ``None`` for bundled or synthetic data.
        source: one line naming where the data came from.
    """

    data: Any
    input_size: int
    shape: tuple[int, ...] | None = None
    source: str = ""


@runtime_checkable
class Recipe(Protocol):
    """What a recipe module provides (module-level functions with these signatures)."""

    def prepare(self, settings: Settings) -> Prepared:
        """Load or generate and check the data; writes nothing, changes no settings."""
        ...

    def build(self, settings: Settings, prepared: Prepared) -> RecipeModule:
        """The Lightning module, seeded from ``settings["seed"]``; writes nothing."""
        ...

    def run(
        self,
        module: RecipeModule,
        settings: Settings,
        prepared: Prepared,
        out: Path,
        resume: dict[str, Any] | None,
    ) -> tuple[RateTable, dict[str, Path]]:
        """Train (or continue ``resume``), evaluate, write every output; the table and the files written."""
        ...


@dataclass(frozen=True)
class RecipeSpec:
    """One recipe: its name (also its module ``recipes.<name>``), a summary and its defaults.

    ``defaults`` holds stages, entries, code_dim (``None``: input size),
    steps and batch_size; ``quick`` the values ``--quick`` replaces.
    ``options`` names the recipe-specific command-line settings it accepts
    (``"data"``, ``"frame_rate"``, ``"refine"``); any other recipe rejects them.
    """

    name: str
    summary: str
    defaults: Mapping[str, Any]
    quick: Mapping[str, Any]
    options: frozenset[str] = field(default_factory=frozenset)

    def __post_init__(self) -> None:
        object.__setattr__(self, "defaults", MappingProxyType(dict(self.defaults)))
        object.__setattr__(self, "quick", MappingProxyType(dict(self.quick)))

    def describe(self) -> str:
        """One line of defaults for ``--help``.

        >>> print(RECIPES["digits"].describe())
        digits: stages 4, entries 64, code-dim 32, steps 3000, batch-size 128 (--quick: steps 300)
        """
        d = self.defaults
        code_dim = "input size" if d["code_dim"] is None else d["code_dim"]
        quick = ", ".join(f"{k.replace('_', '-')} {v}" for k, v in self.quick.items())
        return (
            f"{self.name}: stages {d['stages']}, entries {d['entries']}, code-dim {code_dim}, "
            f"steps {d['steps']}, batch-size {d['batch_size']} (--quick: {quick})"
        )

    def load(self) -> Recipe:
        """Import ``recipes.<name>`` and check that it provides the :class:`Recipe` functions."""
        module = importlib.import_module(f"{__package__}.{self.name}")
        if not isinstance(module, Recipe):
            missing = [f for f in ("prepare", "build", "run") if not callable(getattr(module, f, None))]
            raise TypeError(f"recipe module {module.__name__} lacks {', '.join(missing)}")
        return module


def _spec(*specs: RecipeSpec) -> Mapping[str, RecipeSpec]:
    return MappingProxyType({s.name: s for s in specs})


RECIPES: Mapping[str, RecipeSpec] = _spec(
    RecipeSpec(
        "speech",
        "the main job: a small speech codec at 16 kHz judged by PESQ and STOI (synthetic or --data DIR)",
        {"stages": 8, "entries": 256, "code_dim": 32, "steps": 1200, "batch_size": 12},
        {"steps": 60, "batch_size": 8},
        frozenset({"data"}),
    ),
    RecipeSpec(
        "tones",
        "a small audio codec on synthetic 16 kHz tones, noise bursts and pauses",
        {"stages": 8, "entries": 256, "code_dim": 32, "steps": 1500, "batch_size": 12},
        {"steps": 120, "batch_size": 8},
    ),
    RecipeSpec(
        "digits",
        "scikit-learn's bundled 8x8 handwritten digits through a small autoencoder",
        {"stages": 4, "entries": 64, "code_dim": 32, "steps": 3000, "batch_size": 128},
        {"steps": 300},
    ),
    RecipeSpec(
        "embeddings",
        "a quantizer fitted directly to pre-computed feature vectors (.npy or .pt)",
        {"stages": 6, "entries": 128, "code_dim": None, "steps": 240, "batch_size": 1024},
        {"steps": 60},
        frozenset({"data", "frame_rate", "refine"}),
    ),
)
"""Every recipe the command knows, in the order ``--help`` lists them."""
