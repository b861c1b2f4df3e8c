"""Lightning pieces shared by the recipes: the module wrapper, step-keyed batches,
periodic checkpoints, Ctrl-C handling and the training call.

Every recipe draws the batch of training step ``s`` from ``(seed, s)`` alone,
and the checkpoint keeps torch's random state, so a run resumed from its last
checkpoint sees the same batches and the same stage-dropout draws as one that
was never interrupted.
"""

from __future__ import annotations

import contextlib
import logging
import signal
import sys
import threading
import warnings
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytorch_lightning as pl
import torch
from pytorch_lightning.callbacks import Callback, TQDMProgressBar
from pytorch_lightning.loggers import TensorBoardLogger
from torch import nn
from typing_extensions import override

from ._checkpoint import CHECKPOINT, AtomicCheckpointIO


# ------------------------------------------------------------- interrupts
class TrainingInterrupted(Exception):
    """Ctrl-C stopped training; a checkpoint of the last finished ``step`` was written to ``path``."""

    def __init__(self, step: int, path: Path) -> None:
        super().__init__(f"interrupted at step {step}")
        self.step = step
        self.path = path


class OtherRankDone(Exception):
    """Training ended on a rank other than zero: rank zero alone evaluates and writes the outputs."""


class _StopRequest:
    """SIGINT handler for the time of ``fit``: the first Ctrl-C asks to stop after the current step.

    The step in progress finishes, so the checkpoint written then resumes bit
    for bit; a second Ctrl-C interrupts at once (``KeyboardInterrupt``).
    Outside the main thread (where handlers cannot be set) it does nothing.
    """

    def __init__(self) -> None:
        self.requested = False
        self._previous: Any = None

    def _handle(self, signum: int, frame: Any) -> None:
        if self.requested:
            raise KeyboardInterrupt
        self.requested = True

    def __enter__(self) -> _StopRequest:
        if threading.current_thread() is threading.main_thread():
            self._previous = signal.signal(signal.SIGINT, self._handle)
        return self

    def __exit__(self, *exc: Any) -> None:
        if self._previous is not None:
            signal.signal(signal.SIGINT, self._previous)


class SaveLast(Callback):
    """Write ``checkpoints/last.ckpt`` every ``every`` steps, after the last step, and when asked to stop."""

    def __init__(self, path: Path, every: int, stop: _StopRequest | None = None) -> None:
        self.path = Path(path)
        self.every = max(1, every)
        self.stop = stop

    @override
    def on_train_batch_end(self, trainer: pl.Trainer, pl_module: pl.LightningModule, *args: Any) -> None:
        step = trainer.global_step
        stopping = self.stop is not None and self.stop.requested
        if trainer.world_size > 1:  # a Ctrl-C seen by any rank stops every rank at the same step
            stopping = trainer.strategy.reduce_boolean_decision(stopping, all=False)
        if step % self.every == 0 or step >= trainer.max_steps or stopping:
            trainer.save_checkpoint(self.path, weights_only=False)
        if stopping:
            trainer.should_stop = True


class _StderrProgressBar(TQDMProgressBar):
    """Lightning's progress bar on stderr, so that stdout holds the recipe's own lines only.

    Lightning's bars are built with ``file=sys.stdout``; each is built here
    while ``sys.stdout`` points at stderr.
    """

    @override
    def init_train_tqdm(self) -> Any:
        with contextlib.redirect_stdout(sys.stderr):
            return super().init_train_tqdm()

    @override
    def init_validation_tqdm(self) -> Any:
        with contextlib.redirect_stdout(sys.stderr):
            return super().init_validation_tqdm()


# ----------------------------------------------------------------- batches
class StepBatches:
    """Endless batches ``make(step)`` for ``step = start, start + 1, ...``.

    The batch depends on the step number only, so resuming at step ``start``
    continues the exact stream of an uninterrupted run. Under
    ``torch.distributed`` rank ``r`` of ``w`` takes rows ``r, r + w, ...`` of
    each batch, so all ranks together see the batch one process would see.
    """

    def __init__(self, make: Callable[[int], Any], start: int = 0) -> None:
        self.make = make
        self.start = start

    def __iter__(self) -> Iterator[Any]:
        rank, world = 0, 1
        if torch.distributed.is_available() and torch.distributed.is_initialized():
            rank, world = torch.distributed.get_rank(), torch.distributed.get_world_size()
        step = self.start
        while True:
            batch = self.make(step)
            yield batch[rank::world] if world > 1 else batch
            step += 1


class FixedBatches:
    """The same few batches on every pass (validation).

    A plain iterable rather than a ``DataLoader``: creating a DataLoader
    iterator draws from torch's global random generator, which would shift
    the stage-dropout draws of the following training steps.
    """

    def __init__(self, batches: list[Any]) -> None:
        self.batches = list(batches)

    def __iter__(self) -> Iterator[Any]:
        return iter(self.batches)

    def __len__(self) -> int:
        return len(self.batches)


# ------------------------------------------------------------------ module
class RecipeModule(pl.LightningModule):
    """Lightning wrapper shared by the recipes.

    Subclasses hold their model (with its quantizer, registered once) and
    implement :meth:`losses`, which returns a dict of scalar tensors
    including ``"loss"`` (what is minimised).
    ``config`` (plain values) is stored in every checkpoint under ``"recipe"``.
    """

    def __init__(self, config: dict[str, Any], lr: float = 1e-3) -> None:
        super().__init__()
        self.config = dict(config)
        self.lr = lr

    def losses(self, batch: Any) -> dict[str, torch.Tensor]:
        raise NotImplementedError

    def training_step(self, batch: Any, batch_idx: int) -> torch.Tensor | None:
        parts = self.losses(batch)
        self.log_dict({f"train/{k}": v.detach() for k, v in parts.items()}, prog_bar=False)
        self.log("loss", parts["loss"].detach(), prog_bar=True, logger=False)
        loss = parts["loss"]
        return loss if loss.requires_grad else None

    def validation_step(self, batch: Any, batch_idx: int) -> None:
        parts = self.losses(batch)
        self.log_dict({f"val/{k}": v for k, v in parts.items()}, prog_bar=False, sync_dist=True)

    def configure_optimizers(self) -> Any:
        params = [p for p in self.parameters() if p.requires_grad]
        return torch.optim.Adam(params, lr=self.lr) if params else None

    def on_save_checkpoint(self, checkpoint: dict[str, Any]) -> None:
        checkpoint["recipe"] = dict(self.config)
        checkpoint["torch_rng"] = torch.get_rng_state()

    def on_load_checkpoint(self, checkpoint: dict[str, Any]) -> None:
        rng = checkpoint.get("torch_rng")
        if isinstance(rng, torch.Tensor):
            torch.set_rng_state(rng)


def val_interval(config: dict[str, Any]) -> int:
    """Steps between validation passes: 2 per run with ``--quick``, else 5."""
    return max(1, int(config["steps"]) // (2 if config["quick"] else 5))


def monitor_callbacks() -> list[Callback]:  # the same instances' states are checked on --resume
    """The codebook health monitor, when :mod:`rvqlayer.callbacks` is available."""
    try:
        from rvqlayer.callbacks import CodebookMonitor
    except ImportError:
        return []
    return [CodebookMonitor()]


def _quiet_lightning() -> None:
    """Keep Lightning's start-up chatter and known harmless warnings out of the recipes' output."""
    for name in (
        "pytorch_lightning.utilities.rank_zero",
        "lightning_fabric.utilities.rank_zero",
        "pytorch_lightning.accelerators.cuda",
    ):
        logging.getLogger(name).setLevel(logging.WARNING)
    warnings.filterwarnings("ignore", message=".*does not have many workers.*")
    warnings.filterwarnings("ignore", message=".*isinstance\\(treespec, LeafSpec\\).*")
    warnings.filterwarnings("ignore", message=".*resuming from a checkpoint that ended before the epoch ended.*")
    warnings.filterwarnings("ignore", message=".*`training_step` returned `None`.*")
    warnings.filterwarnings("ignore", message=".*configure_optimizers` returned `None`.*")
    warnings.filterwarnings("ignore", message=".*defined a `validation_step` but have no `val_dataloader`.*")


def train(
    module: RecipeModule,
    make_batch: Callable[[int], Any],
    *,
    out: Path,
    steps: int,
    resume: dict[str, Any] | None,
    val_batches: list[Any] | None = None,
    val_every: int | None = None,
    save_every: int = 100,
    gradient_clip: float | None = None,
) -> pl.Trainer:
    """Fit ``module`` for ``steps`` optimizer steps (in total, counting a resumed run's).

    ``resume`` is the checkpoint read by :func:`~recipes._checkpoint.read_checkpoint`
    (or None). Logs go to ``out/logs`` (TensorBoard), the checkpoint to
    ``out/checkpoints/last.ckpt``. Ctrl-C stops after the step in progress,
    writes the checkpoint and raises :class:`TrainingInterrupted`.
    """
    _quiet_lightning()
    processes, nodes = int(module.config.get("devices", 1)), int(module.config.get("num_nodes", 1))
    for stale in (out / CHECKPOINT).parent.glob(f".{CHECKPOINT.name}.*.tmp"):
        stale.unlink()  # left by a run killed while it wrote a checkpoint
    start = int(resume["global_step"]) if resume is not None else 0
    logger = TensorBoardLogger(str(out), name="logs", version="", default_hp_metric=False)
    stop = _StopRequest()
    callbacks: list[Callback] = [SaveLast(out / CHECKPOINT, save_every, stop), _StderrProgressBar(refresh_rate=10)]
    callbacks += monitor_callbacks()
    log_every = max(1, min(50, steps // 20))
    val_kwargs: dict[str, Any] = {"limit_val_batches": 0}
    if val_batches:
        interval = val_every or max(1, steps // 4)
        val_kwargs = {"val_check_interval": interval, "check_val_every_n_epoch": None}
    trainer = pl.Trainer(
        accelerator="cpu",
        devices=processes,
        num_nodes=nodes,
        strategy="ddp" if processes * nodes > 1 else "auto",
        max_steps=steps,
        logger=logger,
        callbacks=callbacks,
        plugins=[AtomicCheckpointIO()],
        enable_checkpointing=False,
        enable_model_summary=False,
        num_sanity_val_steps=0,
        log_every_n_steps=log_every,
        gradient_clip_val=gradient_clip,
        **val_kwargs,
    )
    ckpt = str(out / CHECKPOINT) if resume is not None else None
    if resume is not None and start >= steps:
        module.load_state_dict(resume["state_dict"])
        module.on_load_checkpoint(resume)
        print(f"checkpoint is at step {start} of {steps}: nothing left to train", flush=True)
        return trainer
    if resume is not None:
        print(f"resuming from the checkpoint at step {start} (of {steps})", flush=True)
    with stop:
        try:
            trainer.fit(
                module,
                train_dataloaders=StepBatches(make_batch, start),
                val_dataloaders=FixedBatches(val_batches) if val_batches else None,
                ckpt_path=ckpt,
                weights_only=True,
            )
        except SystemExit:
            if stop.requested:  # a second Ctrl-C: Lightning turns the KeyboardInterrupt into SystemExit(1)
                raise KeyboardInterrupt from None
            raise
    if stop.requested and trainer.global_step < steps:
        raise TrainingInterrupted(trainer.global_step, out / CHECKPOINT)
    if trainer.global_rank > 0:
        raise OtherRankDone
    return trainer


def count_parameters(model: nn.Module) -> int:
    return sum(p.numel() for p in model.parameters() if p.requires_grad)
