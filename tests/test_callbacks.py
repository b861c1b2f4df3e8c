"""CodebookMonitor with a tiny real Trainer on CPU (random data, a few steps each)."""

from __future__ import annotations

import contextlib
import csv
import logging
import math
import os
import stat
import subprocess
import sys
import warnings
from pathlib import Path

import pytest
import torch
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

pl = pytest.importorskip("pytorch_lightning")
pytest.importorskip("matplotlib")

from pytorch_lightning.loggers import CSVLogger, TensorBoardLogger  # noqa: E402

from rvqlayer import MultiStageQuantizer, RvqlayerError  # noqa: E402
from rvqlayer.callbacks import (  # noqa: E402
    CodebookCollapseWarning,
    CodebookMonitor,
    StageRecord,
    collapse_decision,
    updated_peak,
)
from rvqlayer.health import StageHealth  # noqa: E402

FIGURES = ("usage", "dead", "perplexity", "batch_perplexity", "energy_left_db", "reseeds")


class TinyCodec(pl.LightningModule):
    """Linear encoder -> 3-stage quantizer (16 entries) -> linear decoder, 12 numbers per example."""

    def __init__(self, **quantizer_options) -> None:
        super().__init__()
        self.encoder = nn.Linear(12, 8)
        self.bottleneck = MultiStageQuantizer(8, stages=3, entries=16, **quantizer_options)
        self.decoder = nn.Linear(8, 12)

    def _loss(self, x: torch.Tensor) -> torch.Tensor:
        out = self.bottleneck(self.encoder(x))
        return (self.decoder(out.quantized) - x).pow(2).mean() + out.loss

    def training_step(self, batch, batch_idx):
        return self._loss(batch[0])

    def validation_step(self, batch, batch_idx):
        self.log("val_loss", self._loss(batch[0]))

    def configure_optimizers(self):
        return torch.optim.Adam(self.parameters(), lr=1e-3)


def _loader() -> DataLoader:
    return DataLoader(TensorDataset(torch.randn(512, 12, generator=torch.Generator().manual_seed(1))), batch_size=64)


def _collapsed_codec() -> TinyCodec:
    """Stage 2 collapsed: all its codewords at one point far from the data, reseeding off."""
    torch.manual_seed(0)
    model = TinyCodec(init="random", reseed_below=0.0, ema_decay=0.5)
    _collapse(model.bottleneck.codebooks[1])
    return model


@torch.no_grad()
def _collapse(codebook) -> None:
    codebook.codewords.fill_(10.0)
    codebook.ema_sum.copy_(codebook.codewords * codebook.ema_count.unsqueeze(1))  # keep the EMA consistent


def _fit(model, monitor, tmp_path: Path, *, max_steps: int, val: bool = False, ckpt_path=None, **trainer_options):
    """Fit and return (trainer, collapse warnings)."""
    options = dict(
        accelerator="cpu",
        devices=1,
        max_steps=max_steps,
        enable_progress_bar=False,
        enable_model_summary=False,
        enable_checkpointing=False,
        logger=False,
        default_root_dir=tmp_path,
        log_every_n_steps=1,
        limit_val_batches=2 if val else 0,
        callbacks=[monitor],
    )
    options.update(trainer_options)
    trainer = pl.Trainer(**options)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        trainer.fit(model, _loader(), _loader() if val else None, ckpt_path=ckpt_path)
    return trainer, [str(w.message) for w in caught if issubclass(w.category, CodebookCollapseWarning)]


def test_import_rvqlayer_leaves_lightning_out() -> None:
    code = (
        "import sys, rvqlayer\n"
        "bad = [m for m in ('pytorch_lightning', 'lightning', 'lightning_fabric', 'matplotlib') if m in sys.modules]\n"
        "assert not bad, bad\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert "pytorch_lightning" in sys.modules  # the name checked above is the one rvqlayer.callbacks imports


@contextlib.contextmanager
def _rank_zero_messages():
    """Collect what goes through Lightning's ``rank_zero_info`` (its logger), at INFO level."""
    from pytorch_lightning.utilities.rank_zero import rank_zero_module

    messages: list[str] = []

    class Collect(logging.Handler):
        def emit(self, record: logging.LogRecord) -> None:
            messages.append(record.getMessage())

    log, handler = rank_zero_module.log, Collect(logging.INFO)
    level = log.level
    log.setLevel(logging.INFO)
    log.addHandler(handler)
    try:
        yield messages
    finally:
        log.removeHandler(handler)
        log.setLevel(level)


def test_logs_every_stage_to_csv_and_tensorboard_and_plots(tmp_path: Path) -> None:
    pytest.importorskip("tensorboard")
    from matplotlib.image import imread
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    torch.manual_seed(0)
    csv_logger = CSVLogger(tmp_path, name="csv")
    tb_logger = TensorBoardLogger(tmp_path, name="tb")
    monitor = CodebookMonitor()  # every_n_steps=None: the trainer's log_every_n_steps
    with _rank_zero_messages() as messages:
        _fit(
            TinyCodec(), monitor, tmp_path, max_steps=16, val=True, logger=[csv_logger, tb_logger], log_every_n_steps=4
        )
    wanted = {f"codebook/bottleneck/stage{k}/{f}" for k in (1, 2, 3) for f in FIGURES}
    wanted |= {"codebook/bottleneck/entropy_bits", "codebook/bottleneck/energy_left_db"}

    with open(Path(csv_logger.log_dir) / "metrics.csv", newline="") as fh:
        rows = [r for r in csv.DictReader(fh) if r.get("codebook/bottleneck/stage1/usage")]
    assert sorted(int(r["step"]) for r in rows) == [4, 8, 12, 16]
    for key in wanted:
        values = [float(r[key]) for r in rows]
        assert all(math.isfinite(v) for v in values), key
    assert all(0.0 < float(r["codebook/bottleneck/stage3/usage"]) <= 1.0 for r in rows)
    assert all(1.0 <= float(r["codebook/bottleneck/stage1/perplexity"]) <= 16.0 for r in rows)

    events = EventAccumulator(tb_logger.log_dir)
    events.Reload()
    assert wanted <= set(events.Tags()["scalars"])
    for key in wanted:
        scalars = events.Scalars(key)
        assert [s.step for s in scalars] == [4, 8, 12, 16], key
        assert all(math.isfinite(s.value) for s in scalars), key

    # two validation epochs (8 batches each) give two plots; the sanity check gives none
    plots = sorted(Path(csv_logger.log_dir).glob("codebook_health_*.png"))
    assert len(plots) == 2 and str(plots[-1]) == monitor.last_plot
    assert plots[-1].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    image = imread(plots[-1])
    assert image.ndim == 3 and image.shape[0] > 100 and image.shape[1] > 100 and float(image.std()) > 0

    out = "\n".join(messages)
    assert "codebook health of `bottleneck` after 16 steps" in out
    table = out.split("after 16 steps:\n", 1)[1]
    assert [line.split()[0] for line in table.splitlines()[1:4]] == ["1", "2", "3"]
    assert "bits/vector fixed" in table


def test_forced_collapse_warns_once_naming_the_stage(tmp_path: Path) -> None:
    model = _collapsed_codec()
    monitor = CodebookMonitor(every_n_steps=1, on_collapse="warn", plot=False)
    trainer, caught = _fit(model, monitor, tmp_path, max_steps=12)
    assert trainer.global_step == 12
    assert len(caught) == 1, caught
    assert "`bottleneck` stage 2 " in caught[0] and "usage" in caught[0]
    state = monitor.state_dict()["modules"]["bottleneck"]
    assert state["warned"] == [False, True, False]
    assert state["collapses"][1] >= 3  # seen at several checks, warned once
    assert model.bottleneck.health().stages[1].usage < monitor.warn_below  # "warn" alone does not repair


def test_stop_ends_training_with_a_message_naming_the_stage(tmp_path: Path) -> None:
    model = _collapsed_codec()
    monitor = CodebookMonitor(every_n_steps=1, on_collapse="stop", plot=False)
    trainer, caught = _fit(model, monitor, tmp_path, max_steps=100)
    assert trainer.global_step < 100 and trainer.should_stop
    message = monitor.stop_message
    assert message is not None and message in caught
    stage = model.bottleneck.health().stages[1]  # nothing trained after the stop: same figures
    assert f"`bottleneck` stage 2 at step {trainer.global_step}" in message
    assert f"usage {stage.usage:.1%} of 16 entries, {stage.dead} dead, perplexity {stage.perplexity:.1f}" in message
    assert "stage 1" not in message and "stage 3" not in message


def test_reseed_makes_usage_recover(tmp_path: Path) -> None:
    model = _collapsed_codec()
    monitor = CodebookMonitor(every_n_steps=1, on_collapse="reseed", plot=False)
    _, caught = _fit(model, monitor, tmp_path, max_steps=12)
    assert len(caught) == 1 and "stage 2" in caught[0]
    stage = model.bottleneck.health().stages[1]
    # usage counts assignments actually made: 1.0 on seeds 0-4 and 1 and 2 threads (collapsed: 1/16).
    # The perplexity of the last 64-vector batch is not asserted: it spread 11.2-15.2 over those seeds.
    assert stage.usage > 0.9 and stage.reseeds >= 15
    assert monitor.state_dict()["modules"]["bottleneck"]["forced_reseeds"][1] >= 1


def test_perplexity_drop_is_detected_after_a_healthy_start(tmp_path: Path) -> None:
    class CollapseAtStep(pl.Callback):
        def on_train_batch_start(self, trainer, pl_module, batch, batch_idx):
            if trainer.global_step == 6:
                _collapse(pl_module.bottleneck.codebooks[1])

    torch.manual_seed(0)
    model = TinyCodec(init="random", reseed_below=0.0, ema_decay=0.5)
    monitor = CodebookMonitor(every_n_steps=1, warn_below=0.0, perplexity_drop=3.0, plot=False)
    _, caught = _fit(model, monitor, tmp_path, max_steps=14, callbacks=[CollapseAtStep(), monitor])
    assert len(caught) == 1, caught
    assert "`bottleneck` stage 2" in caught[0] and "perplexity fell from" in caught[0]
    assert int(caught[0].split(" at step ")[1].split(":")[0]) > 6


def test_decisions_follow_the_all_rank_reduction(tmp_path: Path, monkeypatch) -> None:
    # A healthy run in which "another rank" reports stage 3 collapsed: every rank must act on it.
    torch.manual_seed(0)
    monitor = CodebookMonitor(every_n_steps=2, on_collapse="stop", plot=False)
    trainer = pl.Trainer(
        accelerator="cpu",
        max_steps=20,
        enable_progress_bar=False,
        enable_model_summary=False,
        enable_checkpointing=False,
        logger=False,
        callbacks=[monitor],
        default_root_dir=tmp_path,
    )
    calls = []

    real_reduce = trainer.strategy.reduce

    def reduce(tensor, group=None, reduce_op="mean"):
        if tensor.is_floating_point() and tensor.shape == (3,):  # the monitor's per-stage collapse flags
            calls.append(reduce_op)
            return tensor + torch.tensor([0.0, 0.0, 1.0])
        return real_reduce(tensor, group, reduce_op)

    monkeypatch.setattr(trainer.strategy, "reduce", reduce)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        trainer.fit(TinyCodec(), _loader())
    assert calls == ["sum"] and trainer.global_step == 2
    assert "stage 3 at step 2: reported by another rank" in monitor.stop_message


def test_resumed_run_keeps_warnings_and_counters(tmp_path: Path) -> None:
    monitor = CodebookMonitor(every_n_steps=1, plot=False)
    trainer, caught = _fit(_collapsed_codec(), monitor, tmp_path, max_steps=6)
    assert len(caught) == 1
    ckpt = tmp_path / "six.ckpt"
    trainer.save_checkpoint(ckpt)
    first = monitor.state_dict()

    resumed = CodebookMonitor(every_n_steps=1, plot=False)
    trainer, caught = _fit(
        TinyCodec(init="random", reseed_below=0.0, ema_decay=0.5), resumed, tmp_path, max_steps=10, ckpt_path=ckpt
    )
    after = resumed.state_dict()
    assert caught == []  # stage 2 is still collapsed, but its warning was already given
    assert after["checks"] == first["checks"] + 4 == 10 and after["last_step"] == 10
    assert after["modules"]["bottleneck"]["warned"] == [False, True, False]
    assert after["modules"]["bottleneck"]["collapses"][1] == first["modules"]["bottleneck"]["collapses"][1] + 4


def test_state_dict_round_trip(tmp_path: Path) -> None:
    monitor = CodebookMonitor(every_n_steps=1, on_collapse="stop", plot=False)
    _fit(_collapsed_codec(), monitor, tmp_path, max_steps=20)
    state = monitor.state_dict()
    path = tmp_path / "monitor.pt"
    torch.save(state, path)
    loaded = torch.load(path, weights_only=True)  # plain Python values only
    other = CodebookMonitor(every_n_steps=1, on_collapse="stop", plot=False)
    other.load_state_dict(loaded)
    assert other.state_dict() == state and other.stop_message == monitor.stop_message
    assert other.state_key == monitor.state_key != CodebookMonitor().state_key
    state["checks"] += 1
    assert other.state_dict()["checks"] == state["checks"] - 1  # a copy, not shared


@pytest.mark.parametrize(
    "bad",
    [
        {},
        {"version": 2},
        [],
        {
            "version": 1,
            "checks": 0,
            "last_step": 0,
            "plots": 0,
            "stop_message": None,
            "modules": {"q": {"warned": [True], "peak": [], "collapses": [], "forced_reseeds": []}},
        },
    ],
)
def test_foreign_state_is_rejected(bad) -> None:
    with pytest.raises(RvqlayerError, match="`state_dict`"):
        CodebookMonitor().load_state_dict(bad)


@pytest.mark.parametrize(
    "option",
    [
        dict(every_n_steps=0),
        dict(warn_below=1.5),
        dict(perplexity_drop=1.0),
        dict(on_collapse="halt"),
        dict(plot="yes"),
        dict(dead_below=0.0),
    ],
)
def test_options_are_checked(option) -> None:
    with pytest.raises(RvqlayerError, match=f"`{next(iter(option))}`"):
        CodebookMonitor(**option)


def test_plot_has_the_permissions_of_any_new_file(tmp_path: Path) -> None:
    torch.manual_seed(0)
    monitor = CodebookMonitor()
    old = os.umask(0o027)
    try:
        _fit(TinyCodec(), monitor, tmp_path, max_steps=8, val=True, logger=CSVLogger(tmp_path, name="csv"))
    finally:
        os.umask(old)
    plot = Path(monitor.last_plot)
    assert plot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert stat.S_IMODE(plot.stat().st_mode) == 0o640  # 0o666 under umask 027, not mkstemp's 0o600
    assert not list(plot.parent.glob(".*.tmp"))


def _stage(usage: float, perplexity: float) -> StageHealth:
    return StageHealth(
        stage=1,
        entries=16,
        usage=usage,
        dead=round(16 * (1 - usage)),
        reseeds=0,
        perplexity=perplexity,
        batch_perplexity=perplexity,
        energy_left=0.5,
        energy_left_db=-3.0,
        commitment=0.1,
        drift=0.0,
        entropy_bits=math.log2(perplexity),
        bits=4.0,
        steps=10,
    )


def test_collapse_decision_is_a_pure_function_of_figures_and_peak() -> None:
    options = dict(warn_below=0.25, perplexity_drop=4.0)
    assert collapse_decision(_stage(1.0, 14.0), 14.0, trained=True, settled=True, **options) == (False, "")
    low, why = collapse_decision(_stage(0.1, 14.0), 14.0, trained=True, settled=True, **options)
    assert low and why.startswith("usage 10.0% < warn_below 25.0%")
    dropped, why = collapse_decision(_stage(1.0, 3.0), 14.0, trained=True, settled=True, **options)
    assert dropped and "perplexity fell from 14.0 to 3.0" in why
    assert collapse_decision(_stage(1.0, 3.0), 14.0, trained=True, settled=False, **options) == (False, "")
    assert collapse_decision(_stage(0.0, 1.0), 14.0, trained=False, settled=False, **options) == (False, "")
    off = dict(warn_below=0.0, perplexity_drop=None)
    assert collapse_decision(_stage(0.0, 1.0), 14.0, trained=True, settled=True, **off) == (False, "")
    assert updated_peak(5.0, 7.0, settled=True) == 7.0 and updated_peak(5.0, 7.0, settled=False) == 5.0
    assert updated_peak(5.0, 3.0, settled=True) == 5.0


def test_monitor_state_is_plain_attributes() -> None:
    monitor = CodebookMonitor()
    assert (monitor.checks, monitor.last_step, monitor.plots, monitor.stop_message, monitor.records) == (
        0,
        -1,
        0,
        None,
        {},
    )
    monitor.load_state_dict(
        {
            "version": 1,
            "checks": 3,
            "last_step": 9,
            "plots": 1,
            "stop_message": None,
            "modules": {"q": {"warned": [True], "peak": [7.5], "collapses": [2], "forced_reseeds": [0]}},
        }
    )
    assert monitor.records == {"q": [StageRecord(warned=True, peak=7.5, collapses=2, forced_reseeds=0)]}
    assert monitor.checks == 3 and monitor.last_step == 9
