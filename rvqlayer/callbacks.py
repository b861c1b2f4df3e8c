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
import warnings
from typing import Any, Literal

import pytorch_lightning as pl
import torch

from ._checks import check_choice, check_float, check_int, fail
from .files import atomic_path
from .health import HealthReport
from .quantizer import MultiStageQuantizer

OnCollapse = Literal["warn", "reseed", "stop"]

_STATE_VERSION = 1
# Per-stage figures sent to the loggers as ``codebook/<module>/stage<k>/<figure>``.
_STAGE_FIGURES = ("usage", "dead", "perplexity", "batch_perplexity", "energy_left_db", "reseeds")


class CodebookCollapseWarning(UserWarning):
    """Issued (once per stage, on rank zero) when a codebook collapses."""


def _settle_steps(ema_decay: float) -> int:
    """Steps after which a moving average of decay ``g`` mostly reflects data: ``1 / (1 - g)``."""
    return max(1, math.ceil(1.0 / (1.0 - ema_decay)))


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
    counts and energy left per stage. At the end of fit the final health is
    printed as a table.

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
        self._state: dict[str, Any] = {
            "version": _STATE_VERSION,
            "checks": 0,
            "last_step": -1,
            "plots": 0,
            "stop_message": None,
            "modules": {},
        }
        self.last_plot: str | None = None

    # ------------------------------------------------------------------ state
    @property
    def state_key(self) -> str:
        return self._generate_state_key(
            every_n_steps=self.every_n_steps,
            warn_below=self.warn_below,
            perplexity_drop=self.perplexity_drop,
            on_collapse=self.on_collapse,
            dead_below=self.dead_below,
        )

    def state_dict(self) -> dict[str, Any]:
        """Warnings given, perplexity peaks and counters, as plain Python values."""
        s = self._state
        return {
            "version": s["version"],
            "checks": s["checks"],
            "last_step": s["last_step"],
            "plots": s["plots"],
            "stop_message": s["stop_message"],
            "modules": {path: {key: list(values) for key, values in m.items()} for path, m in s["modules"].items()},
        }

    def load_state_dict(self, state_dict: dict[str, Any]) -> None:
        """Restore what :meth:`state_dict` returned; a foreign dict raises ``RvqlayerError``."""
        expected = "a CodebookMonitor state (version 1 with checks, last_step, plots, stop_message, modules)"
        try:
            ok = state_dict["version"] == _STATE_VERSION and isinstance(state_dict["modules"], dict)
            checks, last, plots = int(state_dict["checks"]), int(state_dict["last_step"]), int(state_dict["plots"])
            stop = state_dict["stop_message"]
            modules = {}
            for path, m in state_dict["modules"].items():
                lists = {key: list(m[key]) for key in ("warned", "peak", "collapses", "forced_reseeds")}
                if len({len(v) for v in lists.values()}) != 1:
                    ok = False
                modules[str(path)] = {
                    "warned": [bool(v) for v in lists["warned"]],
                    "peak": [float(v) for v in lists["peak"]],
                    "collapses": [int(v) for v in lists["collapses"]],
                    "forced_reseeds": [int(v) for v in lists["forced_reseeds"]],
                }
        except (KeyError, TypeError, ValueError, AttributeError) as err:
            raise fail("state_dict", expected, f"{type(state_dict).__name__} ({err!r})") from None
        if not ok or not (stop is None or isinstance(stop, str)):
            raise fail("state_dict", expected, f"keys {sorted(state_dict)}")
        self._state = {
            "version": _STATE_VERSION,
            "checks": checks,
            "last_step": last,
            "plots": plots,
            "stop_message": stop,
            "modules": modules,
        }

    def _module_state(self, path: str, stages: int) -> dict[str, list]:
        """Per-stage state lists of ``path``, created (or resized) for ``stages`` stages."""
        m = self._state["modules"].setdefault(path, {"warned": [], "peak": [], "collapses": [], "forced_reseeds": []})
        fill = {"warned": False, "peak": 0.0, "collapses": 0, "forced_reseeds": 0}
        for key, values in m.items():
            del values[stages:]
            values.extend([fill[key]] * (stages - len(values)))
        return m

    @property
    def stop_message(self) -> str | None:
        """Why the monitor stopped training (``None`` while it has not)."""
        return self._state["stop_message"]

    # ------------------------------------------------------------------ hooks
    def setup(self, trainer: pl.Trainer, pl_module: pl.LightningModule, stage: str) -> None:
        self._quantizers = {
            path or "model": module
            for path, module in pl_module.named_modules()
            if isinstance(module, MultiStageQuantizer)
        }
        if not self._quantizers and trainer.is_global_zero:
            warnings.warn(
                "CodebookMonitor found no MultiStageQuantizer in the model; it will do nothing",
                UserWarning,
                stacklevel=2,
            )

    def on_train_batch_end(
        self, trainer: pl.Trainer, pl_module: pl.LightningModule, outputs: Any, batch: Any, batch_idx: int
    ) -> None:
        step = int(trainer.global_step)
        every = self.every_n_steps or max(1, int(trainer.log_every_n_steps))
        if not self._quantizers or step == self._state["last_step"] or step % every:
            return
        self._state["last_step"] = step
        self._state["checks"] += 1
        reports = {path: q.health(self.dead_below) for path, q in self._quantizers.items()}
        if trainer.is_global_zero:
            metrics = self._metrics(reports)
            for logger in trainer.loggers:
                logger.log_metrics(metrics, step=step)
        self._check(trainer, reports, step)

    def on_validation_epoch_end(self, trainer: pl.Trainer, pl_module: pl.LightningModule) -> None:
        if not self.plot or not self._quantizers or trainer.sanity_checking:
            return
        directory = trainer.log_dir or trainer.default_root_dir  # collective: call on every rank
        if not trainer.is_global_zero:
            return
        name = f"codebook_health_epoch{trainer.current_epoch:03d}_step{trainer.global_step:07d}.png"
        self.last_plot = self._write_plot(os.path.join(directory, name), trainer.global_step)
        self._state["plots"] += 1

    def on_fit_end(self, trainer: pl.Trainer, pl_module: pl.LightningModule) -> None:
        if not trainer.is_global_zero:
            return
        for path, q in self._quantizers.items():
            print(
                f"codebook health of `{path}` after {trainer.global_step} steps:\n{q.health(self.dead_below).table()}"
            )
        if self.stop_message:
            print(self.stop_message)

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

    def _collapse_reason(self, path: str, report: HealthReport, index: int, codebook: Any) -> str | None:
        """Why stage ``index`` (0-based) looks collapsed, or ``None``; updates its perplexity peak."""
        s = report.stages[index]
        m = self._module_state(path, len(report.stages))
        if int(codebook.step) == 0:
            return None  # not trained yet: its statistics are still start values
        reasons = []
        if self.warn_below > 0 and s.usage < self.warn_below:
            reasons.append(f"usage {s.usage:.1%} < warn_below {self.warn_below:.1%}")
        if int(codebook.step) >= _settle_steps(codebook.ema_decay):
            peak = m["peak"][index] = max(m["peak"][index], s.perplexity)
            if self.perplexity_drop is not None and s.perplexity * self.perplexity_drop < peak:
                reasons.append(f"perplexity fell from {peak:.1f} to {s.perplexity:.1f} (> {self.perplexity_drop:g}x)")
        return "; ".join(reasons) or None

    def _check(self, trainer: pl.Trainer, reports: dict[str, HealthReport], step: int) -> None:
        cases = [(path, i) for path, report in reports.items() for i in range(len(report.stages))]
        reasons = [self._collapse_reason(p, reports[p], i, self._quantizers[p].codebooks[i]) for p, i in cases]
        flags = torch.tensor([float(r is not None) for r in reasons], device=trainer.strategy.root_device)
        agreed = trainer.strategy.reduce(flags, reduce_op="sum")  # one collective: every rank decides alike
        stops = []
        for (path, i), reason, flag in zip(cases, reasons, agreed.tolist(), strict=True):
            if flag <= 0:
                continue
            s, m = reports[path].stages[i], self._state["modules"][path]
            m["collapses"][i] += 1
            text = (
                f"codebook collapse in `{path}` stage {s.stage} at step {step}: "
                f"{reason or 'reported by another rank'}; usage {s.usage:.1%} of {s.entries} entries, "
                f"{s.dead} dead, perplexity {s.perplexity:.1f} (batch {s.batch_perplexity:.1f}), "
                f"energy left {s.energy_left_db:.2f} dB, {s.reseeds} reseeds"
            )
            if not m["warned"][i]:
                m["warned"][i] = True
                if trainer.is_global_zero:
                    warnings.warn(text, CodebookCollapseWarning, stacklevel=2)
            if self.on_collapse == "reseed":
                codebook = self._quantizers[path].codebooks[i]
                codebook.request_reseed(self.dead_below or codebook.reseed_below or 0.03)
                m["forced_reseeds"][i] += 1
            elif self.on_collapse == "stop":
                stops.append(text)
        if stops:
            trainer.should_stop = True
            self._state["stop_message"] = "CodebookMonitor stopped training: " + " | ".join(stops)
            if trainer.is_global_zero:
                warnings.warn(self._state["stop_message"], CodebookCollapseWarning, stacklevel=2)

    def _write_plot(self, path: str, step: int) -> str:
        """One PNG: per quantizer, sorted usage counts per stage and energy left per stage."""
        from matplotlib.figure import Figure  # Agg canvas; no pyplot, no global backend change

        rows = len(self._quantizers)
        fig = Figure(figsize=(10, 3.2 * rows))
        fig.subplots_adjust(left=0.08, right=0.98, bottom=0.16, top=0.9, wspace=0.25, hspace=0.45)
        axes = fig.subplots(rows, 2, squeeze=False)
        for (name, q), (ax_use, ax_left) in zip(self._quantizers.items(), axes, strict=True):
            report = q.health(self.dead_below)
            for s, codebook in zip(report.stages, q.codebooks, strict=True):
                counts = codebook.ema_count.detach().float().cpu().sort(descending=True).values
                ax_use.step(
                    range(1, len(counts) + 1),
                    counts.clamp_min(1e-12).numpy(),
                    where="mid",
                    label=f"stage {s.stage} ({s.usage:.0%} used)",
                )
            ax_use.set_yscale("log")
            ax_use.set_xlabel("entry (sorted by use)")
            ax_use.set_ylabel("moving-average count")
            ax_use.set_title(f"{name}: code usage, step {step}")
            ax_use.legend(fontsize="small")
            left = [s.energy_left_db if math.isfinite(s.energy_left_db) else float("nan") for s in report.stages]
            ax_left.bar([s.stage for s in report.stages], left)
            ax_left.set_xlabel("stage")
            ax_left.set_ylabel("energy left (dB)")
            ax_left.set_title(f"{name}: energy left after each stage")
        with atomic_path(path) as tmp:
            fig.savefig(tmp, format="png", dpi=80)
        return path
