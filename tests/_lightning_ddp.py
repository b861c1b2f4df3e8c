"""Helper for tests/test_distributed.py: a tiny codec trained by Lightning, on 1 or 2 CPU processes.

    python tests/_lightning_ddp.py OUT_DIR DEVICES

With 2 devices (strategy "ddp", gloo) rank r trains on half r of every batch;
with 1 it trains on the whole batches. Each rank writes ``OUT_DIR/rank<r>_of<DEVICES>.pt``
(the quantizer's state) and ``.json`` (collapse warnings seen, logger calls received).
"""

from __future__ import annotations

import json
import sys
import warnings
from pathlib import Path

import pytorch_lightning as pl
import torch
from pytorch_lightning.loggers.logger import Logger
from torch import nn

from rvqlayer import MultiStageQuantizer
from rvqlayer.callbacks import CodebookCollapseWarning, CodebookMonitor

STEPS, BATCH = 6, 64


class Recorder(Logger):
    """Counts what it receives, on whichever rank calls it."""

    def __init__(self) -> None:
        super().__init__()
        self.calls = 0

    @property
    def name(self) -> str:
        return "recorder"

    @property
    def version(self) -> str:
        return "0"

    def log_metrics(self, metrics, step=None) -> None:
        self.calls += 1

    def log_hyperparams(self, params, *args, **kwargs) -> None:
        pass


class TinyCodec(pl.LightningModule):
    def __init__(self) -> None:
        super().__init__()
        self.encoder = nn.Linear(12, 8)
        self.bottleneck = MultiStageQuantizer(8, stages=3, entries=16, init_batches=2)
        self.decoder = nn.Linear(8, 12)

    def training_step(self, batch, batch_idx):
        out = self.bottleneck(self.encoder(batch))
        return (self.decoder(out.quantized) - batch).pow(2).mean() + out.loss

    def on_train_start(self) -> None:
        # The same random state at the first step on 1 and 2 processes: the k-means fit (on
        # rank 0) draws from it, and Lightning's start-up differs between the two set-ups.
        torch.manual_seed(1)

    def configure_optimizers(self):
        return torch.optim.SGD(self.parameters(), lr=0.05)

    def train_dataloader(self):
        data = torch.randn(STEPS, BATCH, 12, generator=torch.Generator().manual_seed(5))
        world, rank = self.trainer.world_size, self.trainer.global_rank
        part = BATCH // world
        return torch.utils.data.DataLoader([b[rank * part : (rank + 1) * part] for b in data], batch_size=None)


def main() -> None:
    out, devices = Path(sys.argv[1]), int(sys.argv[2])
    torch.set_num_threads(1)
    pl.seed_everything(0, verbose=False)
    model = TinyCodec()
    recorder = Recorder()
    monitor = CodebookMonitor(every_n_steps=2, warn_below=0.9, dead_below=1.0, plot=False)
    trainer = pl.Trainer(
        accelerator="cpu",
        devices=devices,
        strategy="ddp" if devices > 1 else "auto",
        max_steps=STEPS,
        use_distributed_sampler=False,
        logger=recorder,
        callbacks=[monitor],
        enable_progress_bar=False,
        enable_model_summary=False,
        enable_checkpointing=False,
        default_root_dir=out,
    )
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        trainer.fit(model)
    name = f"rank{trainer.global_rank}_of{devices}"
    torch.save(model.bottleneck.state_dict(), out / f"{name}.pt")
    collapse = sum(issubclass(w.category, CodebookCollapseWarning) for w in seen)
    (out / f"{name}.json").write_text(json.dumps({"warnings": collapse, "logger_calls": recorder.calls}))


if __name__ == "__main__":
    main()
