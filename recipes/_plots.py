"""PNG figures of the recipes (matplotlib, no display needed)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from rvqlayer.files import atomic_path

from ._table import RateTable


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")  # files only; never opens a window
    import matplotlib.pyplot as plt

    return plt


def rate_quality_png(path: Path, table: RateTable, title: str) -> Path:
    """One panel per quality measure against the rate, each point labelled with its stage count."""
    plt = _pyplot()
    rates = [r.rate for r in table.rows]
    fig, axes = plt.subplots(1, len(table.measures), figsize=(4.2 * len(table.measures), 3.6), squeeze=False)
    for ax, m in zip(axes[0], table.measures):
        values = [r.quality[m.name] for r in table.rows]
        ax.plot(rates, values, marker="o")
        for r, v in zip(table.rows, values):
            ax.annotate(str(r.stages), (r.rate, v), textcoords="offset points", xytext=(4, 4), fontsize=8)
        ax.set_xlabel(table.rate_unit)
        ax.set_ylabel(f"{m.label} ({'higher' if m.higher_is_better else 'lower'} is better)")
        ax.grid(alpha=0.3)
    fig.suptitle(f"{title} (labels: stages used)")
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format="png", dpi=110)
    plt.close(fig)
    return path


def image_grid_png(path: Path, rows: list[tuple[str, np.ndarray]], shape: tuple[int, int], title: str) -> Path:
    """A grid: one row per ``(label, images [n, h * w])`` entry, one column per image (each ``shape``)."""
    plt = _pyplot()
    n = rows[0][1].shape[0]
    fig, axes = plt.subplots(len(rows), n, figsize=(0.9 * n + 1.2, 1.0 * len(rows) + 0.4), squeeze=False)
    for row, (label, images) in enumerate(rows):
        for col in range(n):
            ax = axes[row][col]
            ax.imshow(images[col].reshape(shape), cmap="gray_r", vmin=0.0, vmax=1.0, interpolation="nearest")
            ax.set_xticks([])
            ax.set_yticks([])
            if col == 0:
                ax.set_ylabel(label, rotation=0, ha="right", va="center", fontsize=8)
    fig.suptitle(title, fontsize=9)
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format="png", dpi=100)
    plt.close(fig)
    return path
