"""``digits``: a small autoencoder with a quantized bottleneck on scikit-learn's 8x8 digits.

The data is the UCI "Optical Recognition of Handwritten Digits" test set
(Alpaydin & Kaynak 1998) that ships inside scikit-learn (``load_digits``:
1797 images, integer values 0-16), so nothing is downloaded. Pixels are
scaled to [0, 1]; a fixed seeded split keeps 300 images out of training.
Each image becomes one vector, so bits per image equal bits per vector.
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
from ._checkpoint import CHECKPOINT
from ._table import Measure, RateTable, rate_table
from .registry import RECIPES, Prepared, Settings

NAME = "digits"
LATENT = 32
HELD_OUT = 300
SAVE_EVERY = 100  # steps between checkpoints
DEFAULTS = RECIPES[NAME].defaults
QUICK = RECIPES[NAME].quick
MEASURES = [Measure("MSE", "", False)]


def prepare(settings: Settings) -> Prepared:
    """Train and held-out images ``[n, 64]`` in [0, 1] and their labels (seeded split), as ``data``."""
    from sklearn.datasets import load_digits

    images, labels = load_digits(return_X_y=True)
    order = np.random.default_rng([settings["seed"], 7]).permutation(len(images))
    images = (images[order] / 16.0).astype(np.float32)
    labels = labels[order]
    data = (images[HELD_OUT:], labels[HELD_OUT:], images[:HELD_OUT], labels[:HELD_OUT])
    return Prepared(data, LATENT, source="scikit-learn's load_digits")


class DigitAutoencoder(nn.Module):
    """Image ``[batch, 64]`` -> vector ``[batch, 32]`` -> quantizer -> image ``[batch, 64]`` in (0, 1)."""

    def __init__(self, stages: int, entries: int, code_dim: int | None) -> None:
        super().__init__()
        self.encoder = nn.Sequential(
            nn.Linear(64, 256), nn.ELU(), nn.Linear(256, 128), nn.ELU(), nn.Linear(128, LATENT)
        )
        self.decoder = nn.Sequential(
            nn.Linear(LATENT, 128), nn.ELU(), nn.Linear(128, 256), nn.ELU(), nn.Linear(256, 64)
        )
        self.quantizer = MultiStageQuantizer(
            LATENT, stages=stages, entries=entries, code_dim=code_dim, stage_dropout=0.5, init_restarts=1
        )

    def forward(self, images: torch.Tensor) -> tuple[torch.Tensor, Any]:
        out = self.quantizer(self.encoder(images))
        return torch.sigmoid(self.decoder(out.quantized)), out

    @torch.no_grad()
    def encode(self, images: torch.Tensor) -> torch.Tensor:
        return self.quantizer.encode(self.encoder(images))

    @torch.no_grad()
    def decode(self, codes: torch.Tensor) -> torch.Tensor:
        return torch.sigmoid(self.decoder(self.quantizer.decode(codes)))


class DigitModule(_training.RecipeModule):
    def __init__(self, config: dict[str, Any]) -> None:
        super().__init__(config, lr=2e-3)
        self.model = DigitAutoencoder(config["stages"], config["entries"], config["code_dim"])

    def losses(self, batch: torch.Tensor) -> dict[str, torch.Tensor]:
        recon, out = self.model(batch)
        mse = F.mse_loss(recon, batch)
        return {"loss": mse + out.loss, "mse": mse, "quantizer": out.loss}


def _batch_maker(train: np.ndarray, seed: int, batch_size: int):
    def make(step: int) -> torch.Tensor:
        rng = np.random.default_rng([seed, 1, step])
        pick = rng.choice(len(train), size=batch_size, replace=batch_size > len(train))
        return torch.from_numpy(train[pick])

    return make


def _examples(labels: np.ndarray) -> np.ndarray:
    """Index of the first held-out image of each class 0-9 (fewer when a class is missing)."""
    return np.array([int(np.flatnonzero(labels == c)[0]) for c in range(10) if np.any(labels == c)])


def build(settings: Settings, prepared: Prepared) -> DigitModule:
    torch.manual_seed(settings["seed"])
    return DigitModule(dict(settings))


def run(
    module: DigitModule, config: Settings, prepared: Prepared, out: Path, resume: dict[str, Any] | None
) -> tuple[RateTable, dict[str, Path]]:
    train, _, test, test_labels = prepared.data
    print(
        f"digits: {len(train)} training and {len(test)} held-out images, "
        f"{_training.count_parameters(module.model):,} parameters, {config['steps']} steps of {config['batch_size']}",
        flush=True,
    )
    val = [torch.from_numpy(test)]
    _training.train(
        module,
        _batch_maker(train, config["seed"], config["batch_size"]),
        out=out,
        steps=config["steps"],
        resume=resume,
        val_batches=val,
        val_every=_training.val_interval(config),
        save_every=SAVE_EVERY,
    )

    model = module.model.eval()
    x = torch.from_numpy(test)
    codes = model.encode(x)
    recon: dict[int, np.ndarray] = {}

    def measure(k: int) -> dict[str, float]:
        recon[k] = model.decode(codes[:, :k]).numpy()
        return {"MSE": float(np.mean((recon[k] - test) ** 2))}

    table = rate_table(model.quantizer, measure, MEASURES, "bits/image", lambda bits: bits, codes=codes)
    files = _outputs.write_table(out, table, {"recipe": NAME, "held_out_images": len(test), "pixel_scale": "0..1"})
    files["held-out codes (stream)"] = _streams.write_codes(out, model.quantizer, codes, None)
    pick = _examples(test_labels)
    stages = config["stages"]
    rows = [("original", test[pick])]
    for k in sorted({1, min(2, stages), stages}):
        rows.append((f"{k} stage{'s' * (k > 1)}\n{table.rows[k - 1].bits_per_vector:.0f} bits", recon[k][pick]))
    files["reconstructions"] = _plots.image_grid_png(
        out / "reconstructions.png", rows, (8, 8), "held-out digits: originals and reconstructions"
    )
    files["quality vs bits"] = _plots.rate_quality_png(out / "quality_vs_bits.png", table, "digits: held-out images")
    files.update(_outputs.write_health(out, model.quantizer))
    files["checkpoint"] = out / CHECKPOINT
    files["logs (TensorBoard)"] = out / "logs"
    return table, files
