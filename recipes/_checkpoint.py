"""Recipe checkpoints: written atomically, read without running code, checked before a resume.

A checkpoint is Lightning's dict plus ``"recipe"`` (the run's settings) and
``"torch_rng"`` (torch's random state). Before ``--resume`` uses one, every
tensor in it must be finite, the model's tensors must have exactly the
names, shapes and dtypes of the model the settings build, and the optimizer's
moments those of the parameters: a damaged or edited file gives one
``RecipeInputError`` and nothing is written.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import torch
from pytorch_lightning.callbacks import Callback
from pytorch_lightning.plugins.io import TorchCheckpointIO
from torch import nn

from rvqlayer.files import atomic_write

from ._errors import input_error

CHECKPOINT = Path("checkpoints") / "last.ckpt"


class AtomicCheckpointIO(TorchCheckpointIO):
    """Checkpoint files written under a temporary name in the same folder, then renamed.

    Lightning's own writer stages the bytes in the system temp folder and
    moves them, which is a copy (not atomic) when that folder lies on another
    file system. Loading always uses ``torch.load(weights_only=True)``.
    """

    def save_checkpoint(self, checkpoint: dict[str, Any], path: Any, storage_options: Any = None) -> None:
        with atomic_write(path) as f:
            torch.save(checkpoint, f)

    def load_checkpoint(self, path: Any, map_location: Any = None, weights_only: bool | None = None) -> dict[str, Any]:
        return read_checkpoint(Path(path))


def read_checkpoint(path: Path) -> dict[str, Any]:
    """Load a recipe checkpoint with ``weights_only=True``; a wrong file gives a clear error."""
    if not path.is_file():
        raise input_error("--resume", "a run folder with a checkpoint", f"no checkpoint at {str(path)!r}")
    try:
        state = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:  # truncated zip, wrong format, disallowed object
        raise input_error("--resume", "a readable checkpoint", f"{str(path)!r} ({type(exc).__name__})") from None
    if not isinstance(state, dict) or not {"state_dict", "global_step", "recipe"} <= set(state):
        raise input_error("--resume", "a checkpoint written by a recipe", f"{str(path)!r} without its recipe fields")
    return state


def _tensors(obj: Any, where: str) -> Iterator[tuple[str, torch.Tensor]]:
    """Every tensor inside nested dicts, lists and tuples, with a path naming it."""
    if isinstance(obj, torch.Tensor):
        yield where, obj
    elif isinstance(obj, dict):
        for key, value in obj.items():
            yield from _tensors(value, f"{where}/{key}")
    elif isinstance(obj, (list, tuple)):
        for i, value in enumerate(obj):
            yield from _tensors(value, f"{where}/{i}")


def check_resumable(state: dict[str, Any], module: nn.Module, path: Path, callbacks: Sequence[Callback] = ()) -> None:
    """Fail unless checkpoint ``state`` fits ``module`` (built from the same settings) and is finite.

    Each of ``callbacks`` (fresh instances, changed by this check) must accept
    its saved state, if the checkpoint holds one.
    """
    shown = repr(str(path))

    def bad(expected: str, got: str) -> Exception:
        return input_error("--resume", expected, f"{got} in {shown}")

    for where, t in _tensors(state, ""):
        if (t.is_floating_point() or t.is_complex()) and t.numel() and not bool(torch.isfinite(t).all()):
            n = int((~torch.isfinite(t)).sum())
            raise bad("a checkpoint with finite tensors", f"{n} non-finite values in `{where.lstrip('/')}`")
    step = state["global_step"]
    if isinstance(step, bool) or not isinstance(step, int) or step < 0:
        raise bad("a checkpoint with a step count >= 0", f"global_step {step!r}")
    rng = state.get("torch_rng")
    mine = torch.get_rng_state()
    if not (isinstance(rng, torch.Tensor) and rng.dtype == mine.dtype and rng.shape == mine.shape):
        got = f"{rng.dtype} {tuple(rng.shape)}" if isinstance(rng, torch.Tensor) else type(rng).__name__
        raise bad(f"a checkpoint with torch's random state ({mine.dtype} {tuple(mine.shape)})", got)

    weights, expected = state["state_dict"], module.state_dict()
    if not isinstance(weights, dict):
        raise bad("a checkpoint with a state_dict", type(weights).__name__)
    missing, unexpected = sorted(set(expected) - set(weights)), sorted(set(weights) - set(expected))
    if missing or unexpected:
        names = ", ".join([f"missing `{k}`" for k in missing[:3]] + [f"unexpected `{k}`" for k in unexpected[:3]])
        raise bad("a checkpoint with the tensors of this model", names)
    for key, want in expected.items():
        got = weights[key]
        if not isinstance(got, torch.Tensor) or got.shape != want.shape or got.dtype != want.dtype:
            shape = f"shape {tuple(got.shape)}, {got.dtype}" if isinstance(got, torch.Tensor) else type(got).__name__
            raise bad(f"a checkpoint whose `{key}` has shape {tuple(want.shape)}, {want.dtype}", shape)

    params = [p for p in module.parameters() if p.requires_grad]
    optimizers = state.get("optimizer_states", [])
    if not isinstance(optimizers, list) or len(optimizers) > 1:
        raise bad("a checkpoint with at most one optimizer state", repr(type(optimizers).__name__))
    for optimizer in optimizers:
        # Lightning stores {} for a model without an optimizer (nothing trained by gradient)
        per_param = optimizer.get("state", {} if not optimizer else None) if isinstance(optimizer, dict) else None
        if not isinstance(per_param, dict):
            raise bad("an optimizer state with per-parameter moments", type(optimizer).__name__)
        for index, moments in per_param.items():
            if not (isinstance(index, int) and 0 <= index < len(params) and isinstance(moments, dict)):
                raise bad(f"optimizer moments for parameters 0..{len(params) - 1}", f"an entry {index!r}")
            for name, t in moments.items():
                if isinstance(t, torch.Tensor) and t.ndim and t.shape != params[index].shape:
                    raise bad(
                        f"optimizer `{name}` of parameter {index} shaped {tuple(params[index].shape)}",
                        f"shape {tuple(t.shape)}",
                    )

    saved = state.get("callbacks", {})
    if not isinstance(saved, dict):
        raise bad("a checkpoint with callback states", type(saved).__name__)
    for callback in callbacks:
        if callback.state_key in saved:
            try:
                callback.load_state_dict(saved[callback.state_key])
            except ValueError as err:
                raise bad(f"a valid {type(callback).__name__} state", str(err)) from None
