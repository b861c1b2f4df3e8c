"""The rate-quality table: one row per number of stages used at evaluation."""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import torch

from rvqlayer import MultiStageQuantizer

from ._streams import StreamCost, stream_costs


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
    """One row of the rate-quality table: ``stages`` used at evaluation.

    ``stream``: what the held-out codes of those stages cost as actual
    streams (see :mod:`recipes._streams`), or None when not measured.
    """

    stages: int
    bits_per_vector: float
    rate: float
    quality: dict[str, float] = field(default_factory=dict)
    stream: StreamCost | None = None


@dataclass
class RateTable:
    """Rate-quality figures, one row per stage count 1..stages.

    ``rate_unit`` names the rate column (for example ``"kbps"`` or
    ``"bits/image"``); ``measures`` the quality columns in order.
    """

    rate_unit: str
    measures: list[Measure]
    rows: list[RateRow]

    def stream_labels(self) -> list[str]:
        """Headers of the measured stream columns (fixed, entropy-coded, entropy estimate); [] if not measured."""
        if not self.rows or any(r.stream is None for r in self.rows):
            return []
        return [f"{self.rate_unit} {what}" for what in ("fixed", "coded", "entropy")]

    def format(self) -> str:
        """Fixed-width text: a header and one line per row.

        >>> m = [Measure("SNR", "dB", True)]
        >>> print(RateTable("kbps", m, [RateRow(1, 8.0, 1.0, {"SNR": 3.25})]).format())
        stages  bits/vector      kbps    SNR dB
             1          8.0     1.000      3.25
        """
        cols = [f"{'stages':>6}", f"{'bits/vector':>12}", f"{self.rate_unit:>9}"]
        labels = self.stream_labels()
        cols += [f"{label:>{max(9, len(label))}}" for label in labels]
        cols += [f"{m.label:>{max(9, len(m.label))}}" for m in self.measures]
        decimals = {m.name: _decimals([r.quality[m.name] for r in self.rows]) for m in self.measures}
        lines = ["  ".join(cols)]
        for r in self.rows:
            cells = [f"{r.stages:>6}", f"{r.bits_per_vector:>12.1f}", f"{r.rate:>9.3f}"]
            if labels:
                values = (r.stream.fixed, r.stream.coded, r.stream.entropy)  # type: ignore[union-attr]
                cells += [f"{v:>{max(9, len(label))}.3f}" for v, label in zip(values, labels)]
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
                {
                    "stages": r.stages,
                    "bits_per_vector": r.bits_per_vector,
                    "rate": r.rate,
                    **_stream_fields(r),
                    **r.quality,
                }
                for r in self.rows
            ],
        }


def _stream_fields(row: RateRow) -> dict[str, float]:
    """The measured stream columns of ``row`` for the JSON (in the rate unit); {} if not measured."""
    if row.stream is None:
        return {}
    return {
        "rate_fixed_stream": row.stream.fixed,
        "rate_entropy_coded": row.stream.coded,
        "rate_entropy_estimate": row.stream.entropy,
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
    codes: torch.Tensor | None = None,
    frame_rate: float | None = None,
) -> RateTable:
    """Evaluate ``measure(stages) -> {name: value}`` for every stage count 1..stages.

    ``rate_of_bits(bits_per_vector)`` converts bits per vector to the rate column.
    With ``codes`` (int64 ``[..., stages]``, the codes the quality was measured
    on), each row also gets the measured stream columns
    (:func:`recipes._streams.stream_costs`; ``frame_rate`` goes in the stream
    header, None for recipes without one).
    """
    costs = stream_costs(quantizer, codes, rate_of_bits, frame_rate) if codes is not None else None
    rows = []
    for k in range(1, quantizer.stages + 1):
        bits = quantizer.bits_per_vector(stages=k)
        quality = {n: float(v) for n, v in measure(k).items()}
        rows.append(RateRow(k, bits, float(rate_of_bits(bits)), quality, costs[k - 1] if costs else None))
    return RateTable(rate_unit, list(measures), rows)
