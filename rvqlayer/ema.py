"""Moving-average (EMA) codebook update, as pure functions.

VQ-VAE (van den Oord, Vinyals, Kavukcuoglu, NeurIPS 2017, appendix A.1):
``N <- g N + (1 - g) n``, ``m <- g m + (1 - g) sum z``, ``e = m / N``.
Smoothing the counts so an unused code never divides by zero is an
implementation convention (not in the paper); as ``eps -> 0`` it tends to the
paper's update.
"""

from __future__ import annotations

import torch


def moving_average_(average: torch.Tensor, value: torch.Tensor | float, decay: float) -> torch.Tensor:
    """``average <- decay * average + (1 - decay) * value``, in place; returns ``average``.

    The one moving-average update of the package: codebook counts and sums,
    usage, drift and the per-stage health figures all go through it.

    >>> moving_average_(torch.tensor([1.0]), torch.tensor([3.0]), 0.5)
    tensor([2.])
    """
    return average.mul_(decay).add_(value, alpha=1.0 - decay)


def ema_step(
    counts: torch.Tensor,
    sums: torch.Tensor,
    batch_counts: torch.Tensor,
    batch_sums: torch.Tensor,
    decay: float,
) -> None:
    """Move the running statistics toward this batch, in place.

    Args:
        counts: ``[k]`` running counts N (float32).
        sums: ``[k, d]`` running sums m (float32).
        batch_counts: ``[k]`` vectors assigned to each code in this batch.
        batch_sums: ``[k, d]`` sum of the vectors assigned to each code.
        decay: g in ``[0, 1)``.
    """
    moving_average_(counts, batch_counts, decay)
    moving_average_(sums, batch_sums, decay)


def smoothed_codewords(counts: torch.Tensor, sums: torch.Tensor, eps: float) -> torch.Tensor:
    """Codewords ``m / N~`` with Laplace-smoothed counts ``[k, d]``.

    ``N~_i = (N_i + eps) / (sum N + k eps) * sum N`` keeps the total count and
    is never zero, so an unused code gets a finite codeword.
    """
    total = counts.sum()
    k = counts.shape[0]
    smoothed = (counts + eps) / (total + k * eps) * total
    return sums / smoothed.clamp_min(torch.finfo(sums.dtype).tiny).unsqueeze(-1)


def assignment_stats(
    x: torch.Tensor, codes: torch.Tensor, weight: torch.Tensor, k: int
) -> tuple[torch.Tensor, torch.Tensor]:
    """Per-code count ``[k]`` and sum ``[k, d]`` of rows ``x`` ``[n, d]`` with ``weight`` ``[n]``.

    A bool ``weight`` keeps (True) or drops (False) whole rows without an ``[n, d]``
    temporary: dropped rows are counted in a spare slot ``k`` that is cut off.

    >>> counts, sums = assignment_stats(torch.tensor([[1.0], [2.0], [4.0]]), torch.tensor([0, 1, 1]),
    ...                                 torch.tensor([True, False, True]), 2)
    >>> counts.tolist(), sums.flatten().tolist()
    ([1.0, 1.0], [1.0, 4.0])
    """
    if weight.dtype == torch.bool:
        slot = torch.where(weight, codes, k)
        counts = torch.bincount(slot, minlength=k + 1)[:k].float()
        sums = torch.zeros(k + 1, x.shape[1], dtype=torch.float32, device=x.device)
        return counts, sums.index_add_(0, slot, x.float())[:k]
    counts = torch.zeros(k, dtype=torch.float32, device=x.device).index_add_(0, codes, weight)
    sums = torch.zeros(k, x.shape[1], dtype=torch.float32, device=x.device)
    sums.index_add_(0, codes, x.float() * weight.unsqueeze(1))
    return counts, sums
