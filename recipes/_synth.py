"""Synthetic 16 kHz test audio: our own scenario of notes, glides, noise bursts and pauses.

Every clip is a sequence of events drawn from a numpy generator seeded by
``(seed, split, index)``, so clip ``index`` of a split is the same on every
machine and run, and the training and held-out splits never share a clip.

- note: a harmonic tone (fundamental 98-784 Hz on a semitone grid, 3-10
  partials with a random spectral tilt), vibrato 4-7 Hz up to half a
  semitone, a short attack and an exponential decay; sometimes a second note
  a third, fourth or fifth above sounds with it;
- glide: a few partials sweeping exponentially between two pitches;
- burst: a short decaying noise burst, low- or high-passed;
- pause: near silence (a noise floor at about -80 dBFS runs under everything).

Invented data, for demos only.
"""

from __future__ import annotations

import numpy as np

RATE = 16_000
SPLIT_TRAIN, SPLIT_HELD_OUT = 0, 1
_NOISE_FLOOR = 1e-4  # about -80 dBFS


def _harmonic(f0: np.ndarray, partials: int, tilt: float, rng: np.random.Generator) -> np.ndarray:
    """Sum of ``partials`` harmonics of the instantaneous fundamental ``f0`` [n] (Hz)."""
    phase = 2 * np.pi * np.cumsum(f0) / RATE + rng.uniform(0, 2 * np.pi)
    out = np.zeros_like(f0)
    for h in range(1, partials + 1):
        audible = h * f0 < 0.45 * RATE  # keep partials below the Nyquist frequency
        out += audible * np.sin(h * phase + rng.uniform(0, 2 * np.pi)) / h**tilt
    return out


def _envelope(n: int, attack_s: float, decay_per_s: float) -> np.ndarray:
    t = np.arange(n) / RATE
    attack = np.clip(t / max(attack_s, 1e-4), 0.0, 1.0)
    release = np.clip((n - 1 - np.arange(n)) / (0.005 * RATE), 0.0, 1.0)  # 5 ms fade out, no clicks
    return attack * np.exp(-decay_per_s * t) * release


def _note(n: int, rng: np.random.Generator) -> np.ndarray:
    semitone = rng.integers(0, 37)
    f_base = 98.0 * 2 ** (semitone / 12)
    t = np.arange(n) / RATE
    depth = rng.uniform(0.0, 0.5)  # semitones
    vibrato = depth * np.sin(2 * np.pi * rng.uniform(4.0, 7.0) * t + rng.uniform(0, 2 * np.pi))
    tone = _harmonic(f_base * 2 ** (vibrato / 12), int(rng.integers(3, 11)), rng.uniform(0.7, 2.0), rng)
    if rng.random() < 0.3:
        above = rng.choice([3, 4, 5, 7])
        tone += 0.7 * _harmonic(
            f_base * 2 ** ((above + vibrato) / 12), int(rng.integers(2, 7)), rng.uniform(1.0, 2.0), rng
        )
    return tone * _envelope(n, rng.uniform(0.003, 0.04), rng.uniform(1.0, 8.0))


def _glide(n: int, rng: np.random.Generator) -> np.ndarray:
    f_a, f_b = 98.0 * 2 ** (rng.uniform(0, 36, size=2) / 12)
    f0 = f_a * (f_b / f_a) ** np.linspace(0.0, 1.0, n)
    return _harmonic(f0, int(rng.integers(2, 6)), rng.uniform(1.0, 2.0), rng) * _envelope(
        n, 0.02, rng.uniform(0.0, 2.0)
    )


def _burst(n: int, rng: np.random.Generator) -> np.ndarray:
    noise = rng.standard_normal(n)
    if rng.random() < 0.5:  # low-passed: running mean over a few samples
        width = int(rng.integers(2, 12))
        noise = np.convolve(noise, np.ones(width) / np.sqrt(width), mode="same")
    else:  # high-passed: first difference
        noise = np.diff(noise, prepend=0.0) / np.sqrt(2)
    return 0.5 * noise * _envelope(n, 0.002, rng.uniform(10.0, 40.0))


_EVENTS = (
    ("note", 0.45, (0.15, 0.8)),
    ("glide", 0.2, (0.2, 0.7)),
    ("burst", 0.15, (0.03, 0.2)),
    ("pause", 0.2, (0.05, 0.4)),
)


def render_clip(seed: int, split: int, index: int, samples: int) -> np.ndarray:
    """Clip ``index`` of ``split`` as float32 ``[samples]`` in about [-1, 1] (16 kHz).

    >>> a = render_clip(0, SPLIT_TRAIN, 3, 1600)
    >>> a.shape, a.dtype, bool(np.array_equal(a, render_clip(0, SPLIT_TRAIN, 3, 1600)))
    ((1600,), dtype('float32'), True)
    """
    rng = np.random.default_rng([seed, split, index])
    out = np.zeros(samples)
    kinds, weights, spans = zip(*((k, w, s) for k, w, s in _EVENTS))
    weights = np.asarray(weights) / sum(weights)
    # Start part-way into the first event so short training excerpts do not always begin with an onset.
    pos = -int(rng.uniform(0.0, 0.3) * RATE)
    while pos < samples:
        pick = int(rng.choice(len(kinds), p=weights))
        lo, hi = spans[pick]
        n = int(rng.uniform(lo, hi) * RATE)
        if kinds[pick] != "pause":
            event = {"note": _note, "glide": _glide, "burst": _burst}[kinds[pick]](n, rng)
            event *= rng.uniform(0.1, 0.6) / max(np.abs(event).max(), 1e-9)
            a, b = max(pos, 0), min(pos + n, samples)
            if b > a:
                out[a:b] += event[a - pos : b - pos]
        pos += n
    out += _NOISE_FLOOR * rng.standard_normal(samples)
    return out.astype(np.float32)


def render_batch(seed: int, split: int, first: int, count: int, samples: int) -> np.ndarray:
    """Clips ``first .. first + count - 1`` of ``split`` as float32 ``[count, samples]``."""
    return np.stack([render_clip(seed, split, first + i, samples) for i in range(count)])
