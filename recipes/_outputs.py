"""Output files of the recipes: the output folder, atomic writes, the rate-quality
table, the health report and the closing summary."""

from __future__ import annotations

import json
import math
import os
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from rvqlayer import MultiStageQuantizer
from rvqlayer._checks import fail
from rvqlayer.files import atomic_path


# ------------------------------------------------------------ output folder
def check_output_dir(path: Path) -> None:
    """Fail unless ``path`` is, or can become, a folder this process can write to.

    Creates nothing: the nearest existing ancestor must be a folder with write
    permission (a plain file, or a folder such as ``/proc`` that refuses new
    entries even for root, is rejected when :func:`make_output_dir` tries).
    """
    path = Path(path)
    if path.exists() and not path.is_dir():
        raise fail("--out", "a folder", f"{str(path)!r}, which is a file")
    probe = path
    while not probe.exists():
        if probe.parent == probe:
            break
        probe = probe.parent
    if not probe.is_dir():
        raise fail("--out", "a writable folder", f"{str(path)!r}: {str(probe)!r} is not a folder")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise fail("--out", "a writable folder", f"{str(path)!r}: no write permission in {str(probe)!r}")


def make_output_dir(path: Path) -> Path:
    """Create ``path`` (and missing parents) and prove it writable with a probe file.

    On failure every folder this call created is removed again, so a rejected
    output folder leaves nothing behind.
    """
    path = Path(path)
    check_output_dir(path)
    missing: list[Path] = []
    probe = path
    while not probe.exists():
        missing.append(probe)
        probe = probe.parent
    created: list[Path] = []
    try:
        for folder in reversed(missing):
            folder.mkdir()
            created.append(folder)
        fd, name = tempfile.mkstemp(prefix=".write-probe-", dir=path)
        os.close(fd)
        os.unlink(name)
    except OSError as exc:
        for folder in reversed(created):
            try:
                folder.rmdir()
            except OSError:
                pass
        raise fail("--out", "a writable folder", f"{str(path)!r} ({exc.strerror or type(exc).__name__})") from None
    return path


def write_text(target: Path, text: str) -> Path:
    with atomic_path(target) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return target


def _finite(value: Any) -> Any:
    """JSON has no NaN or Inf: map them to None, recursively."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite(v) for v in value]
    return value


def write_json(target: Path, obj: Any) -> Path:
    return write_text(target, json.dumps(_finite(obj), indent=2) + "\n")


# ------------------------------------------------------- rate-quality table
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
    measure: Any,
    measures: Sequence[Measure],
    rate_unit: str,
    rate_of_bits: Any,
) -> RateTable:
    """Evaluate ``measure(stages) -> {name: value}`` for every stage count 1..stages.

    ``rate_of_bits(bits_per_vector)`` converts bits per vector to the rate column.
    """
    rows = []
    for k in range(1, quantizer.stages + 1):
        bits = quantizer.bits_per_vector(stages=k)
        rows.append(RateRow(k, bits, float(rate_of_bits(bits)), {n: float(v) for n, v in measure(k).items()}))
    return RateTable(rate_unit, list(measures), rows)


def write_table(out: Path, table: RateTable, extra: dict[str, Any] | None = None) -> dict[str, Path]:
    """``rate_quality.txt`` and ``rate_quality.json`` in ``out``."""
    text = table.format() + "\n"
    problems = table.worse_with_more_stages()
    payload = table.as_dict() | {"worse_with_more_stages": problems} | (extra or {})
    return {
        "rate-quality table": write_text(out / "rate_quality.txt", text),
        "rate-quality data": write_json(out / "rate_quality.json", payload),
    }


# ------------------------------------------------------------------ health
def write_health(out: Path, quantizer: MultiStageQuantizer) -> dict[str, Path]:
    """The quantizer's health report as ``health.txt`` (table) and ``health.json`` (flat figures)."""
    report = quantizer.health()
    return {
        "health report": write_text(out / "health.txt", report.table() + "\n"),
        "health figures": write_json(out / "health.json", report.as_dict()),
    }


# ----------------------------------------------------------------- summary
def summary(out: Path, files: dict[str, Path]) -> str:
    """Lines naming each output file, relative to the current folder when shorter."""
    width = max(len(k) for k in files)
    lines = [f"outputs in {_show(out)}/:"]
    for what, path in files.items():
        lines.append(f"  {what:<{width}}  {_show(path)}")
    return "\n".join(lines)


def _show(path: Path) -> str:
    path = Path(path)
    try:
        rel = os.path.relpath(path)
    except ValueError:
        return str(path)
    return rel if len(rel) < len(str(path.resolve())) else str(path.resolve())
