"""Audio for the ``speech`` recipe: the synthetic pool or the user's folder, training
excerpts with level and noise augmentation, and held-out clips.

Training batches depend on ``(seed, step)`` alone (see ``_training``), so a
resumed run sees the same excerpts as an uninterrupted one.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from . import _speech_synth
from ._errors import input_error

RATE = _speech_synth.RATE
SUFFIXES = (".wav", ".flac")
SYNTH_LEVEL = 0.5  # every synthetic utterance is scaled to this peak (-6 dBFS) before augmentation
GAIN_DB = (-12.0, 3.0)  # level augmentation: a gain drawn uniformly in this range (dB) per excerpt
NOISE_SHARE = 0.5  # share of excerpts that get white noise ...
NOISE_SNR_DB = (20.0, 45.0)  # ... at a signal-to-noise ratio drawn in this range (dB)


@dataclass
class SpeechAudio:
    """Training audio (a list of clips) and held-out clips, all float32 at 16 kHz."""

    train: list[np.ndarray]
    held_out: list[np.ndarray]
    source: str


# ---------------------------------------------------------------- synthetic
def synthetic(seed: int, train_utterances: int, held_out_clips: int) -> SpeechAudio:
    """eSpeak NG utterances: training sentences and voices, and held-out ones (see ``_speech_synth``)."""
    train = _speech_synth.draw_utterances(seed, False, train_utterances)
    held = _speech_synth.draw_utterances(seed, True, held_out_clips)
    # Rendered apart, so the held-out audio does not depend on how many training utterances there are.
    train_clips = [_peak(c, SYNTH_LEVEL) for c in _speech_synth.synthesise(train)]
    held_clips = [_peak(c, SYNTH_LEVEL) for c in _speech_synth.synthesise(held)]
    voices = sorted({u.voice.split("+")[1] for u in held})
    return SpeechAudio(
        train_clips,
        held_clips,
        f"eSpeak NG speech: {len(train)} training utterances, {len(held)} held-out ones "
        f"(sentences and voice variants {', '.join(voices)} never seen in training)",
    )


def _peak(x: np.ndarray, level: float) -> np.ndarray:
    peak = float(np.abs(x).max()) if x.size else 0.0
    return (x * (level / peak)).astype(np.float32) if peak > 0 else x.astype(np.float32)


# -------------------------------------------------------------- user folder
def from_folder(folder: Path, excerpt: int, eval_seconds: float, max_clips: int) -> SpeechAudio:
    """WAV/FLAC files of ``folder`` (any rate, mono or multichannel) as 16 kHz mono.

    Files are taken in name order; the last tenth (at least one) is held out.
    A single file is split in time instead: its last fifth is held out. Raises
    ``RvqlayerError`` naming ``--data`` for a missing or empty folder, an
    unreadable file, non-finite samples or a clip shorter than one excerpt
    (``excerpt`` samples at 16 kHz).
    """
    import soundfile

    folder = Path(folder)
    if not folder.is_dir():
        raise input_error("--data", "a folder of WAV or FLAC files", repr(str(folder)))
    files = sorted(p for p in folder.iterdir() if p.suffix.lower() in SUFFIXES and not p.name.startswith("."))
    if not files:
        raise input_error("--data", "a folder holding .wav or .flac files", f"none in {str(folder)!r}")
    clips = []
    for path in files:
        try:
            data, rate = soundfile.read(str(path), dtype="float64", always_2d=True)
        except Exception as exc:  # libsndfile's errors, permission errors, a folder named like a file
            raise input_error("--data", "readable WAV or FLAC files", f"{str(path)!r} ({type(exc).__name__})") from None
        if not np.isfinite(data).all():
            raise input_error("--data", "finite samples (no NaN or Inf)", f"non-finite samples in {str(path)!r}")
        mono = _resample(data.mean(axis=1), int(rate))
        if len(mono) < excerpt:
            raise input_error(
                "--data",
                f"clips of at least {excerpt / RATE:g} s (one training excerpt)",
                f"{len(mono) / RATE:.3f} s in {str(path)!r}",
            )
        clips.append(mono)
    if len(clips) == 1:
        cut = int(len(clips[0]) * 0.8)
        train, held = [clips[0][:cut]], [clips[0][cut:]]
        if min(len(train[0]), len(held[0])) < excerpt:
            raise input_error(
                "--data",
                f"two or more files, or one of at least {5 * excerpt / RATE:g} s (its last fifth is held out)",
                f"one file of {len(clips[0]) / RATE:.3f} s",
            )
    else:
        n_held = max(1, round(len(clips) / 10))
        train, held = clips[:-n_held], clips[-n_held:]
    pieces = _eval_pieces(held, int(eval_seconds * RATE), excerpt, max_clips)
    return SpeechAudio(
        train,
        pieces,
        f"{len(files)} files in {str(folder)!r}: {sum(map(len, train)) / RATE:.1f} s for training, "
        f"{len(pieces)} held-out clips",
    )


def _resample(x: np.ndarray, rate: int) -> np.ndarray:
    """``x`` at ``rate`` Hz -> float32 at 16 kHz (scipy's polyphase resampler)."""
    from scipy.signal import resample_poly

    if rate == RATE:
        return x.astype(np.float32)
    g = math.gcd(RATE, rate)
    return resample_poly(x, RATE // g, rate // g).astype(np.float32)


def _eval_pieces(clips: list[np.ndarray], length: int, shortest: int, count: int) -> list[np.ndarray]:
    """Consecutive pieces of at most ``length`` samples (none shorter than ``shortest``), at most ``count``."""
    out = []
    for clip in clips:
        for start in range(0, len(clip), length):
            piece = clip[start : start + length]
            if len(piece) >= shortest and len(out) < count:
                out.append(piece)
    return out


# -------------------------------------------------------------- excerpts
def excerpt_batch(clips: list[np.ndarray], seed: int, step: int, count: int, samples: int) -> np.ndarray:
    """``count`` excerpts ``[count, samples]`` of the training clips for training step ``step``.

    Each excerpt: a clip and offset drawn uniformly, a gain in ``GAIN_DB``,
    and for ``NOISE_SHARE`` of them white noise at an SNR in ``NOISE_SNR_DB``;
    clipped to [-1, 1]. A clip shorter than ``samples`` is padded with zeros.
    """
    rng = np.random.default_rng([seed, 9100, step])
    out = np.zeros((count, samples), np.float32)
    for i in range(count):
        clip = clips[int(rng.integers(len(clips)))]
        start = int(rng.integers(0, max(1, len(clip) - samples + 1)))
        x = clip[start : start + samples].astype(np.float64) * 10 ** (rng.uniform(*GAIN_DB) / 20)
        if rng.random() < NOISE_SHARE:
            power = float(np.mean(x**2))
            x = x + math.sqrt(power * 10 ** (-rng.uniform(*NOISE_SNR_DB) / 10)) * rng.standard_normal(len(x))
        out[i, : len(x)] = np.clip(x, -1.0, 1.0)
    return out
