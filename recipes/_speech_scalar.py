"""The scalar-quantization reference of the ``speech`` recipe.

Each latent dimension gets its own uniform quantizer; the dimensions share
a total bit budget (the bits per frame of the vector quantizer it is
compared with). Fitted on training latents:

- for each dimension and each bit count b = 0..MAX_BITS, the uniform
  quantizer with 2^b cells over ``mean +- c * std`` (midpoints as outputs,
  values outside clamped to the end cells) whose ``c`` gives the least mean
  squared error on the training latents (a coarse grid, then a fine one
  around its best; b = 0 is the mean);
- bits are handed out one at a time to the dimension whose error falls most
  with one more bit (greedy marginal allocation: the textbook integer
  bit-allocation procedure, e.g. Gersho & Gray, "Vector Quantization and
  Signal Compression", 1992, ch. 8 (from memory)).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

MAX_BITS = 12
_SPREADS = np.linspace(0.5, 6.0, 23)  # c in mean +- c * std


@dataclass
class ScalarQuantizer:
    """Per-dimension uniform quantizers: ``bits [dim]``, ``low [dim]``, ``step [dim]``, ``mean [dim]``."""

    bits: np.ndarray
    low: np.ndarray
    step: np.ndarray
    mean: np.ndarray

    @property
    def total_bits(self) -> int:
        return int(self.bits.sum())

    def __call__(self, z: np.ndarray) -> np.ndarray:
        """Quantize ``z`` ``[..., dim]`` dimension by dimension."""
        cells = 2.0**self.bits
        index = np.clip(np.floor((z - self.low) / self.step), 0, cells - 1)
        out = self.low + (index + 0.5) * self.step
        return np.where(self.bits > 0, out, self.mean).astype(z.dtype)


def _uniform(x: np.ndarray, bits: int) -> tuple[float, float, float]:
    """Best ``(low, step, mse)`` of a ``2**bits``-cell uniform quantizer of the 1-D sample ``x``."""
    mu, sd = float(x.mean()), float(x.std())
    if bits == 0 or sd == 0.0:
        return mu, 1.0, float(np.mean((x - mu) ** 2))
    cells = 2**bits

    def trial(c: float) -> tuple[float, float, float]:
        low, step = mu - c * sd, 2 * c * sd / cells
        q = low + (np.clip(np.floor((x - low) / step), 0, cells - 1) + 0.5) * step
        return low, step, float(np.mean((x - q) ** 2))

    best = min((trial(c) for c in _SPREADS), key=lambda t: t[2])
    c0 = (mu - best[0]) / sd
    return min([best] + [trial(c) for c in np.linspace(c0 - 0.25, c0 + 0.25, 21)], key=lambda t: t[2])


def fit_scalar_quantizer(latents: np.ndarray, total_bits: int) -> ScalarQuantizer:
    """Fit per-dimension uniform quantizers with ``total_bits`` bits in all to ``latents`` ``[n, dim]``.

    >>> z = np.random.default_rng(0).normal(size=(4000, 2)) * [4.0, 1.0]
    >>> sq = fit_scalar_quantizer(z, 6)
    >>> sq.bits.tolist(), sq.total_bits  # the wider dimension gets the extra bits (4 ** 2 = 2 bits more)
    ([4, 2], 6)
    """
    n, dim = latents.shape
    cap = min(MAX_BITS, total_bits)
    fits = [[_uniform(latents[:, d], b) for b in range(cap + 1)] for d in range(dim)]
    bits = np.zeros(dim, dtype=np.int64)
    for _ in range(total_bits):
        gains = [fits[d][bits[d]][2] - fits[d][bits[d] + 1][2] if bits[d] < cap else -np.inf for d in range(dim)]
        bits[int(np.argmax(gains))] += 1
    low = np.array([fits[d][bits[d]][0] for d in range(dim)])
    step = np.array([fits[d][bits[d]][1] for d in range(dim)])
    return ScalarQuantizer(bits, low, step, latents.mean(axis=0))
