"""Output files of a run: text and JSON written atomically, the table and health files, the closing summary."""

from __future__ import annotations

import json
import math
import os
from pathlib import Path
from typing import Any

from rvqlayer import MultiStageQuantizer
from rvqlayer.files import atomic_write

from ._table import RateTable


def write_text(target: Path, text: str) -> Path:
    """``text`` (UTF-8) to ``target`` through the project's atomic writer; returns ``target``."""
    with atomic_write(target, "w") as f:
        f.write(text)
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
    """``obj`` as indented JSON (NaN and Inf as null) to ``target``."""
    return write_text(target, json.dumps(_finite(obj), indent=2) + "\n")


def write_table(out: Path, table: RateTable, extra: dict[str, Any] | None = None) -> dict[str, Path]:
    """``rate_quality.txt`` and ``rate_quality.json`` in ``out``."""
    text = table.format() + "\n"
    problems = table.worse_with_more_stages()
    payload = table.as_dict() | {"worse_with_more_stages": problems} | (extra or {})
    return {
        "rate-quality table": write_text(out / "rate_quality.txt", text),
        "rate-quality data": write_json(out / "rate_quality.json", payload),
    }


def write_health(out: Path, quantizer: MultiStageQuantizer) -> dict[str, Path]:
    """The quantizer's health report as ``health.txt`` (table) and ``health.json`` (flat figures)."""
    report = quantizer.health()
    return {
        "health report": write_text(out / "health.txt", report.table() + "\n"),
        "health figures": write_json(out / "health.json", report.as_dict()),
    }


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
