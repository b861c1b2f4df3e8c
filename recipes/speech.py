"""``speech``: a small speech codec at 16 kHz, 50 frames a second, judged by PESQ and STOI.

Data: English sentences of our own (``speech_sentences.txt``) spoken by
eSpeak NG (``_speech_synth``), or with ``--data DIR`` the user's own WAV/FLAC
files (``_speech_data``). Held-out clips differ from training ones in
sentence and voice (synthetic) or file (``--data``).

Model: a strided convolution (128-sample windows, hop 64: a learned
filterbank at 250 frames/s) and two residual units, then a second strided
convolution (hop 5: 50 frames/s) and two residual units make 32 numbers per
20 ms frame; a :class:`~rvqlayer.MultiStageQuantizer` with stage dropout codes
each frame; a mirrored decoder makes the waveform again. Loss: the tones
recipe's (waveform L1 with weight 10 plus the multi-resolution STFT loss)
plus the quantizer's loss.

Bypass (for the no-quantizer reference): in training, a share ``BYPASS`` of
the excerpts skip the quantizer and the decoder sees the encoder's output
itself. So the decoder also learns to decode unquantized latents, and
"no quantizer" on the held-out clips is the ceiling of this very
autoencoder: what any number of stages could at best reach.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from rvqlayer import MultiStageQuantizer
from rvqlayer.files import atomic_path

from . import _outputs, _plots, _speech_data, _speech_metrics, _streams, _training
from ._audio import ResidualUnit, stft_loss, write_clip_set
from ._checkpoint import CHECKPOINT
from ._speech_scalar import fit_scalar_quantizer
from ._table import Measure, RateRow, RateTable, rate_table
from .registry import RECIPES, Prepared, Settings

NAME = "speech"
RATE = _speech_data.RATE
HOP = 320  # samples per frame: 50 frames a second (common practice for speech codecs)
FRAME_RATE = RATE / HOP
FIRST_HOP = 64  # the learned filterbank's hop (250 frames/s); 64 * 5 = 320
LATENT = 32  # numbers per frame (the quantizer's dim)
CHANNELS = (64, 128)  # at 250 and at 50 frames/s
SEGMENT = 40 * HOP  # training excerpts of 12800 samples (0.8 s)
WAVE_WEIGHT = 10.0  # as in the tones recipe
BYPASS = 0.2  # share of training excerpts that skip the quantizer (see the module docstring)
STAGE_DROPOUT = 0.5

DEFAULTS = RECIPES[NAME].defaults
QUICK = RECIPES[NAME].quick
# (training utterances, held-out clips, seconds per held-out clip at most) for the default run and --quick
SIZES = {False: (300, 8, 4.0), True: (48, 3, 3.0)}
MEASURES = [
    Measure("PESQ", "", True),
    Measure("STOI", "", True),
    Measure("SI-SDR", "dB", True),
    Measure("LSD", "dB", False),
    Measure("mel L1", "", False),
]


def prepare(settings: Settings) -> Prepared:
    """With ``--data``: read and check the user's folder (writes nothing). Else synthesised in ``run``."""
    if not settings.get("data"):
        return Prepared(None, LATENT, source=f"synthetic speech (eSpeak NG), seed {settings['seed']}")
    _, n_clips, seconds = SIZES[bool(settings["quick"])]
    folder = Path(settings["data"])
    audio = _speech_data.from_folder(folder, SEGMENT, seconds, n_clips)
    shape = (len(audio.train), sum(len(c) for c in audio.train))
    return Prepared(audio, LATENT, shape=shape, source=audio.source)


class SpeechCodec(nn.Module):
    """Waveform ``[batch, 1, samples]`` -> frames ``[batch, 32, samples / 320]`` -> waveform.

    ``samples`` must be a multiple of 320.
    """

    def __init__(self, stages: int, entries: int, code_dim: int) -> None:
        super().__init__()
        a, b = CHANNELS
        down = HOP // FIRST_HOP
        self.encoder = nn.Sequential(
            nn.Conv1d(1, a, 2 * FIRST_HOP, stride=FIRST_HOP, padding=FIRST_HOP // 2),
            ResidualUnit(a, 1),
            ResidualUnit(a, 3),
            nn.ELU(),
            nn.Conv1d(a, b, 3 * down, stride=down, padding=down),
            ResidualUnit(b, 1),
            ResidualUnit(b, 3),
            nn.ELU(),
            nn.Conv1d(b, LATENT, 3, padding=1),
        )
        self.decoder = nn.Sequential(
            nn.Conv1d(LATENT, b, 3, padding=1),
            ResidualUnit(b, 1),
            ResidualUnit(b, 3),
            nn.ELU(),
            nn.ConvTranspose1d(b, a, 3 * down, stride=down, padding=down),
            ResidualUnit(a, 1),
            ResidualUnit(a, 3),
            nn.ELU(),
            nn.ConvTranspose1d(a, 1, 2 * FIRST_HOP, stride=FIRST_HOP, padding=FIRST_HOP // 2),
        )
        self.quantizer = MultiStageQuantizer(
            LATENT,
            stages=stages,
            entries=entries,
            code_dim=code_dim,
            stage_dropout=STAGE_DROPOUT,
            axis=1,
            init_restarts=1,
        )

    def forward(self, wave: torch.Tensor, bypass: torch.Tensor | None = None) -> tuple[torch.Tensor, Any]:
        """``bypass`` (bool ``[batch]``): excerpts whose decoder input is the unquantized latent."""
        z = self.encoder(wave)
        out = self.quantizer(z)
        q = out.quantized if bypass is None else torch.where(bypass[:, None, None], z, out.quantized)
        return self.decoder(q), out

    @torch.no_grad()
    def latents(self, wave: torch.Tensor) -> torch.Tensor:
        return self.encoder(wave)

    @torch.no_grad()
    def decode_latents(self, z: torch.Tensor) -> torch.Tensor:
        return self.decoder(z)


class SpeechModule(_training.RecipeModule):
    def __init__(self, config: dict[str, Any]) -> None:
        super().__init__(config, lr=2e-3)
        self.codec = SpeechCodec(config["stages"], config["entries"], config["code_dim"])

    def losses(self, batch: torch.Tensor) -> dict[str, torch.Tensor]:
        wave = batch.unsqueeze(1)
        bypass = torch.rand(batch.shape[0]) < BYPASS if self.training else None
        recon, out = self.codec(wave, bypass)
        l1 = F.l1_loss(recon, wave)
        spectral = stft_loss(recon.squeeze(1), batch)
        return {"loss": WAVE_WEIGHT * l1 + spectral + out.loss, "l1": l1, "stft": spectral, "quantizer": out.loss}


# -------------------------------------------------------------------- table
@dataclass
class ReferenceRow:
    """A reference row: ``label``, its bits per frame and kbps (None: not a bitrate), its quality."""

    label: str
    bits_per_vector: float | None
    rate: float | None
    quality: dict[str, float]


class SpeechTable(RateTable):
    """The rate-quality table (with the measured stream columns) and reference rows below the stage rows."""

    def __init__(self, rows: list[RateRow], references: list[ReferenceRow], note: str | None) -> None:
        super().__init__("kbps", list(MEASURES), rows)
        self.references = references
        self.note = note

    def format(self) -> str:
        streams = self.stream_labels()
        head = f"{'stages':>13}  {'bits/frame':>10}  {'kbps':>6}" + "".join(f"  {s:>12}" for s in streams)
        head += "".join(f"  {m.label:>9}" for m in self.measures)

        def cells(values: dict[str, float]) -> str:
            return "".join(f"  {_cell(values[m.name], m.name):>9}" for m in self.measures)

        lines = [head]
        for r in self.rows:
            values = (r.stream.fixed, r.stream.coded, r.stream.entropy) if streams else ()  # type: ignore[union-attr]
            costs = "".join(f"  {v:>12.3f}" for v in values)
            lines.append(f"{r.stages:>13}  {r.bits_per_vector:>10.0f}  {r.rate:>6.2f}" + costs + cells(r.quality))
        for ref in self.references:
            bits = "-" if ref.bits_per_vector is None else f"{ref.bits_per_vector:.0f}"
            rate = "-" if ref.rate is None else f"{ref.rate:.2f}"
            dashes = "".join(f"  {'-':>12}" for _ in streams)
            lines.append(f"{ref.label:>13}  {bits:>10}  {rate:>6}" + dashes + cells(ref.quality))
        if self.note:
            lines.append(f"note: {self.note}")
        return "\n".join(lines)

    def as_dict(self) -> dict[str, Any]:
        out = super().as_dict()
        out["references"] = [
            {"label": r.label, "bits_per_vector": r.bits_per_vector, "rate": r.rate, **r.quality}
            for r in self.references
        ]
        out["note"] = self.note
        return out


def _cell(value: float, name: str) -> str:
    if not math.isfinite(value):
        return "-"
    return f"{value:.2f}" if name in ("SI-SDR", "LSD") else f"{value:.3f}"


# ---------------------------------------------------------------- training
def _batch_maker(clips: list[np.ndarray], seed: int, batch_size: int):
    def make(step: int) -> torch.Tensor:
        return torch.from_numpy(_speech_data.excerpt_batch(clips, seed, step, batch_size, SEGMENT))

    return make


def _pad(x: np.ndarray) -> torch.Tensor:
    """``x`` ``[samples]`` zero-padded to a multiple of 320, as ``[1, 1, samples']``."""
    n = -(-len(x) // HOP) * HOP
    return torch.from_numpy(np.pad(x, (0, n - len(x)))).reshape(1, 1, n)


def build(settings: Settings, prepared: Prepared) -> SpeechModule:
    torch.manual_seed(settings["seed"])
    return SpeechModule(dict(settings))


def run(
    module: SpeechModule, config: Settings, prepared: Prepared, out: Path, resume: dict[str, Any] | None
) -> tuple[SpeechTable, dict[str, Path]]:
    """Train (or continue), evaluate on held-out clips, write every output; returns the table and files."""
    seed = config["seed"]
    n_train, n_clips, seconds = SIZES[bool(config["quick"])]
    data = prepared.data
    if data is None:
        data = _speech_data.synthetic(seed, n_train, n_clips)
        data.held_out = [c[: int(seconds * RATE)] for c in data.held_out]
    if _speech_metrics.PESQ_MISSING:
        print(f"note: {_speech_metrics.PESQ_MISSING}", flush=True)
    val = [torch.from_numpy(np.stack([np.pad(c[:SEGMENT], (0, max(0, SEGMENT - len(c)))) for c in data.held_out[:4]]))]
    print(
        f"speech: {data.source}\n"
        f"speech: {_training.count_parameters(module.codec):,} parameters, {FRAME_RATE:g} frames/s, "
        f"{config['steps']} steps of {config['batch_size']} x {SEGMENT / RATE:.2f} s",
        flush=True,
    )
    _training.train(
        module,
        _batch_maker(data.train, seed, config["batch_size"]),
        out=out,
        steps=config["steps"],
        resume=resume,
        val_batches=val,
        val_every=_training.val_interval(config),
        save_every=100,
        gradient_clip=1.0,
    )

    codec = module.codec.eval()
    refs = data.held_out
    latents = [codec.latents(_pad(x)) for x in refs]
    codes = [codec.quantizer.encode(z) for z in latents]  # greedy: stage k does not depend on k+1..
    total_seconds = sum(len(x) for x in refs) / RATE

    def decode(z: torch.Tensor, x: np.ndarray) -> np.ndarray:
        return codec.decode_latents(z)[0, 0, : len(x)].numpy()

    recon: dict[int, list[np.ndarray]] = {}

    def measure(k: int) -> dict[str, float]:
        recon[k] = [decode(codec.quantizer.decode(c[..., :k]), x) for c, x in zip(codes, refs)]
        return _speech_metrics.speech_figures(refs, recon[k])

    frames = torch.cat([c[0] for c in codes])  # [all frames, stages], clip after clip
    stage_table = rate_table(
        codec.quantizer,
        measure,
        MEASURES,
        "kbps",
        lambda b: FRAME_RATE * b / 1000.0,
        codes=frames,
        frame_rate=FRAME_RATE,
    )
    bits = int(codec.quantizer.bits_per_vector(stages=codec.quantizer.stages))
    bypass = [decode(z, x) for z, x in zip(latents, refs)]
    sq = _fit_scalar(codec, data.train, seed, bits)
    scalar = [decode(torch.from_numpy(sq(z[0].T.numpy()).T)[None], x) for z, x in zip(latents, refs)]
    references = [
        ReferenceRow("no quantizer", None, None, _speech_metrics.speech_figures(refs, bypass)),
        ReferenceRow("scalar", float(bits), FRAME_RATE * bits / 1000.0, _speech_metrics.speech_figures(refs, scalar)),
    ]
    table = SpeechTable(stage_table.rows, references, _speech_metrics.PESQ_MISSING)

    files = _outputs.write_table(
        out,
        table,
        {
            "recipe": NAME,
            "frame_rate": FRAME_RATE,
            "data": data.source,
            "held_out_clips": len(refs),
            "held_out_seconds": total_seconds,
            "scalar_bits_per_dimension": sq.bits.tolist(),
        },
    )
    files["held-out codes (stream)"] = _streams.write_codes(out, codec.quantizer, frames, FRAME_RATE)
    stages = config["stages"]
    wanted = sorted({1, max(1, stages // 2), stages})
    files.update(write_clip_set(out / "audio", refs[0], {k: recon[k][0] for k in wanted}, RATE))
    files["PESQ and STOI vs bitrate"] = _plot(out / "quality_vs_bitrate.png", table)
    files.update(_outputs.write_health(out, codec.quantizer))
    files["checkpoint"] = out / CHECKPOINT
    files["logs (TensorBoard)"] = out / "logs"
    return table, files


def _fit_scalar(codec: SpeechCodec, clips: list[np.ndarray], seed: int, bits: int):
    """The scalar reference at ``bits`` per frame, fitted on latents of training excerpts (no augmentation draws reused)."""
    batches = [_speech_data.excerpt_batch(clips, seed, 10_000_000 + i, 16, SEGMENT) for i in range(8)]
    z = codec.latents(torch.from_numpy(np.concatenate(batches)).unsqueeze(1))
    return fit_scalar_quantizer(z.transpose(1, 2).reshape(-1, LATENT).numpy().astype(np.float64), bits)


# ------------------------------------------------------------------ outputs
def _plot(path: Path, table: SpeechTable) -> Path:
    """PESQ and STOI against kbps; the reference rows as horizontal lines."""
    plt = _plots._pyplot()
    fig, axes = plt.subplots(1, 2, figsize=(9.0, 3.8))
    rates = [r.rate for r in table.rows]
    styles = {"no quantizer": ("--", "tab:green"), "scalar": (":", "tab:red")}
    for ax, name in zip(axes, ("PESQ", "STOI")):
        values = [r.quality[name] for r in table.rows]
        ax.plot(rates, values, marker="o", label="vector quantizer (stages 1..N)")
        for r, v in zip(table.rows, values):
            ax.annotate(str(r.stages), (r.rate, v), textcoords="offset points", xytext=(4, 4), fontsize=8)
        for ref in table.references:
            v = ref.quality[name]
            if math.isfinite(v):
                style, color = styles.get(ref.label, ("-.", "gray"))
                label = ref.label if ref.rate is None else f"{ref.label} at {ref.rate:g} kbps"
                ax.axhline(v, linestyle=style, color=color, label=label)
        ax.set_xlabel("kbps (fixed-length codes)")
        ax.set_ylabel(f"{name} (higher is better)")
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7, loc="best")
    fig.suptitle("speech: held-out clips (labels: stages used)")
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format="png", dpi=110)
    plt.close(fig)
    return path
