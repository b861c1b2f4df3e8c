"""``tones``: a small neural audio codec trained on synthetic 16 kHz audio.

A strided 1-D convolution (a learned analysis filterbank: 128-sample windows,
hop 64) turns the waveform into 250 frames a second, two residual
convolution units refine each frame to 32 numbers, a
:class:`~rvqlayer.MultiStageQuantizer` with stage dropout turns each frame
into one code per stage, and a mirrored decoder (residual units, then a
transposed convolution that overlap-adds 128-sample windows) turns the summed
codewords back into audio. Loss: L1 on the waveform (weight 10), the
multi-resolution STFT loss (Yamamoto, Song, Kim, ICASSP 2020) and the
quantizer's loss. Evaluation, for each number of stages 1..stages on held-out
clips: bitrate (kbps), SNR (dB) and log-spectral distance (dB).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from rvqlayer import MultiStageQuantizer

from . import _outputs, _plots, _streams, _training
from ._audio import ResidualUnit, log_spectral_distance_db, snr_db, stft_loss, write_clip_set
from ._checkpoint import CHECKPOINT
from ._synth import RATE, SPLIT_HELD_OUT, SPLIT_TRAIN, render_batch
from ._table import Measure, RateTable, rate_table
from .registry import RECIPES, Prepared, Settings

NAME = "tones"
HOP = 64  # samples per frame
FRAME_RATE = RATE / HOP  # 250 frames per second
LATENT = 32  # numbers per frame (the quantizer's dim)
CHANNELS = 96
SEGMENT = 128 * HOP  # training excerpts of 8192 samples (0.512 s)
WAVE_WEIGHT = 10.0  # with weight 1 the STFT terms dominated and some runs learned a sign-flipped output (-6 dB SNR)

DEFAULTS = RECIPES[NAME].defaults
QUICK = RECIPES[NAME].quick
EVAL_CLIPS = {False: (8, 4.0), True: (2, 3.0)}  # (clips, seconds each) for default and --quick
MEASURES = [Measure("SNR", "dB", True), Measure("LSD", "dB", False)]


def prepare(settings: Settings) -> Prepared:
    """Nothing to load: the audio is generated on the fly from the seed."""
    return Prepared(None, LATENT, source=f"synthetic 16 kHz audio, seed {settings['seed']}")


class ToneCodec(nn.Module):
    """Waveform ``[batch, 1, samples]`` -> frames ``[batch, 32, samples / 64]`` -> waveform.

    ``samples`` must be a multiple of 64.
    """

    def __init__(self, stages: int, entries: int, code_dim: int | None) -> None:
        super().__init__()
        c = CHANNELS
        self.encoder = nn.Sequential(
            nn.Conv1d(1, c, 2 * HOP, stride=HOP, padding=HOP // 2),
            ResidualUnit(c, 1),
            ResidualUnit(c, 3),
            nn.ELU(),
            nn.Conv1d(c, LATENT, 1),
        )
        self.decoder = nn.Sequential(
            nn.Conv1d(LATENT, c, 3, padding=1),
            ResidualUnit(c, 1),
            ResidualUnit(c, 3),
            nn.ELU(),
            nn.ConvTranspose1d(c, 1, 2 * HOP, stride=HOP, padding=HOP // 2),
        )
        self.quantizer = MultiStageQuantizer(
            LATENT, stages=stages, entries=entries, code_dim=code_dim, stage_dropout=0.5, axis=1, init_restarts=1
        )

    def forward(self, wave: torch.Tensor) -> tuple[torch.Tensor, Any]:
        out = self.quantizer(self.encoder(wave))
        return self.decoder(out.quantized), out

    @torch.no_grad()
    def encode(self, wave: torch.Tensor) -> torch.Tensor:
        """Codes int64 ``[batch, frames, stages]`` of ``wave`` ``[batch, 1, samples]``."""
        return self.quantizer.encode(self.encoder(wave))

    @torch.no_grad()
    def decode(self, codes: torch.Tensor) -> torch.Tensor:
        """Waveform ``[batch, 1, samples]`` from codes ``[batch, frames, s]`` (the first ``s`` stages)."""
        return self.decoder(self.quantizer.decode(codes))


class ToneModule(_training.RecipeModule):
    def __init__(self, config: dict[str, Any]) -> None:
        super().__init__(config, lr=2e-3)
        self.codec = ToneCodec(config["stages"], config["entries"], config["code_dim"])

    def losses(self, batch: torch.Tensor) -> dict[str, torch.Tensor]:
        wave = batch.unsqueeze(1)
        recon, out = self.codec(wave)
        l1 = F.l1_loss(recon, wave)
        spectral = stft_loss(recon.squeeze(1), batch)
        return {"loss": WAVE_WEIGHT * l1 + spectral + out.loss, "l1": l1, "stft": spectral, "quantizer": out.loss}


def _batch_maker(seed: int, batch_size: int):
    def make(step: int) -> torch.Tensor:
        return torch.from_numpy(render_batch(seed, SPLIT_TRAIN, step * batch_size, batch_size, SEGMENT))

    return make


def build(settings: Settings, prepared: Prepared) -> ToneModule:
    torch.manual_seed(settings["seed"])
    return ToneModule(dict(settings))


def run(
    module: ToneModule, config: Settings, prepared: Prepared, out: Path, resume: dict[str, Any] | None
) -> tuple[RateTable, dict[str, Path]]:
    """Train (or continue), evaluate on held-out clips, write every output; returns the table and files."""
    n_clips, seconds = EVAL_CLIPS[bool(config["quick"])]
    samples = int(seconds * RATE) // HOP * HOP
    held_out = render_batch(config["seed"], SPLIT_HELD_OUT, 0, n_clips, samples)
    val = [torch.from_numpy(render_batch(config["seed"], SPLIT_HELD_OUT, 1000, 4, SEGMENT))]
    print(
        f"tones: {_training.count_parameters(module.codec):,} parameters, {FRAME_RATE:g} frames/s, "
        f"{config['steps']} steps of {config['batch_size']} x {SEGMENT / RATE:.3f} s",
        flush=True,
    )
    _training.train(
        module,
        _batch_maker(config["seed"], config["batch_size"]),
        out=out,
        steps=config["steps"],
        resume=resume,
        val_batches=val,
        val_every=_training.val_interval(config),
        save_every=100,
        gradient_clip=1.0,
    )

    codec = module.codec.eval()
    codes = codec.encode(torch.from_numpy(held_out).unsqueeze(1))  # greedy: stage k does not depend on k+1..
    recon: dict[int, np.ndarray] = {}

    def measure(k: int) -> dict[str, float]:
        y = codec.decode(codes[..., :k]).squeeze(1).numpy()
        recon[k] = y
        return {"SNR": snr_db(held_out, y), "LSD": log_spectral_distance_db(held_out, y)}

    table = rate_table(
        codec.quantizer,
        measure,
        MEASURES,
        "kbps",
        lambda bits: FRAME_RATE * bits / 1000.0,
        codes=codes,
        frame_rate=FRAME_RATE,
    )
    files = _outputs.write_table(
        out,
        table,
        {"recipe": NAME, "frame_rate": FRAME_RATE, "held_out_clips": n_clips, "clip_seconds": samples / RATE},
    )
    files["held-out codes (stream)"] = _streams.write_codes(out, codec.quantizer, codes, FRAME_RATE)
    stages = config["stages"]
    decoded = {k: recon[k][0] for k in sorted({1, max(1, stages // 2), stages})}
    files.update(write_clip_set(out / "audio", held_out[0], decoded, RATE))
    files["quality vs bitrate"] = _plots.rate_quality_png(
        out / "quality_vs_bitrate.png", table, "tones: held-out clips"
    )
    files.update(_outputs.write_health(out, codec.quantizer))
    files["checkpoint"] = out / CHECKPOINT
    files["logs (TensorBoard)"] = out / "logs"
    return table, files
