"""``embeddings``: fit a quantizer directly to pre-computed feature vectors (frozen encoder).

The features come from ``--data`` (``.npy`` read with
``numpy.load(allow_pickle=False)``, or a tensor saved with ``torch.save`` and
read with ``torch.load(weights_only=True)``), shaped ``[N, dim]`` (one vector
per item) or ``[N, T, dim]`` (a sequence of T vectors per item), in a float
dtype, with no NaN or Inf. Without ``--data`` the recipe fits a synthetic
Gaussian mixture (invented data, for demos only).

Training is k-means initialisation on the first batch and then
moving-average (EMA) passes over the data in a seeded order; with
``--code-dim`` smaller than dim the two projections are also learned by
gradient on the reconstruction error. The codes of every input vector are
written back as ``codes.npy`` (int64, the input's shape with ``stages`` in
place of ``dim``) and the quantizer as ``codebooks.safetensors``
(:func:`rvqlayer.export.load_codebooks` reads it; ``decode`` of the codes
gives the reconstructions). ``--refine ROUNDS`` re-fits the codebooks
jointly (:meth:`~rvqlayer.MultiStageQuantizer.refine`) after training and
before encoding; the checkpoint keeps the layer before refinement.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F

from rvqlayer import MultiStageQuantizer
from rvqlayer.export import save_codebooks
from rvqlayer.files import atomic_write
from rvqlayer.theory import covariance_eigenvalues, water_filling_distortion

from . import _outputs, _plots, _streams, _training
from ._checkpoint import CHECKPOINT
from ._errors import input_error
from ._table import Measure, RateTable, rate_table
from .registry import RECIPES, Prepared, Settings

NAME = "embeddings"
DEFAULTS = RECIPES[NAME].defaults
QUICK = RECIPES[NAME].quick
DEMO = {False: (16384, 16, 12), True: (4096, 16, 12)}  # (vectors, dim, mixture components)
# "error share": sum of squared errors / sum of squared inputs over all fitted vectors, in the input space.
# Not the health report's `energy_left` (a moving average over training batches, in the lookup space).
# "bound SNR": what reverse water-filling allows a Gaussian with the data's covariance (rvqlayer.theory).
MEASURES = [Measure("SNR", "dB", True), Measure("error share", "%", False), Measure("bound SNR", "dB", True)]
_FLOAT_DTYPES = (np.float16, np.float32, np.float64)


def demo_features(seed: int, n: int, dim: int, components: int) -> np.ndarray:
    """A Gaussian mixture ``[n, dim]`` float32: random means, random per-component scales and axes."""
    rng = np.random.default_rng([seed, 11])
    means = rng.normal(0.0, 3.0, size=(components, dim))
    mixing = rng.normal(0.0, 1.0, size=(components, dim, dim)) / math.sqrt(dim)
    scales = rng.uniform(0.3, 1.5, size=(components, 1, 1))
    which = rng.integers(0, components, size=n)
    noise = rng.normal(size=(n, dim))
    x = means[which] + np.einsum("nd,nde->ne", noise, mixing[which] * scales[which])
    return x.astype(np.float32)


def _load(path: Path) -> np.ndarray:
    """Read ``path`` without running code from it; every failure is a clear error."""
    shown = repr(str(path))
    if not path.exists():
        raise input_error("--data", "an existing .npy or .pt file", f"{shown} (no such file)")
    if not path.is_file():
        raise input_error("--data", "a .npy or .pt file", f"{shown}, which is not a regular file")
    suffix = path.suffix.lower()
    if suffix not in (".npy", ".pt", ".pth"):
        raise input_error("--data", "a file ending in .npy or .pt", shown)
    try:
        with open(path, "rb") as f:
            f.read(1)
    except OSError as exc:
        raise input_error("--data", "a readable file", f"{shown} ({exc.strerror or type(exc).__name__})") from None
    if suffix == ".npy":
        try:
            array = np.load(path, allow_pickle=False)
        except Exception as exc:  # bad header, short file, object array (needs pickle), ...
            raise input_error("--data", "a valid .npy array file", f"{shown} ({_reason(exc)})") from None
        if not isinstance(array, np.ndarray):
            raise input_error("--data", "a single array (.npy)", f"{shown} holding {type(array).__name__}")
        if array.dtype not in _FLOAT_DTYPES:
            raise input_error("--data", "float16, float32 or float64 values", f"dtype {array.dtype} in {shown}")
        return np.asarray(array, dtype=np.float32)
    try:
        obj = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:  # not a torch file, truncated, or holds objects weights_only refuses
        raise input_error("--data", "a tensor saved with torch.save (.pt)", f"{shown} ({_reason(exc)})") from None
    if not isinstance(obj, torch.Tensor):
        raise input_error("--data", "a single tensor (.pt)", f"{shown} holding {type(obj).__name__}")
    if not obj.is_floating_point():
        raise input_error("--data", "a floating-point tensor", f"dtype {obj.dtype} in {shown}")
    return obj.detach().float().numpy()


def _reason(exc: Exception) -> str:
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
    return f"{type(exc).__name__}: {text[:120]}" if text else type(exc).__name__


def check_feature_file(x: np.ndarray, name: str) -> np.ndarray:
    """Fail unless ``x`` is ``[N, dim]`` or ``[N, T, dim]`` with finite values; returns it."""
    if x.ndim not in (2, 3) or 0 in x.shape:
        raise input_error(
            "--data", "an array of shape [N, dim] or [N, T, dim] with no empty axis", f"shape {x.shape} in {name}"
        )
    finite = np.isfinite(x)
    if not finite.all():
        bad = int(x.size - finite.sum())
        raise input_error("--data", "finite values (no NaN or Inf)", f"{bad} non-finite values in {name}")
    return x


def prepare(settings: Settings) -> Prepared:
    """Load and check the features ``[N, dim]`` or ``[N, T, dim]`` (or build the demo mixture); writes nothing."""
    if settings["data"]:
        path = Path(settings["data"])
        x = check_feature_file(_load(path), repr(str(path)))
        return Prepared(x, int(x.shape[-1]), shape=tuple(x.shape), source=str(path.resolve()))
    n, dim, comps = DEMO[bool(settings["quick"])]
    x = demo_features(settings["seed"], n, dim, comps)
    source = f"synthetic Gaussian mixture ({n} x {dim}, {comps} components, seed {settings['seed']})"
    return Prepared(x, dim, source=source)


class EmbeddingModule(_training.RecipeModule):
    def __init__(self, config: dict[str, Any], dim: int) -> None:
        super().__init__(config, lr=1e-3)
        self.quantizer = MultiStageQuantizer(
            dim,
            stages=config["stages"],
            entries=config["entries"],
            code_dim=config["code_dim"],
            stage_dropout=0.5,
            init_restarts=1,
        )

    def losses(self, batch: torch.Tensor) -> dict[str, torch.Tensor]:
        out = self.quantizer(batch)
        mse = F.mse_loss(out.quantized, batch)
        # Without learned projections nothing takes a gradient: the EMA update inside forward is the learning.
        loss = mse + out.loss if self.quantizer.code_dim < self.quantizer.dim else (mse + out.loss).detach()
        return {"loss": loss, "mse": mse.detach(), "quantizer": out.loss.detach()}


def _batch_maker(x: np.ndarray, seed: int, batch_size: int):
    per_pass = math.ceil(len(x) / batch_size)

    def make(step: int) -> torch.Tensor:
        order = np.random.default_rng([seed, 3, step // per_pass]).permutation(len(x))
        i = step % per_pass
        return torch.from_numpy(x[order[i * batch_size : (i + 1) * batch_size]])

    return make, per_pass


def build(settings: Settings, prepared: Prepared) -> EmbeddingModule:
    torch.manual_seed(settings["seed"])
    return EmbeddingModule(dict(settings), prepared.input_size)


def run(
    module: EmbeddingModule, config: Settings, prepared: Prepared, out: Path, resume: dict[str, Any] | None
) -> tuple[RateTable, dict[str, Path]]:
    x = prepared.data
    dim = x.shape[-1]
    make, per_pass = _batch_maker(x, config["seed"], config["batch_size"])
    vectors = int(np.prod(x.shape[:-1]))
    print(
        f"embeddings: {prepared.source}: {vectors:,} vectors of {dim}; {config['steps']} steps of "
        f"{config['batch_size']} items = {config['steps'] / per_pass:.1f} moving-average passes",
        flush=True,
    )
    _training.train(module, make, out=out, steps=config["steps"], resume=resume, save_every=max(1, per_pass * 5))

    q = module.quantizer.eval()
    xt = torch.from_numpy(x)
    if config.get("refine"):
        errors = q.refine(xt, rounds=config["refine"])
        print(f"embeddings: refined the codebooks ({config['refine']} rounds): MSE {errors[0]:.6g} -> {errors[-1]:.6g}")
    codes = q.encode(xt)
    centred = float(np.sum((x - x.reshape(-1, dim).mean(0)) ** 2, dtype=np.float64))
    energy = float(np.sum(x.astype(np.float64) ** 2))
    eigenvalues = covariance_eigenvalues(xt.reshape(-1, dim))
    spread = float(eigenvalues.mean())  # = centred / (vectors * dim)

    def measure(k: int) -> dict[str, float]:
        err = float(torch.sum((q.decode(codes[..., :k]).double() - xt.double()) ** 2))
        bound = water_filling_distortion(eigenvalues, q.bits_per_vector(stages=k))
        return {
            "SNR": 10 * math.log10(centred / max(err, 1e-300)),
            "error share": 100.0 * err / max(energy, 1e-300),
            "bound SNR": 10 * math.log10(max(spread, 1e-300) / max(bound, 1e-300)),
        }

    per_item = 1 if x.ndim == 2 else x.shape[1]
    if config["frame_rate"]:
        unit, rate = "kbps", (lambda bits: config["frame_rate"] * bits / 1000.0)
    else:
        unit, rate = "bits/item", (lambda bits: bits * per_item)
    table = rate_table(q, measure, MEASURES, unit, rate, codes=codes, frame_rate=config["frame_rate"])
    extra = {
        "recipe": NAME,
        "data": prepared.source,
        "shape": list(x.shape),
        "refine_rounds": config.get("refine") or 0,
    }
    files = _outputs.write_table(out, table, extra)
    with atomic_write(out / "codes.npy") as f:
        np.save(f, codes.numpy())
    files["codes"] = out / "codes.npy"
    files["codes (stream)"] = _streams.write_codes(out, q, codes, config["frame_rate"])
    files["codebooks"] = save_codebooks(q, out / "codebooks.safetensors")
    files["quality vs bits"] = _plots.rate_quality_png(out / "quality_vs_bits.png", table, "embeddings")
    files.update(_outputs.write_health(out, q))
    files["checkpoint"] = out / CHECKPOINT
    files["logs (TensorBoard)"] = out / "logs"
    return table, files
