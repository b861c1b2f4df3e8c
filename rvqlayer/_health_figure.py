"""The codebook health figure: sorted usage counts and energy left per stage (matplotlib, no display).

Drawing only; the caller decides where the figure goes (the monitor saves it
through :func:`rvqlayer.files.atomic_path`).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import TYPE_CHECKING

from .health import health_report

if TYPE_CHECKING:
    from matplotlib.figure import Figure

    from .quantizer import MultiStageQuantizer


def health_figure(quantizers: Mapping[str, MultiStageQuantizer], step: int, dead_below: float | None = None) -> Figure:
    """One row per quantizer (named by the mapping's keys): sorted moving-average usage counts
    of each stage on a log scale, and energy left after each stage (dB).

    Uses ``matplotlib.figure.Figure`` directly (Agg canvas): no pyplot, no
    global backend change, nothing opened on screen. Changes no state.
    """
    from matplotlib.figure import Figure

    rows = len(quantizers)
    fig = Figure(figsize=(10, 3.2 * rows))
    fig.subplots_adjust(left=0.08, right=0.98, bottom=0.16, top=0.9, wspace=0.25, hspace=0.45)
    axes = fig.subplots(rows, 2, squeeze=False)
    for (name, q), (ax_use, ax_left) in zip(quantizers.items(), axes, strict=True):
        stats = q.stage_statistics()
        report = health_report(stats, dead_below)
        for s, figures in zip(report.stages, stats, strict=True):
            counts = figures.usage_counts.sort(descending=True).values  # what usage and perplexity read
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
    return fig
