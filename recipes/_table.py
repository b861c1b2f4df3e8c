"""The rate-quality table: one row per number of stages used at evaluation."""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from rvqlayer import MultiStageQuantizer


@dataclass(frozen=True)
class Measure:
    """A quality figure: its column name, unit and which direction is better."""

    name: str
    unit: str
    higher_is_better: bool

    @property
    def label(self) -> str:
        return f"{self.name} {self.unit}".strip()


@dataclass
class RateRow:
    """One row of the rate-quality table: ``stages`` used at evaluation."""

    stages: int
    bits_per_vector: float
    rate: float
    quality: dict[str, float] = field(default_factory=dict)


@dataclass
class RateTable:
    """Rate-quality figures, one row per stage count 1..stages.

    ``rate_unit`` names the rate column (for example ``"kbps"`` or
    ``"bits/image"``); ``measures`` the quality columns in order.
    """

    rate_unit: str
    measures: list[Measure]
    rows: list[RateRow]

    def format(self) -> str:
        """Fixed-width text: a header and one line per row.

        >>> m = [Measure("SNR", "dB", True)]
        >>> print(RateTable("kbps", m, [RateRow(1, 8.0, 1.0, {"SNR": 3.25})]).format())
        stages  bits/vector      kbps    SNR dB
             1          8.0     1.000      3.25
        """
        cols = [f"{'stages':>6}", f"{'bits/vector':>12}", f"{self.rate_unit:>9}"]
        cols += [f"{m.label:>{max(9, len(m.label))}}" for m in self.measures]
        decimals = {m.name: _decimals([r.quality[m.name] for r in self.rows]) for m in self.measures}
        lines = ["  ".join(cols)]
        for r in self.rows:
            cells = [f"{r.stages:>6}", f"{r.bits_per_vector:>12.1f}", f"{r.rate:>9.3f}"]
            cells += [f"{r.quality[m.name]:>{max(9, len(m.label))}.{decimals[m.name]}f}" for m in self.measures]
            lines.append("  ".join(cells))
        return "\n".join(lines)

    def worse_with_more_stages(self) -> list[str]:
        """Descriptions of every place where a quality figure gets worse as a stage is added."""
        problems = []
        for m in self.measures:
            for a, b in zip(self.rows, self.rows[1:]):
                va, vb = a.quality[m.name], b.quality[m.name]
                if (vb < va) if m.higher_is_better else (vb > va):
                    problems.append(f"{m.label} goes from {va:.4g} at {a.stages} stages to {vb:.4g} at {b.stages}")
        return problems

    def as_dict(self) -> dict[str, Any]:
        return {
            "rate_unit": self.rate_unit,
            "measures": [
                {"name": m.name, "unit": m.unit, "higher_is_better": m.higher_is_better} for m in self.measures
            ],
            "rows": [
                {"stages": r.stages, "bits_per_vector": r.bits_per_vector, "rate": r.rate, **r.quality}
                for r in self.rows
            ],
        }


def _decimals(values: list[float]) -> int:
    """2 decimals for a column of figures of 1 and more (dB, %), 5 for small ones (MSE)."""
    return 2 if max((abs(v) for v in values), default=0.0) >= 1.0 else 5


def rate_table(
    quantizer: MultiStageQuantizer,
    measure: Callable[[int], Mapping[str, float]],
    measures: Sequence[Measure],
    rate_unit: str,
    rate_of_bits: Callable[[float], float],
) -> RateTable:
    """Evaluate ``measure(stages) -> {name: value}`` for every stage count 1..stages.

    ``rate_of_bits(bits_per_vector)`` converts bits per vector to the rate column.
    """
    rows = []
    for k in range(1, quantizer.stages + 1):
        bits = quantizer.bits_per_vector(stages=k)
        rows.append(RateRow(k, bits, float(rate_of_bits(bits)), {n: float(v) for n, v in measure(k).items()}))
    return RateTable(rate_unit, list(measures), rows)
