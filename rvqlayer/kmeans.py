"""k-means in torch: greedy k-means++ seeding, Lloyd iterations, restarts.

Seeding follows Arthur & Vassilvitskii (SODA 2007) with the greedy variant:
at each pick, ``2 + floor(ln k)`` candidates are drawn with probability
proportional to the squared distance to the nearest chosen centre, and the
one that lowers the total cost most is kept. Random draws use torch's global
generator, so results follow ``torch.manual_seed``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import torch

from .search import Metric, nearest_code


@dataclass
class KMeansResult:
    """Outcome of :func:`fit_kmeans`.

    Attributes:
        centroids: ``[k, d]`` float32.
        counts: ``[k]`` float32, points assigned to each centroid.
        mse: mean squared distance per point to its assigned centroid
            (sum over dimensions, mean over points).
    """

    centroids: torch.Tensor
    counts: torch.Tensor
    mse: float


def _sq_dist_to(x: torch.Tensor, x_sq: torch.Tensor, centres: torch.Tensor) -> torch.Tensor:
    """Squared distances ``[n, m]`` from rows of ``x`` (squared norms ``x_sq`` ``[n]``) to ``centres``."""
    d = torch.addmm((centres * centres).sum(-1), x, centres.T, alpha=-2.0)
    return d.add_(x_sq.unsqueeze(1)).clamp_min_(0.0)


def seed_plus_plus(x: torch.Tensor, k: int, *, candidates: int | None = None) -> torch.Tensor:
    """Greedy k-means++ seeding; returns ``[k, d]`` rows of ``x`` (float32).

    Args:
        x: ``[n, d]`` points, ``n >= 1``.
        k: centres to pick.
        candidates: draws per pick; default ``2 + floor(ln k)``.
    """
    x = x.float()
    n = x.shape[0]
    tries = candidates if candidates is not None else 2 + int(math.log(k))
    centres = torch.empty(k, x.shape[1], dtype=x.dtype, device=x.device)
    first = int(torch.randint(n, (1,), device=x.device))
    centres[0] = x[first]
    x_sq = (x * x).sum(-1)
    closest = _sq_dist_to(x, x_sq, centres[:1]).squeeze(1)
    for i in range(1, k):
        total = closest.sum()
        if float(total) <= 0.0:  # every point already sits on a centre
            picks = torch.randint(n, (k - i,), device=x.device)
            centres[i:] = x[picks]
            break
        cand = torch.multinomial(closest, tries, replacement=True)
        d_cand = _sq_dist_to(x, x_sq, x[cand])  # [n, tries]
        new_closest = torch.minimum(closest.unsqueeze(1), d_cand)
        best = int(new_closest.sum(0).argmin())
        centres[i] = x[cand[best]]
        closest = new_closest[:, best]
    return centres


def lloyd(
    x: torch.Tensor,
    centroids: torch.Tensor,
    *,
    iters: int,
    metric: Metric = "l2",
    chunk: int = 4096,
) -> KMeansResult:
    """Run ``iters`` Lloyd iterations from ``centroids`` ``[k, d]``.

    Assignment uses ``metric``; the update is the mean of the assigned points.
    A centroid that loses all its points moves onto the point farthest from
    its own centroid, so no entry stays empty.
    """
    x = x.float()
    c = centroids.float().clone()
    k = c.shape[0]
    for it in range(iters + 1):
        codes, dist = nearest_code(x, c, metric=metric, chunk=chunk)
        counts = torch.bincount(codes, minlength=k).float()
        if it == iters:
            break
        sums = torch.zeros_like(c).index_add_(0, codes, x)
        filled = counts > 0
        c[filled] = sums[filled] / counts[filled].unsqueeze(1)
        empty = int((~filled).sum())
        if empty:
            far = dist.topk(min(empty, dist.shape[0])).indices
            c[(~filled).nonzero().squeeze(1)[: far.shape[0]]] = x[far]
    sq = (x - c[codes]).pow(2).sum(-1)
    return KMeansResult(c, counts, float(sq.mean()))


def fit_kmeans(
    x: torch.Tensor,
    k: int,
    *,
    iters: int = 10,
    restarts: int = 3,
    metric: Metric = "l2",
    chunk: int = 4096,
) -> KMeansResult:
    """k-means on ``x`` ``[n, d]``: best (lowest MSE) of ``restarts`` seeded runs.

    With fewer points than centres, the centres are the points themselves
    (drawn with repetition) plus a small jitter, so every entry is distinct.

    >>> torch.manual_seed(0) and None
    >>> pts = torch.cat([torch.zeros(50, 2), torch.ones(50, 2)])
    >>> sorted(fit_kmeans(pts, 2).centroids[:, 0].tolist())
    [0.0, 1.0]
    """
    x = x.detach().float()
    n = x.shape[0]
    if n < k:
        picks = torch.cat([torch.arange(n, device=x.device), torch.randint(n, (k - n,), device=x.device)])
        scale = x.std() if n > 1 else x.abs().mean()
        scale = float(scale) if float(scale) > 0 else 1.0
        c = x[picks] + 1e-3 * scale * torch.randn(k, x.shape[1], device=x.device)
        c[:n] = x
        return lloyd(x, c, iters=0, metric=metric, chunk=chunk)
    best: KMeansResult | None = None
    for _ in range(restarts):
        run = lloyd(x, seed_plus_plus(x, k), iters=iters, metric=metric, chunk=chunk)
        if best is None or run.mse < best.mse:
            best = run
    assert best is not None
    return best
