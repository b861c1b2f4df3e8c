"""Smoke test of benchmarks/speed.py at a tiny size: files produced and well formed (no timing assertion)."""

import importlib.util
import json
import math
from pathlib import Path

import matplotlib.pyplot as plt

SCRIPT = Path(__file__).resolve().parents[1] / "benchmarks" / "speed.py"
METHODS = ("limit", "naive_encode", "encode", "naive_train", "train")


def _script():
    spec = importlib.util.spec_from_file_location("speed_benchmark", SCRIPT)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_quick_run_writes_table_json_and_png(tmp_path, capsys):
    speed = _script()  # memory is still measured in fresh child processes
    assert speed.main(["--quick", "--threads", "1", "--repeats", "2", "--warmup", "0", "--out", str(tmp_path)]) == 0
    result = json.loads((tmp_path / "speed.json").read_text())
    rows = result["rows"]
    assert result["meta"]["repeats"] == 2 and result["meta"]["threads"] == 1
    assert rows[0]["sweep"] == "headline"
    assert {r["sweep"] for r in rows} == {"headline", "entries", "stages", "batch", "dim"}
    for r in rows:
        assert set(r["median_s"]) == set(METHODS)
        for m in METHODS:
            assert len(r["times_s"][m]) == 2
            assert all(math.isfinite(t) and t > 0 for t in r["times_s"][m])
        assert math.isclose(r["encode_over_limit"], r["median_s"]["encode"] / r["median_s"]["limit"])
        assert math.isclose(r["naive_over_train"], r["median_s"]["naive_train"] / r["median_s"]["train"])
        assert math.isclose(r["vectors_per_s"]["encode"], r["batch"] / r["median_s"]["encode"])
    head = rows[0]["memory_mib"]
    modes = ("encode", "train", "identity_step")
    assert all(isinstance(head[m], float) and math.isfinite(head[m]) and head[m] >= 0 for m in modes)
    assert all(r["memory_mib"] == dict.fromkeys(modes) for r in rows[1:])  # quick: headline only

    table = (tmp_path / "speed.md").read_text().splitlines()
    body = [line for line in table if line.startswith("| ") and "sweep" not in line]
    assert len(body) == len(rows)
    assert all(
        line.count("|") == table[table.index(next(t for t in table if "sweep" in t))].count("|") for line in body
    )

    png = tmp_path / "speed.png"
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert plt.imread(png).ndim == 3

    capsys.readouterr()
    speed.main(["--compare", str(tmp_path / "speed.json"), str(tmp_path / "speed.json")])
    compared = capsys.readouterr().out
    assert sum("->" in line for line in compared.splitlines()) == len(rows)
