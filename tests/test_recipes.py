"""The bundled recipes end to end (``--quick``), their outputs, resuming and bad input."""

from __future__ import annotations

import contextlib
import io
import json
import math
import os
import subprocess
import sys
import wave
from pathlib import Path

import numpy as np
import pytest
import torch

pytest.importorskip("pytorch_lightning")

from recipes import cli  # noqa: E402
from recipes._outputs import Measure, RateRow, RateTable, make_output_dir  # noqa: E402

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def _run(argv: list[str]) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        rc = cli.main(argv)
    return rc, out.getvalue(), err.getvalue()


def _rows(out: Path) -> tuple[dict, list[dict]]:
    data = json.loads((out / "rate_quality.json").read_text())
    return data, data["rows"]


def _assert_table(out: Path, stages: int, better: dict[str, bool]) -> list[dict]:
    """One row per stage count; each measure in ``better`` never gets worse as a stage is added."""
    data, rows = _rows(out)
    assert [r["stages"] for r in rows] == list(range(1, stages + 1))
    bits = [r["bits_per_vector"] for r in rows]
    assert bits == sorted(bits) and len(set(bits)) == stages
    for name, higher in better.items():
        values = [r[name] for r in rows]
        assert all(math.isfinite(v) for v in values), (name, values)
        pairs = list(zip(values, values[1:]))
        if higher:
            assert all(b >= a for a, b in pairs), f"{name} got worse with more stages: {values}"
        else:
            assert all(b <= a for a, b in pairs), f"{name} got worse with more stages: {values}"
    for name in better:
        assert not [p for p in data["worse_with_more_stages"] if p.startswith(name + " ")]
    return rows


def _assert_png(path: Path) -> tuple[int, ...]:
    import matplotlib.image

    assert path.read_bytes()[:8] == PNG_SIGNATURE
    image = matplotlib.image.imread(path)
    assert image.ndim == 3 and image.shape[0] > 50 and image.shape[1] > 50
    return image.shape


def _snapshot(root: Path) -> dict[str, tuple[int, int]]:
    return {str(p.relative_to(root)): (p.stat().st_size, p.stat().st_mtime_ns) for p in root.rglob("*")}


# ------------------------------------------------------------------ runs
@pytest.fixture(scope="module")
def tones_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("tones") / "run"
    rc, stdout, _ = _run(["tones", "--quick", "--out", str(out)])
    return out, rc, stdout


@pytest.fixture(scope="module")
def digits_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("digits") / "run"
    rc, stdout, _ = _run(["digits", "--quick", "--out", str(out)])
    return out, rc, stdout


@pytest.fixture(scope="module")
def embeddings_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("embeddings") / "run"
    rc, stdout, _ = _run(["embeddings", "--quick", "--out", str(out)])
    return out, rc, stdout


def test_tones_table_has_a_row_per_stage_and_improves(tones_run):
    out, rc, stdout = tones_run
    assert rc == 0
    rows = _assert_table(out, 8, {"SNR": True})
    # The log-spectral distance is not guaranteed to fall at every added stage of a briefly trained
    # model (the README says so); over the whole range it must.
    assert rows[-1]["LSD"] < rows[0]["LSD"]
    # 250 frames/s, 256 entries = 8 bits per stage: 2 kbps per stage.
    assert [r["rate"] for r in rows] == pytest.approx([2.0 * k for k in range(1, 9)])
    assert rows[-1]["SNR"] > rows[0]["SNR"] > 0.0
    wav = out / "audio" / "original.wav"
    assert "rate-quality table" in stdout
    assert str(wav) in stdout or os.path.relpath(wav) in stdout  # the summary names the file either way
    assert (out / "rate_quality.txt").read_text().count("\n") == 9  # header + 8 rows


def test_tones_writes_valid_wav_files_at_minus_one_dbfs(tones_run):
    out, rc, _ = tones_run
    assert rc == 0
    names = ["original", "decoded_1_stages", "decoded_4_stages", "decoded_8_stages"]
    lengths = set()
    for name in names:
        with wave.open(str(out / "audio" / f"{name}.wav"), "rb") as w:
            assert (w.getframerate(), w.getsampwidth(), w.getnchannels()) == (16000, 2, 1)
            pcm = np.frombuffer(w.readframes(w.getnframes()), dtype="<i2")
        lengths.add(len(pcm))
        peak_dbfs = 20 * math.log10(np.abs(pcm.astype(np.float64)).max() / 32768)
        assert -1.05 <= peak_dbfs <= -1.0 + 1e-3, (name, peak_dbfs)
    assert lengths == {48000}  # 3 s held-out clips in --quick mode


def test_tones_plot_health_and_checkpoint(tones_run):
    out, rc, _ = tones_run
    assert rc == 0
    _assert_png(out / "quality_vs_bitrate.png")
    assert "total:" in (out / "health.txt").read_text()
    health = json.loads((out / "health.json").read_text())
    assert health["stage1/perplexity"] > 1.0 and "energy_left_db" in health
    state = torch.load(out / "checkpoints" / "last.ckpt", weights_only=True)
    assert state["global_step"] == 120 and state["recipe"]["recipe"] == "tones"
    assert not [p for p in out.rglob("*.tmp")]


def test_tones_table_matches_the_checkpoint(tones_run):
    """Rebuild the codec from the checkpoint and recompute the SNR column on the same held-out clips."""
    from recipes import tones
    from recipes._audio import snr_db
    from recipes._synth import SPLIT_HELD_OUT, render_batch

    out, rc, _ = tones_run
    assert rc == 0
    state = torch.load(out / "checkpoints" / "last.ckpt", weights_only=True)
    module = tones.ToneModule(state["recipe"])
    module.load_state_dict(state["state_dict"])
    codec = module.codec.eval()
    clips = render_batch(0, SPLIT_HELD_OUT, 0, 2, 48000)
    codes = codec.encode(torch.from_numpy(clips).unsqueeze(1))
    _, rows = _rows(out)
    for k in (1, 8):
        y = codec.decode(codes[..., :k]).squeeze(1).numpy()
        assert snr_db(clips, y) == pytest.approx(rows[k - 1]["SNR"], abs=1e-4)


def test_digits_table_and_grid(digits_run):
    out, rc, stdout = digits_run
    assert rc == 0
    rows = _assert_table(out, 4, {"MSE": False})
    assert [r["rate"] for r in rows] == [6.0, 12.0, 18.0, 24.0]  # 64 entries = 6 bits per stage, one vector per image
    # Pixels in [0, 1]: the mean image of the whole set gives an MSE of 0.0733 (computed from load_digits);
    # even the short --quick training must beat that clearly at every bitrate.
    assert rows[0]["MSE"] < 0.06 and rows[-1]["MSE"] < 0.045
    h, w, _ = _assert_png(out / "reconstructions.png")
    assert w > h  # ten digits across, four rows (original, 1, 2, all stages)
    _assert_png(out / "quality_vs_bits.png")
    assert "reconstructions" in stdout


def test_embeddings_codes_decode_through_the_saved_codebooks(embeddings_run):
    from recipes.embeddings import DEMO, demo_features
    from rvqlayer.export import load_codebooks

    out, rc, _ = embeddings_run
    assert rc == 0
    rows = _assert_table(out, 6, {"SNR": True, "energy left": False})
    n, dim, comps = DEMO[True]
    x = demo_features(0, n, dim, comps)
    codes = np.load(out / "codes.npy", allow_pickle=False)
    assert codes.shape == (n, 6) and codes.dtype == np.int64
    assert codes.min() >= 0 and codes.max() < 128
    q = load_codebooks(out / "codebooks.safetensors")
    x_hat = q.decode(torch.from_numpy(codes)).double().numpy()
    err = np.sum((x_hat - x) ** 2)
    snr = 10 * math.log10(np.sum((x - x.mean(0)) ** 2) / err)
    assert snr == pytest.approx(rows[-1]["SNR"], abs=1e-3)
    assert 100 * err / np.sum(x.astype(np.float64) ** 2) == pytest.approx(rows[-1]["energy left"], rel=1e-4)
    # Codes of the first k stages decode to the k-stage row.
    x1 = q.decode(torch.from_numpy(codes[:, :1])).double().numpy()
    assert 10 * math.log10(np.sum((x - x.mean(0)) ** 2) / np.sum((x1 - x) ** 2)) == pytest.approx(
        rows[0]["SNR"], abs=1e-3
    )


@pytest.mark.parametrize("suffix", [".npy", ".pt"])
def test_embeddings_from_a_sequence_file(tmp_path, suffix):
    rng = np.random.default_rng(1)
    feats = rng.normal(size=(40, 5, 8)).astype(np.float64 if suffix == ".npy" else np.float32)
    path = tmp_path / f"feats{suffix}"
    if suffix == ".npy":
        np.save(path, feats)
    else:
        torch.save(torch.from_numpy(feats), path)
    out = tmp_path / "run"
    rc, stdout, err = _run(
        [
            "embeddings",
            "--data",
            str(path),
            "--stages",
            "3",
            "--entries",
            "16",
            "--steps",
            "12",
            "--batch-size",
            "16",
            "--frame-rate",
            "50",
            "--out",
            str(out),
        ]
    )
    assert rc == 0, err
    rows = _assert_table(out, 3, {"SNR": True, "energy left": False})
    assert [r["rate"] for r in rows] == pytest.approx([0.2, 0.4, 0.6])  # 50 vectors/s * 4 bits per stage
    codes = np.load(out / "codes.npy")
    assert codes.shape == (40, 5, 3)


def test_embeddings_with_learned_projections(tmp_path):
    out = tmp_path / "run"
    rc, _, err = _run(["embeddings", "--quick", "--code-dim", "8", "--steps", "30", "--out", str(out)])
    assert rc == 0, err
    _assert_table(out, 6, {"SNR": True, "energy left": False})


# ---------------------------------------------------------------- resume
def test_resume_continues_exactly_where_the_run_stopped(tmp_path):
    """40 steps, then --resume to 80, ends with the same weights as 80 steps in one go."""
    split, whole = tmp_path / "split", tmp_path / "whole"
    assert _run(["digits", "--quick", "--steps", "40", "--out", str(split)])[0] == 0
    first = torch.load(split / "checkpoints" / "last.ckpt", weights_only=True)
    assert first["global_step"] == 40
    rc, stdout, _ = _run(["digits", "--resume", "--steps", "80", "--out", str(split)])
    assert rc == 0 and "resuming from the checkpoint at step 40" in stdout
    assert _run(["digits", "--quick", "--steps", "80", "--out", str(whole)])[0] == 0
    a = torch.load(split / "checkpoints" / "last.ckpt", weights_only=True)
    b = torch.load(whole / "checkpoints" / "last.ckpt", weights_only=True)
    assert a["global_step"] == b["global_step"] == 80
    assert a["recipe"] == b["recipe"]
    for name, tensor in b["state_dict"].items():
        assert torch.equal(a["state_dict"][name], tensor), name
    assert (
        json.loads((split / "rate_quality.json").read_text())["rows"]
        == json.loads((whole / "rate_quality.json").read_text())["rows"]
    )


def test_resume_at_the_end_only_evaluates(tmp_path):
    out = tmp_path / "run"
    assert _run(["embeddings", "--quick", "--steps", "8", "--out", str(out)])[0] == 0
    before = (out / "checkpoints" / "last.ckpt").read_bytes()
    rc, stdout, _ = _run(["embeddings", "--resume", "--out", str(out)])
    assert rc == 0 and "nothing left to train" in stdout
    assert (out / "checkpoints" / "last.ckpt").read_bytes() == before


# ------------------------------------------------------------- bad input
_EMB = ["embeddings", "--steps", "2"]
# Each must be rejected; {data} is a folder of prepared files, {tmp} the test's own folder.
BAD_INPUT = {
    "missing file": _EMB + ["--data", "{data}/absent.npy"],
    "unreadable: a folder": _EMB + ["--data", "{data}/folder.npy"],
    "corrupt npy": _EMB + ["--data", "{data}/garbage.npy"],
    "npy that needs pickle": _EMB + ["--data", "{data}/objects.npy"],
    "corrupt pt": _EMB + ["--data", "{data}/garbage.pt"],
    "pt holding a dict": _EMB + ["--data", "{data}/dict.pt"],
    "unknown suffix": _EMB + ["--data", "{data}/good.txt"],
    "wrong shape 1-D": _EMB + ["--data", "{data}/flat.npy"],
    "wrong shape 4-D": _EMB + ["--data", "{data}/four_axes.npy"],
    "no rows": _EMB + ["--data", "{data}/empty.npy"],
    "wrong dtype npy": _EMB + ["--data", "{data}/ints.npy"],
    "wrong dtype pt": _EMB + ["--data", "{data}/ints.pt"],
    "NaN in data": _EMB + ["--data", "{data}/nan.npy"],
    "Inf in data": _EMB + ["--data", "{data}/inf.npy"],
    "code-dim above the data's dim": _EMB + ["--data", "{data}/good.npy", "--code-dim", "5"],
    "--data for tones": ["tones", "--data", "{data}/good.npy"],
    "--frame-rate for digits": ["digits", "--frame-rate", "75"],
    "out below a file": ["digits", "--out", "{tmp}/a_file/run"],
    "out is a file": ["digits", "--out", "{tmp}/a_file"],
    "out in /proc": ["digits", "--out", "/proc/rvqlayer-recipe-test/run"],
    "stages 0": ["tones", "--stages", "0"],
    "stages 65": ["tones", "--stages", "65"],
    "entries 1": ["digits", "--entries", "1"],
    "code-dim 0": ["digits", "--code-dim", "0"],
    "code-dim above the latent": ["digits", "--code-dim", "33"],
    "steps 0": ["digits", "--steps", "0"],
    "steps not a number": ["digits", "--steps", "many"],
    "batch-size 0": ["digits", "--batch-size", "0"],
    "seed -1": ["digits", "--seed", "-1"],
    "frame-rate 0": ["embeddings", "--frame-rate", "0"],
    "frame-rate nan": ["embeddings", "--frame-rate", "nan"],
    "unknown recipe": ["poems"],
    "unknown option": ["digits", "--learning-rate", "1"],
    "resume with no checkpoint": ["digits", "--resume"],
}


def _make_bad_files(tmp: Path) -> Path:
    data = tmp / "data"
    data.mkdir()
    good = np.random.default_rng(0).normal(size=(32, 4)).astype(np.float32)
    (data / "garbage.npy").write_bytes(b"this is not an array file")
    (data / "folder.npy").mkdir()
    np.save(data / "objects.npy", np.array([{"a": 1}, None], dtype=object), allow_pickle=True)
    np.save(data / "flat.npy", good[:, 0])
    np.save(data / "four_axes.npy", good.reshape(2, 2, 8, 4))
    np.save(data / "empty.npy", good[:0])
    np.save(data / "ints.npy", good.astype(np.int32))
    nan = good.copy()
    nan[3, 1] = np.nan
    np.save(data / "nan.npy", nan)
    inf = good.copy()
    inf[0, 0] = np.inf
    np.save(data / "inf.npy", inf)
    torch.save(torch.arange(12).reshape(3, 4), data / "ints.pt")
    torch.save({"features": torch.from_numpy(good)}, data / "dict.pt")
    (data / "garbage.pt").write_bytes(b"\x00" * 40)
    np.save(data / "good.npy", good)
    (data / "good.txt").write_text("1 2 3\n")
    (tmp / "a_file").write_text("a file, not a folder\n")
    return data


@pytest.mark.parametrize("case", list(BAD_INPUT))
def test_bad_input_exits_2_with_one_line_and_writes_nothing(tmp_path, monkeypatch, case):
    data = _make_bad_files(tmp_path)
    argv = [a.format(data=data, tmp=tmp_path) for a in BAD_INPUT[case]]
    if "--out" not in argv:
        argv += ["--out", str(tmp_path / "run")]
    monkeypatch.chdir(tmp_path)  # anything written relative to the current folder would land here
    before = _snapshot(tmp_path)
    rc, stdout, stderr = _run(argv)
    assert rc == 2
    lines = stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("rvqlayer-recipe: error: "), stderr
    assert _snapshot(tmp_path) == before
    assert not os.path.exists("/proc/rvqlayer-recipe-test")


@pytest.mark.skipif(os.geteuid() == 0, reason="root reads files whatever their permission bits")
def test_unreadable_file_exits_2(tmp_path):
    path = tmp_path / "locked.npy"
    np.save(path, np.zeros((4, 2), np.float32))
    path.chmod(0)
    rc, _, stderr = _run(["embeddings", "--data", str(path), "--out", str(tmp_path / "run")])
    assert rc == 2 and "readable" in stderr
    assert not (tmp_path / "run").exists()


def test_bad_resume_requests_leave_the_run_untouched(tmp_path):
    out = tmp_path / "run"
    assert _run(["embeddings", "--quick", "--steps", "4", "--out", str(out)])[0] == 0
    before = _snapshot(tmp_path)
    for argv in (
        ["embeddings", "--resume", "--stages", "3"],  # changes the model's shape
        ["embeddings", "--resume", "--seed", "9"],  # changes the data stream
        ["digits", "--resume"],  # another recipe's checkpoint
    ):
        rc, _, stderr = _run(argv + ["--out", str(out)])
        assert rc == 2 and len(stderr.strip().splitlines()) == 1, (argv, stderr)
    assert _snapshot(tmp_path) == before
    ckpt = out / "checkpoints" / "last.ckpt"
    ckpt.write_bytes(ckpt.read_bytes()[:100])  # a truncated checkpoint
    before = _snapshot(tmp_path)
    rc, _, stderr = _run(["embeddings", "--resume", "--out", str(out)])
    assert rc == 2 and "readable checkpoint" in stderr
    assert _snapshot(tmp_path) == before


def test_command_line_process_exit_status_and_help():
    env = dict(os.environ, PYTHONWARNINGS="ignore")
    bad = subprocess.run(
        [sys.executable, "-m", "recipes.cli", "tones", "--stages", "0"],
        capture_output=True,
        text=True,
        env=env,
        cwd=Path(__file__).resolve().parents[1],
    )
    assert bad.returncode == 2 and bad.stdout == ""
    assert bad.stderr.strip().splitlines() == [
        "rvqlayer-recipe: error: argument --stages: expected `--stages` to be an int in [1, 64], got 0 "
        "(see rvqlayer-recipe --help)"
    ]
    rc, stdout, _ = _run(["--help"])
    assert rc == 0
    for word in (
        "tones",
        "digits",
        "embeddings",
        "--stages",
        "--entries",
        "--code-dim",
        "--steps",
        "--batch-size",
        "--seed",
        "--out",
        "--resume",
        "--quick",
        "--data",
    ):
        assert word in stdout


def test_console_script_is_declared():
    from importlib.metadata import entry_points

    scripts = {e.name: e.value for e in entry_points(group="console_scripts")}
    assert scripts.get("rvqlayer-recipe") == "recipes.cli:main"


# ------------------------------------------------------------ small parts
def test_rate_table_reports_quality_that_gets_worse():
    m = [Measure("SNR", "dB", True), Measure("LSD", "dB", False)]
    rows = [
        RateRow(1, 8, 1, {"SNR": 5.0, "LSD": 3.0}),
        RateRow(2, 16, 2, {"SNR": 4.0, "LSD": 2.0}),
        RateRow(3, 24, 3, {"SNR": 6.0, "LSD": 2.5}),
    ]
    problems = RateTable("kbps", m, rows).worse_with_more_stages()
    assert len(problems) == 2 and "SNR dB goes from 5 at 1 stages to 4 at 2" in problems[0]
    assert "LSD" in problems[1]


def test_make_output_dir_removes_what_it_created_on_failure(tmp_path, monkeypatch):
    import tempfile

    from rvqlayer import RvqlayerError

    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(tempfile, "mkstemp", refuse)
    with pytest.raises(RvqlayerError, match="writable folder"):
        make_output_dir(tmp_path / "a" / "b" / "c")
    assert list(tmp_path.iterdir()) == []


class _Unpicklable:
    def __reduce__(self):
        raise RuntimeError("refused")


def test_checkpoint_writer_keeps_the_previous_file_when_a_save_fails(tmp_path):
    from recipes._training import AtomicCheckpointIO

    io_ = AtomicCheckpointIO()
    path = tmp_path / "last.ckpt"
    io_.save_checkpoint({"global_step": 1, "w": torch.ones(3)}, path)
    with pytest.raises(RuntimeError, match="refused"):
        io_.save_checkpoint({"global_step": 2, "bad": _Unpicklable()}, path)
    assert [p.name for p in tmp_path.iterdir()] == ["last.ckpt"]
    assert torch.load(path, weights_only=True)["global_step"] == 1


def test_synthetic_clips_are_seeded_and_splits_differ():
    from recipes._synth import SPLIT_HELD_OUT, SPLIT_TRAIN, render_batch

    a = render_batch(3, SPLIT_TRAIN, 0, 2, 16000)
    assert np.array_equal(a, render_batch(3, SPLIT_TRAIN, 0, 2, 16000))
    assert not np.allclose(a, render_batch(3, SPLIT_HELD_OUT, 0, 2, 16000))
    assert not np.allclose(a, render_batch(4, SPLIT_TRAIN, 0, 2, 16000))
    assert a.dtype == np.float32 and np.abs(a).max() <= 1.0


def test_stft_loss_is_zero_only_for_equal_signals():
    from recipes._audio import stft_loss

    torch.manual_seed(0)
    x = torch.randn(2, 4096)
    assert float(stft_loss(x, x)) == 0.0
    assert float(stft_loss(0.5 * x, x)) > 0.1
    assert float(stft_loss(x + 0.01 * torch.randn_like(x), x)) < float(stft_loss(x + 0.3 * torch.randn_like(x), x))


def test_wav_writer_normalises_the_peak(tmp_path):
    from recipes._audio import write_wav

    path = write_wav(tmp_path / "x.wav", 0.001 * np.sin(np.linspace(0, 100, 8000)), 16000)
    with wave.open(str(path)) as w:
        pcm = np.frombuffer(w.readframes(w.getnframes()), dtype="<i2")
    assert abs(20 * math.log10(np.abs(pcm).max() / 32767) + 1.0) < 0.01
    silent = write_wav(tmp_path / "s.wav", np.zeros(100), 16000)
    with wave.open(str(silent)) as w:
        assert not np.frombuffer(w.readframes(w.getnframes()), dtype="<i2").any()


def test_default_code_dims_match_the_models():
    from recipes import digits, tones

    assert tones.DEFAULTS["code_dim"] == tones.LATENT
    assert digits.DEFAULTS["code_dim"] == digits.LATENT


def test_embeddings_table_shows_the_gaussian_bound(embeddings_run):
    # Reverse water-filling (Cover & Thomas, Elements of Information Theory, 2nd ed. 2006, Thm 10.3.3)
    # on the eigenvalues of the data's covariance, as an SNR against the same centred energy.
    from recipes.embeddings import DEMO, demo_features

    out, rc, _ = embeddings_run
    assert rc == 0
    rows = _assert_table(out, 6, {"bound SNR": True})
    n, dim, comps = DEMO[True]
    x = demo_features(0, n, dim, comps).astype(np.float64)
    lam = np.linalg.eigvalsh(np.cov(x.T, bias=True))
    for row in rows:
        theta_lo, theta_hi = 1e-300, float(lam.max())
        for _ in range(3000):  # bisection on theta: sum max(0, 1/2 log2(l / theta)) = bits
            mid = math.sqrt(theta_lo * theta_hi)
            rate = sum(0.5 * math.log2(v / mid) for v in lam if v > mid)
            theta_lo, theta_hi = (mid, theta_hi) if rate > row["bits_per_vector"] else (theta_lo, mid)
        bound = np.minimum(theta_hi, lam).sum()
        assert row["bound SNR"] == pytest.approx(10 * math.log10(lam.sum() / bound), abs=1e-6)
