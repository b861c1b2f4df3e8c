"""Lightning callback that watches codebook health while a model trains.

Import it explicitly (``from rvqlayer.callbacks import CodebookMonitor``);
``import rvqlayer`` alone never imports Lightning.

Every figure comes from :meth:`MultiStageQuantizer.health`, i.e. from
statistics that the layer keeps during training and that are already
all-reduced inside each step under ``torch.distributed``. Collapse decisions
(warn, reseed, stop) are additionally agreed across ranks with one
all-reduce, so every rank acts alike.
"""

from __future__ import annotations

import importlib.util
import math
import os
from dataclasses import asdict, dataclass, fields
from typing import Any, Literal

import pytorch_lightning as pl
import torch
from pytorch_lightning.utilities.rank_zero import rank_zero_info, rank_zero_warn
from typing_extensions import override

from ._checks import check_choice, check_float, check_int, fail
from ._health_figure import health_figure
from .files import atomic_path
from .health import HealthReport, StageHealth
from .quantizer import MultiStageQuantizer

OnCollapse = Literal["warn", "reseed", "stop"]

_STATE_VERSION = 1
# Per-stage figures sent to the loggers as ``codebook/<module>/stage<k>/<figure>``.
_STAGE_FIGURES = ("usage", "dead", "perplexity", "batch_perplexity", "energy_left_db", "reseeds")


class CodebookCollapseWarning(UserWarning):
    """Issued (once per stage, on rank zero) when a codebook collapses."""


@dataclass
class StageRecord:
    """What the monitor remembers about one stage between checks (saved in checkpoints).

    Attributes:
        warned: a collapse warning was given for this stage.
        peak: highest moving-average perplexity seen once the averages settled.
        collapses: checks at which the stage was found collapsed.
        forced_reseeds: reseeds the monitor requested (``on_collapse="reseed"``).
    """

    warned: bool = False
    peak: float = 0.0
    collapses: int = 0
    forced_reseeds: int = 0


_RECORD_FIELDS = tuple(f.name for f in fields(StageRecord))


def settle_steps(ema_decay: float) -> int:
    """Steps after which a moving average of decay ``g`` mostly reflects data: ``1 / (1 - g)``.

    >>> settle_steps(0.99)
    100
    """
    return max(1, math.ceil(1.0 / (1.0 - ema_decay)))


def updated_peak(peak: float, perplexity: float, settled: bool) -> float:
    """The perplexity peak after a check: only values seen once the averages settled count."""
    return max(peak, perplexity) if settled else peak


def collapse_decision(
    stage: StageHealth,
    peak: float,
    *,
    trained: bool,
    settled: bool,
    warn_below: float,
    perplexity_drop: float | None,
) -> tuple[bool, str]:
    """Whether a stage looks collapsed, and why (``""`` when it does not); pure.

    Collapsed: usage below ``warn_below`` (0 turns this off), or, once the
    moving averages have ``settled``, perplexity below ``peak /
    perplexity_drop`` (``None`` turns this off). An untrained stage's figures
    are start values and never count.
    """
    if not trained:
        return False, ""
    reasons = []
    if warn_below > 0 and stage.usage < warn_below:
        reasons.append(f"usage {stage.usage:.1%} < warn_below {warn_below:.1%}")
    if settled and perplexity_drop is not None and stage.perplexity * perplexity_drop < peak:
        reasons.append(f"perplexity fell from {peak:.1f} to {stage.perplexity:.1f} (> {perplexity_drop:g}x)")
    return bool(reasons), "; ".join(reasons)


class CodebookMonitor(pl.Callback):
    """Log, check and plot the health of every :class:`~rvqlayer.MultiStageQuantizer` in a model.

    Quantizers are found with ``named_modules()`` and named by their module
    path (``model.bottleneck``). Every ``every_n_steps`` optimizer steps the
    monitor sends ``codebook/<path>/stage<k>/<figure>`` for the figures
    usage, dead, perplexity, batch_perplexity, energy_left_db and reseeds
    (plus ``codebook/<path>/entropy_bits`` and ``codebook/<path>/energy_left_db``)
    to all of the trainer's loggers, then checks each stage for collapse:

    - usage (share of live entries) below ``warn_below``, or
    - moving-average perplexity below ``1 / perplexity_drop`` of the highest
      value seen since the stage's moving averages settled (``1 / (1 -
      ema_decay)`` steps; before that they still reflect their start values).

    A collapsed stage is warned about once (:class:`CodebookCollapseWarning`,
    rank zero). ``on_collapse="reseed"`` also reseeds its dead codes at the
    next training step (at every check while it stays collapsed);
    ``"stop"`` ends training (``trainer.should_stop``) with a message naming
    the module, the stage and its figures. At each validation epoch end
    (``plot=True``) one PNG goes to the trainer's log directory: sorted usage
    counts and energy left per stage. At the end of fit the final health goes
    out as a table through Lightning's ``rank_zero_info`` (its logger).

    State (saved in Lightning checkpoints) is plain attributes: ``checks``,
    ``last_step``, ``plots``, ``stop_message`` and ``records`` (per module
    path, one :class:`StageRecord` per stage). The decision itself is the
    pure function :func:`collapse_decision`.

    Args:
        every_n_steps: check interval in optimizer steps; ``None`` uses the
            trainer's ``log_every_n_steps``.
        warn_below: usage share (0..1) under which a stage counts as
            collapsed; 0 turns this check off.
        perplexity_drop: factor (> 1) by which the perplexity must fall from
            its peak to count as collapse; ``None`` turns this check off.
        on_collapse: ``"warn"``, ``"reseed"`` or ``"stop"``.
        plot: write the PNG at each validation epoch end.
        dead_below: dead-code threshold as a share of the uniform usage rate
            (for usage, dead and forced reseeds); ``None`` takes each
            codebook's ``reseed_below`` (0.03 when reseeding is off).
    """

    def __init__(
        self,
        *,
        every_n_steps: int | None = None,
        warn_below: float = 0.25,
        perplexity_drop: float | None = 4.0,
        on_collapse: OnCollapse = "warn",
        plot: bool = True,
        dead_below: float | None = None,
    ) -> None:
        super().__init__()
        self.every_n_steps = None if every_n_steps is None else check_int("every_n_steps", every_n_steps, 1)
        self.warn_below = check_float("warn_below", warn_below, 0.0, 1.0)
        if perplexity_drop is not None:
            check_float("perplexity_drop", perplexity_drop, 1.0, float("inf"), low_open=True, high_open=True)
        self.perplexity_drop = None if perplexity_drop is None else float(perplexity_drop)
        self.on_collapse = check_choice("on_collapse", on_collapse, ("warn", "reseed", "stop"))
        if not isinstance(plot, bool):
            raise fail("plot", "a bool", repr(plot))
        if plot and importlib.util.find_spec("matplotlib") is None:
            raise fail("plot", "False when matplotlib is not installed", "True")
        self.plot = plot
        self.dead_below = None if dead_below is None else check_float("dead_below", dead_below, 0.0, 1.0, low_open=True)
        self._quantizers: dict[str, MultiStageQuantizer] = {}
        self.checks = 0
        self.last_step = -1
        self.plots = 0
        self.stop_message: str | None = None
        self.records: dict[str, list[StageRecord]] = {}
        self.last_plot: str | None = None

    # ------------------------------------------------------------------ state
    @property
    @override
    def state_key(self) -> str:
        return self._generate_state_key(
            every_n_steps=self.every_n_steps,
            warn_below=self.warn_below,
            perplexity_drop=self.perplexity_drop,
            on_collapse=self.on_collapse,
            dead_below=self.dead_below,
        )

    @override
    def state_dict(self) -> dict[str, Any]:
        """Warnings given, perplexity peaks and counters, as plain Python values."""
        return {
            "version": _STATE_VERSION,
            "checks": self.checks,
            "last_step": self.last_step,
            "plots": self.plots,
            "stop_message": self.stop_message,
            "modules": {
                path: {key: [asdict(r)[key] for r in records] for key in _RECORD_FIELDS}
                for path, records in self.records.items()
            },
        }

    @override
    def load_state_dict(self, state_dict: dict[str, Any]) -> None:
        """Restore what :meth:`state_dict` returned; a foreign dict raises ``RvqlayerError``."""
        expected = "a CodebookMonitor state (version 1 with checks, last_step, plots, stop_message, modules)"
        try:
            ok = state_dict["version"] == _STATE_VERSION and isinstance(state_dict["modules"], dict)
            checks, last, plots = int(state_dict["checks"]), int(state_dict["last_step"]), int(state_dict["plots"])
            stop = state_dict["stop_message"]
            records = {}
            for path, m in state_dict["modules"].items():
                lists = {key: list(m[key]) for key in _RECORD_FIELDS}
                if len({len(v) for v in lists.values()}) != 1:
                    ok = False
                records[str(path)] = [
                    StageRecord(bool(w), float(p), int(c), int(f))
                    for w, p, c, f in zip(*(lists[key] for key in _RECORD_FIELDS))
                ]
        except (KeyError, TypeError, ValueError, AttributeError) as err:
            raise fail("state_dict", expected, f"{type(state_dict).__name__} ({err!r})") from None
        if not ok or not (stop is None or isinstance(stop, str)):
            raise fail("state_dict", expected, f"keys {sorted(state_dict)}")
        self.checks, self.last_step, self.plots, self.stop_message, self.records = checks, last, plots, stop, records

    def _records(self, path: str, stages: int) -> list[StageRecord]:
        """The per-stage records of ``path``, created (or resized) for ``stages`` stages."""
        records = self.records.setdefault(path, [])
        del records[stages:]
        records.extend(StageRecord() for _ in range(stages - len(records)))
        return records

    # ------------------------------------------------------------------ hooks
    @override
    def setup(self, trainer: pl.Trainer, pl_module: pl.LightningModule, stage: str) -> None:
        self._quantizers = {
            path or "model": module
            for path, module in pl_module.named_modules()
            if isinstance(module, MultiStageQuantizer)
        }
        if not self._quantizers:
            rank_zero_warn("CodebookMonitor found no MultiStageQuantizer in the model; it will do nothing")

    @override
    def on_train_batch_end(
        self, trainer: pl.Trainer, pl_module: pl.LightningModule, outputs: Any, batch: Any, batch_idx: int
    ) -> None:
        step = int(trainer.global_step)
        every = self.every_n_steps or max(1, int(trainer.log_every_n_steps))
        if not self._quantizers or step == self.last_step or step % every:
            return
        self.last_step = step
        self.checks += 1
        reports = {path: q.health(self.dead_below) for path, q in self._quantizers.items()}
        if trainer.is_global_zero:
            metrics = self._metrics(reports)
            for logger in trainer.loggers:
                logger.log_metrics(metrics, step=step)
        self._check(trainer, reports, step)

    @override
    def on_validation_epoch_end(self, trainer: pl.Trainer, pl_module: pl.LightningModule) -> None:
        if not self.plot or not self._quantizers or trainer.sanity_checking:
            return
        directory = trainer.log_dir or trainer.default_root_dir  # collective: call on every rank
        if not trainer.is_global_zero:
            return
        name = f"codebook_health_epoch{trainer.current_epoch:03d}_step{trainer.global_step:07d}.png"
        path = os.path.join(directory, name)
        figure = health_figure(self._quantizers, trainer.global_step, self.dead_below)
        with atomic_path(path) as tmp:
            figure.savefig(tmp, format="png", dpi=80)
        self.last_plot = path
        self.plots += 1

    @override
    def on_fit_end(self, trainer: pl.Trainer, pl_module: pl.LightningModule) -> None:
        for path, q in self._quantizers.items():
            table = q.health(self.dead_below).table()
            rank_zero_info(f"codebook health of `{path}` after {trainer.global_step} steps:\n{table}")
        if self.stop_message:
            rank_zero_info(self.stop_message)

    # --------------------------------------------------------------- helpers
    @staticmethod
    def _metrics(reports: dict[str, HealthReport]) -> dict[str, float]:
        out: dict[str, float] = {}
        for path, report in reports.items():
            for s in report.stages:
                for figure in _STAGE_FIGURES:
                    out[f"codebook/{path}/stage{s.stage}/{figure}"] = float(getattr(s, figure))
            out[f"codebook/{path}/entropy_bits"] = report.entropy_bits
            out[f"codebook/{path}/energy_left_db"] = report.energy_left_db
        return out

    def _decide(self, path: str, report: HealthReport, index: int) -> tuple[bool, str]:
        """Update stage ``index``'s perplexity peak, then decide whether it collapsed."""
        codebook = self._quantizers[path].codebooks[index]
        record = self._records(path, len(report.stages))[index]
        stage = report.stages[index]
        trained = int(codebook.step) > 0  # before its first update the statistics are start values
        settled = trained and int(codebook.step) >= settle_steps(codebook.ema_decay)
        record.peak = updated_peak(record.peak, stage.perplexity, settled)
        return collapse_decision(
            stage,
            record.peak,
            trained=trained,
            settled=settled,
            warn_below=self.warn_below,
            perplexity_drop=self.perplexity_drop,
        )

    def _check(self, trainer: pl.Trainer, reports: dict[str, HealthReport], step: int) -> None:
        cases = [(path, i) for path, report in reports.items() for i in range(len(report.stages))]
        decisions = [self._decide(path, reports[path], i) for path, i in cases]
        flags = torch.tensor([float(d) for d, _ in decisions], device=trainer.strategy.root_device)
        agreed = trainer.strategy.reduce(flags, reduce_op="sum")  # one collective: every rank decides alike
        stops = []
        for (path, i), (_, reason), flag in zip(cases, decisions, agreed.tolist(), strict=True):
            if flag <= 0:
                continue
            s, record = reports[path].stages[i], self.records[path][i]
            record.collapses += 1
            text = (
                f"codebook collapse in `{path}` stage {s.stage} at step {step}: "
                f"{reason or 'reported by another rank'}; usage {s.usage:.1%} of {s.entries} entries, "
                f"{s.dead} dead, perplexity {s.perplexity:.1f} (batch {s.batch_perplexity:.1f}), "
                f"energy left {s.energy_left_db:.2f} dB, {s.reseeds} reseeds"
            )
            if not record.warned:
                record.warned = True
                rank_zero_warn(text, category=CodebookCollapseWarning)
            if self.on_collapse == "reseed":
                codebook = self._quantizers[path].codebooks[i]
                codebook.request_reseed(self.dead_below or codebook.reseed_below or 0.03)
                record.forced_reseeds += 1
            elif self.on_collapse == "stop":
                stops.append(text)
        if stops:
            trainer.should_stop = True
            self.stop_message = "CodebookMonitor stopped training: " + " | ".join(stops)
            rank_zero_warn(self.stop_message, category=CodebookCollapseWarning)
