"""Audio losses, quality figures and WAV output for the ``tones`` recipe."""

from __future__ import annotations

import wave
from pathlib import Path

import numpy as np
import torch
from torch import nn

from rvqlayer.files import atomic_path

# Multi-resolution STFT loss: Yamamoto, Song, Kim, "Parallel WaveGAN: a fast waveform
# generation model based on generative adversarial networks with multi-resolution
# spectrogram", ICASSP 2020: spectral convergence plus log STFT magnitude distance,
# averaged over several STFT settings. The paper used FFT sizes 512/1024/2048 at 24 kHz
# (from memory, as is the title); we use smaller ones at 16 kHz (our choice, cheaper on
# CPU) with hop = FFT/4 and a Hann window of the FFT size. Our change: the log term
# compares log(|X| + 1) instead of log|X|. With the plain log, the gradient (1/|X|) of
# the many near-silent bins in pauses and decays swamped the waveform L1 term, and in
# our trials the waveform SNR stayed near 0 dB.
STFT_SETTINGS = ((256, 64), (512, 128), (1024, 256))
MAGNITUDE_OFFSET = 1.0


def _magnitude(x: torch.Tensor, n_fft: int, hop: int) -> torch.Tensor:
    """``|STFT|`` ``[batch, n_fft // 2 + 1, frames]`` of ``x`` ``[batch, samples]``."""
    window = torch.hann_window(n_fft, device=x.device, dtype=x.dtype)
    spec = torch.stft(x, n_fft, hop_length=hop, window=window, return_complex=True)
    return spec.abs()


def stft_loss(x_hat: torch.Tensor, x: torch.Tensor) -> torch.Tensor:
    """Multi-resolution STFT loss between ``x_hat`` and ``x`` ``[batch, samples]`` (scalar).

    Per resolution: spectral convergence ``|| |X| - |X^| ||_F / || |X| ||_F`` plus
    the mean absolute difference of ``log(|X| + 1)`` and ``log(|X^| + 1)``; the
    mean over resolutions.

    >>> x = torch.randn(2, 2048)
    >>> float(stft_loss(x, x))
    0.0
    """
    total = x.new_zeros(())
    for n_fft, hop in STFT_SETTINGS:
        mag, mag_hat = _magnitude(x, n_fft, hop), _magnitude(x_hat, n_fft, hop)
        convergence = torch.linalg.norm(mag - mag_hat) / torch.linalg.norm(mag).clamp_min(1e-8)
        log_distance = ((mag + MAGNITUDE_OFFSET).log() - (mag_hat + MAGNITUDE_OFFSET).log()).abs().mean()
        total = total + convergence + log_distance
    return total / len(STFT_SETTINGS)


def snr_db(x: np.ndarray, x_hat: np.ndarray) -> float:
    """Signal-to-noise ratio ``10 log10(sum x^2 / sum (x - x_hat)^2)`` in dB over all samples.

    >>> round(snr_db(np.ones(4), np.full(4, 0.9)), 2)
    20.0
    """
    err = float(np.sum((np.asarray(x, np.float64) - x_hat) ** 2))
    return float(10.0 * np.log10(float(np.sum(np.asarray(x, np.float64) ** 2)) / max(err, 1e-30)))


def log_spectral_distance_db(
    x: np.ndarray, x_hat: np.ndarray, n_fft: int = 512, hop: int = 128, floor_db: float = 60.0
) -> float:
    """Log-spectral distance in dB between signals ``[..., samples]`` (16 kHz or any rate).

    Per STFT frame: the root mean square over frequency of ``10 log10 P -
    10 log10 P^`` (power spectra); then the mean over frames and clips. Both
    spectra are floored ``floor_db`` below the loudest bin of the original
    clip (our choice), so bins far below anything audible in the clip, such
    as the noise floor in pauses, do not dominate. 0 for identical signals.

    >>> x = np.random.default_rng(0).standard_normal(4096)
    >>> log_spectral_distance_db(x, x)
    0.0
    >>> round(log_spectral_distance_db(x, 2 * x, floor_db=200.0), 2)  # twice the amplitude: 20 log10 2 dB
    6.02
    """
    a = torch.as_tensor(np.asarray(x, np.float64)).reshape(-1, np.shape(x)[-1])
    b = torch.as_tensor(np.asarray(x_hat, np.float64)).reshape(-1, np.shape(x_hat)[-1])
    window = torch.hann_window(n_fft, dtype=torch.float64)
    p, p_hat = (torch.stft(s, n_fft, hop_length=hop, window=window, return_complex=True).abs().pow(2) for s in (a, b))
    floor = p.amax(dim=(1, 2), keepdim=True).clamp_min(1e-30) * 10 ** (-floor_db / 10)
    diff = 10 * torch.log10(torch.maximum(p, floor)) - 10 * torch.log10(torch.maximum(p_hat, floor))
    return float(diff.pow(2).mean(dim=1).sqrt().mean())


PEAK_DBFS = -1.0


def peak_gain(*clips: np.ndarray, peak_dbfs: float = PEAK_DBFS) -> float:
    """The one factor that puts the loudest sample of all ``clips`` at ``peak_dbfs`` (0 for silence).

    Written with the same factor, a decoded clip keeps its level relative to
    the original, so a codec's gain error stays audible, and no file peaks
    above ``peak_dbfs``.

    >>> round(peak_gain(np.array([0.5, -0.25]), np.array([0.1])), 4)  # -1 dBFS is 0.8913
    1.7825
    """
    peak = max((float(np.abs(c).max()) for c in clips if np.size(c)), default=0.0)
    return 10 ** (peak_dbfs / 20) / peak if peak > 0 else 0.0


def write_wav(
    path: Path, audio: np.ndarray, rate: int, peak_dbfs: float = PEAK_DBFS, gain: float | None = None
) -> Path:
    """Write mono ``audio`` ``[samples]`` as 16-bit PCM, scaled by ``gain``.

    ``gain=None`` peak-normalises this clip alone to ``peak_dbfs``; pass
    :func:`peak_gain` of a clip and its decodings to scale them all alike.
    Silence stays silence.
    """
    audio = np.asarray(audio, dtype=np.float64)
    if gain is None:
        gain = peak_gain(audio, peak_dbfs=peak_dbfs)
    pcm = np.clip(np.round(audio * gain * 32767), -32767, 32767).astype("<i2")
    with atomic_path(path) as tmp:
        with wave.open(str(tmp), "wb") as w:
            w.setnchannels(1)
            w.setsampwidth(2)
            w.setframerate(rate)
            w.writeframes(pcm.tobytes())
    return path


def write_clip_set(folder: Path, original: np.ndarray, decoded: dict[int, np.ndarray], rate: int) -> dict[str, Path]:
    """``original.wav`` and ``decoded_<k>_stages.wav`` for each ``k``, all scaled by one :func:`peak_gain`.

    Returns ``{what: path}`` for the recipes' file list.
    """
    gain = peak_gain(original, *decoded.values())  # one factor: a codec's level error stays audible
    files = {"original clip": write_wav(folder / "original.wav", original, rate, gain=gain)}
    for k, clip in decoded.items():
        files[f"decoded, {k} stage{'s' * (k > 1)}"] = write_wav(
            folder / f"decoded_{k}_stages.wav", clip, rate, gain=gain
        )
    return files


class ResidualUnit(nn.Module):
    """A dilated residual convolution unit ``[batch, channels, time] -> same``: ELU, conv 3, ELU, conv 1, plus x."""

    def __init__(self, channels: int, dilation: int) -> None:
        super().__init__()
        self.body = nn.Sequential(
            nn.ELU(),
            nn.Conv1d(channels, channels, 3, padding=dilation, dilation=dilation),
            nn.ELU(),
            nn.Conv1d(channels, channels, 1),
        )

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return x + self.body(x)
