"""The ``speech`` recipe: its figures against the packages' documented behaviour, the
synthetic data, the scalar reference, ``--quick`` end to end, ``--data`` and bad input."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import torch

pytest.importorskip("pytorch_lightning")
soundfile = pytest.importorskip("soundfile")

from _recipe_cli import run_cli  # noqa: E402

from recipes import _speech_metrics as metrics  # noqa: E402
from recipes import _speech_synth as synth  # noqa: E402
from recipes._speech_scalar import fit_scalar_quantizer  # noqa: E402

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


_run = run_cli


def _snapshot(root: Path) -> dict[str, tuple[int, int]]:
    return {str(p.relative_to(root)): (p.stat().st_size, p.stat().st_mtime_ns) for p in root.rglob("*")}


@pytest.fixture(scope="module")
def held_out_clip() -> np.ndarray:
    return synth.synthesise(synth.draw_utterances(0, True, 1))[0]


# ------------------------------------------------------------------ figures
def test_identical_signals_get_the_documented_maxima(held_out_clip):
    x = held_out_clip
    if metrics.PESQ_MISSING:
        pytest.fail(metrics.PESQ_MISSING)  # the recipe runs without it; this machine must have it
    # ITU-T P.862.2 (2005/2007): MOS-LQO = 0.999 + 4 / (1 + exp(-1.3669 x + 3.8224)); the raw
    # P.862 maximum x = 4.5 maps to 4.644, so identical signals score about 4.64.
    assert metrics.pesq_wideband(x, x) == pytest.approx(0.999 + 4 / (1 + math.exp(-1.3669 * 4.5 + 3.8224)), abs=0.01)
    # Taal, Hendriks, Heusdens, Jensen, IEEE TASLP 19(7), 2011: STOI is a mean correlation, 1 for identical signals.
    assert metrics.stoi(x, x) == pytest.approx(1.0, abs=1e-9)
    assert metrics.mel_l1(x, x) == 0.0
    assert metrics.si_sdr_db(x, x) > 100.0


def test_a_degraded_copy_scores_lower(held_out_clip):
    x = held_out_clip
    rng = np.random.default_rng(0)
    noisy = x + 10 ** (-10 / 20) * np.sqrt(np.mean(x.astype(np.float64) ** 2)) * rng.standard_normal(
        len(x)
    )  # 10 dB SNR
    assert metrics.pesq_wideband(x, noisy) < metrics.pesq_wideband(x, x)
    assert metrics.stoi(x, noisy) < metrics.stoi(x, x)
    # White noise at 10 dB SNR is orthogonal to the speech in expectation: SI-SDR close to 10 dB (Le Roux et al. 2019).
    assert metrics.si_sdr_db(x, noisy) == pytest.approx(10.0, abs=0.3)
    assert metrics.mel_l1(x, noisy) > 0.1


def test_missing_pesq_leaves_the_other_figures(monkeypatch, held_out_clip):
    monkeypatch.setattr(metrics, "_pesq", None)
    figures = metrics.speech_figures([held_out_clip], [0.9 * held_out_clip])
    assert math.isnan(figures["PESQ"])
    assert all(math.isfinite(figures[n]) for n in metrics.NAMES if n != "PESQ")


# ------------------------------------------------------------------ speech data
def test_synthesis_is_repeatable_and_held_out_differs():
    utterances = synth.draw_utterances(3, False, 3)
    a, b = synth.synthesise(utterances), synth.synthesise(utterances)
    assert all(np.array_equal(x, y) for x, y in zip(a, b))
    assert all(x.dtype == np.float32 and 1.0 < len(x) / synth.RATE < 10.0 for x in a)
    train = synth.draw_utterances(0, False, 500)
    held = synth.draw_utterances(0, True, 50)
    assert not {u.sentence for u in train} & {u.sentence for u in held}
    assert not {u.voice.split("+")[1] for u in train} & {u.voice.split("+")[1] for u in held}
    assert len(synth.sentences()) >= 250


# ------------------------------------------------------------------ scalar reference
def test_uniform_quantizer_of_a_gaussian_meets_the_published_values():
    from scipy.stats import norm

    n = 100_000
    x = norm.ppf((np.arange(1, n + 1) - 0.5) / n)[:, None]  # quantile sample of N(0, 1)
    mse = {b: float(np.mean((fit_scalar_quantizer(x, b)(x) - x) ** 2)) for b in (1, 2, 3, 4)}
    # Max, "Quantizing for minimum distortion", IRE Trans. IT-6, 1960. Optimum (Lloyd-Max) MSE of a unit
    # Gaussian: 2 levels 0.3634 (+-0.7979, which a uniform quantizer can place too), 4 levels 0.1175,
    # 8 levels 0.03454; no uniform quantizer beats them. The same paper's optimum *uniform* quantizers
    # give 0.1188, 0.03744 and 0.01154 for 4, 8 and 16 levels (from memory).
    assert mse[1] == pytest.approx(0.3634, rel=1e-3)
    assert mse[2] > 0.1175 and mse[3] > 0.03454
    assert [mse[2], mse[3], mse[4]] == pytest.approx([0.1188, 0.03744, 0.01154], rel=3e-3)


def test_table_without_pesq_shows_a_dash_and_says_why():
    from recipes._table import RateRow
    from recipes.speech import ReferenceRow, SpeechTable

    q = {"PESQ": float("nan"), "STOI": 0.9, "SI-SDR": 5.0, "LSD": 3.0, "mel L1": 0.5}
    table = SpeechTable([RateRow(1, 8.0, 0.4, q)], [ReferenceRow("no quantizer", None, None, q)], "why")
    text = table.format()
    assert text.splitlines()[1].split()[3] == "-"  # PESQ (no stream columns without streams)
    assert text.splitlines()[-1] == "note: why"
    assert json.loads(json.dumps(table.as_dict()))["references"][0]["label"] == "no quantizer"


# ------------------------------------------------------------------ end to end
@pytest.fixture(scope="module")
def quick_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("speech") / "run"
    rc, stdout, err = _run(["speech", "--quick", "--out", str(out)])
    return out, rc, stdout, err


def test_quick_run_writes_the_table_with_reference_rows(quick_run):
    out, rc, stdout, err = quick_run
    assert rc == 0, err
    data = json.loads((out / "rate_quality.json").read_text())
    rows = data["rows"]
    assert [r["stages"] for r in rows] == list(range(1, 9))
    # 50 frames/s, 256 entries (8 bits) per stage: 0.4 kbps a stage.
    assert [r["rate"] for r in rows] == pytest.approx([0.4 * k for k in range(1, 9)])
    for row in rows:  # measured on streams of the held-out codes (rvqlayer.stream)
        for key in ("rate_fixed_stream", "rate_entropy_coded", "rate_entropy_estimate"):
            assert math.isfinite(row[key]) and row[key] > 0, (key, row)
    # The stream file: every held-out frame (3 clips of at most 3 s, each padded to whole 20 ms frames) with
    # all 8 stages, read back with the quantizer's own usage tables from the checkpoint.
    from recipes import speech
    from rvqlayer import stream

    state = torch.load(out / "checkpoints" / "last.ckpt", weights_only=True)
    module = speech.SpeechModule(state["recipe"])
    module.load_state_dict(state["state_dict"])
    blob = (out / "codes.rvqs").read_bytes()
    codes = stream.read_stream(blob, tables=stream.UsageTables.from_quantizer(module.codec.quantizer))
    assert codes.shape[1] == 8 and 3 <= codes.shape[0] <= 3 * 150
    assert codes.min() >= 0 and codes.max() < 256
    assert rows[-1]["rate_entropy_coded"] == pytest.approx(8 * len(blob) / (codes.shape[0] / 50) / 1000)
    assert "kbps coded" in (out / "rate_quality.txt").read_text().splitlines()[0]
    refs = {r["label"]: r for r in data["references"]}
    assert set(refs) == {"no quantizer", "scalar"}
    assert refs["scalar"]["bits_per_vector"] == rows[-1]["bits_per_vector"] == 64
    assert sum(data["scalar_bits_per_dimension"]) == 64
    for row in rows + list(refs.values()):
        for name in ("PESQ", "STOI", "SI-SDR", "LSD", "mel L1"):
            assert math.isfinite(row[name]), (row, name)
        assert 1.0 <= row["PESQ"] <= 4.65 and 0.0 <= row["STOI"] <= 1.0
    text = (out / "rate_quality.txt").read_text()
    assert "no quantizer" in text and "scalar" in text and "PESQ" in text
    assert "no quantizer" in stdout


def test_quick_run_files_are_valid(quick_run):
    out, rc, _, err = quick_run
    assert rc == 0, err
    png = out / "quality_vs_bitrate.png"
    assert png.read_bytes()[:8] == PNG_SIGNATURE
    peaks = []
    for name in ("original", "decoded_1_stages", "decoded_4_stages", "decoded_8_stages"):
        audio, rate = soundfile.read(str(out / "audio" / f"{name}.wav"), dtype="int16")
        assert rate == 16_000 and audio.ndim == 1 and len(audio) > 16_000
        peaks.append(int(np.abs(audio).max()))
    # One common gain: the loudest file peaks at -1 dBFS, none above.
    assert 20 * math.log10(max(peaks) / 32767) == pytest.approx(-1.0, abs=0.01)
    assert "stage" in (out / "health.txt").read_text()
    assert json.loads((out / "health.json").read_text())
    ckpt = torch.load(out / "checkpoints" / "last.ckpt", weights_only=True)
    assert ckpt["global_step"] == 60 and ckpt["recipe"]["recipe"] == "speech"


def _write_folder(folder: Path) -> Path:
    """Four short clips of a gliding harmonic tone: several rates, one stereo, one FLAC."""
    folder.mkdir()
    for i, (rate, channels, suffix) in enumerate(
        [(8_000, 1, "wav"), (22_050, 2, "wav"), (44_100, 1, "flac"), (16_000, 1, "wav")]
    ):
        t = np.arange(int(1.6 * rate)) / rate
        f0 = 110 * (1 + i / 4) * (1 + 0.3 * t)
        x = sum(np.sin(2 * np.pi * h * np.cumsum(f0) / rate) / h for h in range(1, 6))
        x = 0.3 * x * (0.6 + 0.4 * np.sin(2 * np.pi * 3 * t))
        data = np.stack([x, 0.5 * x], axis=1) if channels == 2 else x
        soundfile.write(str(folder / f"clip{i}.{suffix}"), data, rate)
    (folder / "notes.txt").write_text("not audio; skipped\n")
    return folder


def test_user_folder_of_mixed_rates_and_channels(tmp_path):
    data = _write_folder(tmp_path / "audio")
    out = tmp_path / "run"
    argv = ["speech", "--data", str(data), "--quick", "--steps", "8", "--stages", "2", "--entries", "16"]
    rc, stdout, err = _run(argv + ["--out", str(out)])
    assert rc == 0, err
    result = json.loads((out / "rate_quality.json").read_text())
    assert [r["stages"] for r in result["rows"]] == [1, 2]
    assert "4 files" in result["data"] and result["held_out_clips"] == 1
    assert {r["label"] for r in result["references"]} == {"no quantizer", "scalar"}
    assert (out / "audio" / "decoded_2_stages.wav").is_file()


def _bad_folders(tmp: Path) -> dict[str, Path]:
    good = np.sin(np.arange(16_000) / 5.0) * 0.3
    folders = {}
    for case in ("empty", "only text", "unreadable", "too short", "non-finite", "a file"):
        folders[case] = tmp / case.replace(" ", "_")
    folders["empty"].mkdir()
    folders["only text"].mkdir()
    (folders["only text"] / "readme.txt").write_text("no audio here\n")
    folders["unreadable"].mkdir()
    soundfile.write(str(folders["unreadable"] / "a.wav"), good, 16_000)
    (folders["unreadable"] / "b.wav").write_bytes(b"RIFF not really a wave file")
    folders["too short"].mkdir()
    soundfile.write(str(folders["too short"] / "a.wav"), good, 16_000)
    soundfile.write(str(folders["too short"] / "b.wav"), good[:4000], 16_000)  # 0.25 s < one 0.8 s excerpt
    folders["non-finite"].mkdir()
    bad = good.copy()
    bad[100] = np.nan
    soundfile.write(str(folders["non-finite"] / "a.wav"), bad, 16_000, subtype="FLOAT")
    folders["a file"].write_text("a file, not a folder\n")
    return folders


@pytest.mark.parametrize("case", ["empty", "only text", "unreadable", "too short", "non-finite", "a file", "missing"])
def test_bad_folder_exits_2_with_one_line_and_writes_nothing(tmp_path, monkeypatch, case):
    folders = _bad_folders(tmp_path)
    folder = folders.get(case, tmp_path / "absent")
    monkeypatch.chdir(tmp_path)
    before = _snapshot(tmp_path)
    rc, stdout, stderr = _run(["speech", "--data", str(folder), "--out", str(tmp_path / "run")])
    assert rc == 2
    lines = stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("rvqlayer-recipe: error: expected `--data`"), stderr
    assert _snapshot(tmp_path) == before
