"""Objective speech-quality figures for the ``speech`` recipe (16 kHz, numpy in, float out).

- PESQ wideband (ITU-T P.862.2), through the ``pesq`` package; MOS-LQO from
  about 1.0 to 4.64 (identical signals), higher is better.
- STOI (Taal, Hendriks, Heusdens, Jensen, IEEE TASLP 19(7), 2011), through
  the ``pystoi`` package; 0 to 1 (identical signals), higher is better.
- SI-SDR in dB (Le Roux, Wisdom, Erdogan, Hershey, "SDR - half-baked or well
  done?", ICASSP 2019), higher is better.
- Log-spectral distance in dB (the tones recipe's definition), lower is better.
- Mel-spectrogram L1: the mean absolute difference of natural-log mel
  magnitudes (80 bands, FFT 1024, hop 256: common practice in neural vocoder
  work), lower is better.

Every figure is computed per clip and averaged over clips. If ``pesq``
cannot be imported, :data:`PESQ_MISSING` says why and the PESQ figure is NaN.
"""

from __future__ import annotations

import numpy as np
import torch

from ._audio import log_spectral_distance_db

RATE = 16_000

try:
    from pesq import PesqError
    from pesq import pesq as _pesq

    PESQ_MISSING: str | None = None
except ImportError as exc:  # the package builds from source; a machine without a C compiler may lack it
    _pesq, PesqError = None, None
    PESQ_MISSING = f"the pesq package could not be imported ({exc}); PESQ is left out"


def pesq_wideband(reference: np.ndarray, degraded: np.ndarray) -> float:
    """PESQ wideband MOS-LQO of ``degraded`` against ``reference`` ``[samples]`` (16 kHz).

    NaN when the package is missing or finds no speech in the reference.
    """
    if _pesq is None:
        return float("nan")
    try:
        return float(_pesq(RATE, np.asarray(reference, np.float64), np.asarray(degraded, np.float64), "wb"))
    except PesqError:  # no utterance detected, clip too short
        return float("nan")


def stoi(reference: np.ndarray, degraded: np.ndarray) -> float:
    """Short-time objective intelligibility of ``degraded`` against ``reference`` ``[samples]`` (16 kHz)."""
    from pystoi import stoi as _stoi

    return float(_stoi(np.asarray(reference, np.float64), np.asarray(degraded, np.float64), RATE, extended=False))


def si_sdr_db(reference: np.ndarray, estimate: np.ndarray) -> float:
    """Scale-invariant signal-to-distortion ratio in dB (Le Roux et al. 2019, eq. 2-3).

    Both signals are made zero-mean; the target is the projection of the
    estimate on the reference, ``alpha s`` with ``alpha = <s^, s> / ||s||^2``.

    >>> s = np.sin(np.arange(1000) / 7.0)
    >>> e = s + 0.2 * np.cos(np.arange(1000) / 3.0)
    >>> round(si_sdr_db(s, e), 2), round(si_sdr_db(s, 3 * e), 2)  # the estimate's scale does not matter
    (13.96, 13.96)
    """
    s = np.asarray(reference, np.float64) - np.mean(reference)
    e = np.asarray(estimate, np.float64) - np.mean(estimate)
    alpha = float(np.dot(e, s)) / max(float(np.dot(s, s)), 1e-30)
    target = alpha * s
    noise = e - target
    return float(10 * np.log10(max(float(np.dot(target, target)), 1e-30) / max(float(np.dot(noise, noise)), 1e-30)))


def _mel_filterbank(bands: int, n_fft: int, rate: int) -> torch.Tensor:
    """Triangular filters ``[bands, n_fft // 2 + 1]`` evenly spaced on the HTK mel scale, 0 to rate / 2.

    Mel scale ``2595 log10(1 + f / 700)`` (O'Shaughnessy, Speech Communication, 1987; from memory).
    """
    mel = lambda f: 2595.0 * np.log10(1.0 + f / 700.0)  # noqa: E731
    hz = lambda m: 700.0 * (10 ** (m / 2595.0) - 1.0)  # noqa: E731
    edges = hz(np.linspace(mel(0.0), mel(rate / 2), bands + 2))
    freqs = np.linspace(0.0, rate / 2, n_fft // 2 + 1)
    low, mid, high = edges[:-2, None], edges[1:-1, None], edges[2:, None]
    rise = (freqs - low) / (mid - low)
    fall = (high - freqs) / (high - mid)
    return torch.from_numpy(np.clip(np.minimum(rise, fall), 0.0, None))


_MEL = {"bands": 80, "n_fft": 1024, "hop": 256}


def mel_l1(reference: np.ndarray, degraded: np.ndarray, floor: float = 1e-5) -> float:
    """Mean ``|log max(M, floor) - log max(M^, floor)|`` of mel magnitude spectrograms ``M`` (16 kHz).

    >>> x = np.random.default_rng(0).standard_normal(8000)
    >>> mel_l1(x, x)
    0.0
    >>> round(mel_l1(x, 2 * x), 4)  # twice the amplitude: log 2 everywhere above the floor
    0.6931
    """
    n_fft, hop = _MEL["n_fft"], _MEL["hop"]
    bank = _mel_filterbank(_MEL["bands"], n_fft, RATE)
    window = torch.hann_window(n_fft, dtype=torch.float64)

    def log_mel(x: np.ndarray) -> torch.Tensor:
        spec = torch.stft(torch.as_tensor(np.asarray(x, np.float64)), n_fft, hop, window=window, return_complex=True)
        return torch.log((bank @ spec.abs()).clamp_min(floor))

    return float((log_mel(reference) - log_mel(degraded)).abs().mean())


NAMES = ("PESQ", "STOI", "SI-SDR", "LSD", "mel L1")


def speech_figures(references: list[np.ndarray], decoded: list[np.ndarray]) -> dict[str, float]:
    """Every figure of :data:`NAMES`, each the mean over the clips (PESQ over the clips where it is defined)."""
    per_clip = {name: [] for name in NAMES}
    for x, y in zip(references, decoded):
        per_clip["PESQ"].append(pesq_wideband(x, y))
        per_clip["STOI"].append(stoi(x, y))
        per_clip["SI-SDR"].append(si_sdr_db(x, y))
        per_clip["LSD"].append(log_spectral_distance_db(x, y))
        per_clip["mel L1"].append(mel_l1(x, y))
    out = {}
    for name, values in per_clip.items():
        finite = [v for v in values if np.isfinite(v)]
        out[name] = float(np.mean(finite)) if finite else float("nan")
    return out
