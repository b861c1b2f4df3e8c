"""k-means in torch: k-means|| summary, greedy k-means++ seeding, Lloyd iterations, restarts.

Seeding follows Arthur & Vassilvitskii (SODA 2007) with the greedy variant:
at each pick, ``2 + floor(ln k)`` candidates are drawn with probability
proportional to the (weighted) squared distance to the nearest chosen
centre, and the one that lowers the total cost most is kept.

The greedy loop is sequential over picks, so on many points it dominates.
:func:`fit_kmeans` therefore first summarises large inputs with the
oversampling rounds of k-means|| (Bahmani, Moseley, Vattani, Kumar and
Vassilvitskii, "Scalable k-means++", VLDB 2012, Algorithm 2): each round
draws many candidates at once, each point with probability proportional to
its squared distance to the candidates so far, and every candidate is then
weighted by the number of points nearest to it. The seeding and the restarts
run on this small weighted summary; Lloyd iterations on all points finish
the fit. Random draws use torch's global generator, so results follow
``torch.manual_seed``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import torch

from .search import Metric, nearest_code

# The summary replaces the points when there are more than 4 per centre and the sequential
# seeding would cost more than this many point-centre distances (n * k); smaller fits are exact.
_SUMMARY_ABOVE = 1 << 22
# Oversampling rounds of k-means||; Bahmani et al. 2012 find 5 rounds enough (Sec. 5).
_ROUNDS = 5
# Pairwise distances of the points being seeded are precomputed up to this many floats (64 MiB).
_PAIRWISE_MAX = 1 << 24


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


def seed_plus_plus(
    x: torch.Tensor,
    k: int,
    *,
    candidates: int | None = None,
    weight: torch.Tensor | None = None,
) -> torch.Tensor:
    """Greedy k-means++ seeding; returns ``[k, d]`` rows of ``x`` (float32).

    Args:
        x: ``[n, d]`` points, ``n >= 1``.
        k: centres to pick.
        candidates: draws per pick; default ``2 + floor(ln k)``.
        weight: optional ``[n]`` non-negative point weights (a point of
            weight w counts as w points); default 1 each.
    """
    return _seed(x, k, candidates=candidates, weight=weight)[0][0]


def _seed(
    x: torch.Tensor, k: int, *, candidates: int | None, weight: torch.Tensor | None, runs: int = 1
) -> tuple[torch.Tensor, torch.Tensor]:
    """``runs`` independent :func:`seed_plus_plus` seedings at once.

    Returns the centres ``[runs, k, d]`` and each run's (weighted) cost ``[runs]``:
    the sum of squared distances to the nearest centre. The runs share every
    tensor operation, so three cost little more than one.
    """
    x = x.float()
    n = x.shape[0]
    w = torch.ones(n, device=x.device) if weight is None else weight.float()
    tries = candidates if candidates is not None else 2 + int(math.log(k))
    x_sq = (x * x).sum(-1)
    # mass[r, j] = weight[j] * squared distance of point j to run r's nearest centre. The
    # weighted distances of every point to point c are row c of `table` (precomputed when
    # small enough), so a pick is a row lookup instead of a product with x.
    table = _sq_dist_to(x, x_sq, x).mul_(w) if n * n <= _PAIRWISE_MAX else None

    def weighted_rows(idx: torch.Tensor) -> torch.Tensor:  # [m] -> [m, n]
        if table is not None:
            return table.index_select(0, idx)
        return _sq_dist_to(x, x_sq, x.index_select(0, idx)).T.mul_(w)

    picks = torch.empty(runs, k, dtype=torch.int64, device=x.device)
    picks[:, 0] = torch.multinomial(w, runs, replacement=True)
    mass = weighted_rows(picks[:, 0]).clone()  # [runs, n]
    offsets = torch.arange(runs, device=x.device) * tries
    for i in range(1, k):
        try:
            cand = torch.multinomial(mass, tries, replacement=True).view(-1)  # runs x tries
        except RuntimeError:  # no mass left in a run: every point already sits on a centre
            picks[:, i:] = torch.randint(n, (runs, k - i), device=x.device)
            break
        new_mass = torch.minimum(weighted_rows(cand).view(runs, tries, n), mass.unsqueeze(1)).view(-1, n)
        best = new_mass.sum(1).view(runs, tries).argmin(1) + offsets  # [runs], into the flat runs x tries
        picks[:, i] = cand.index_select(0, best)
        mass = new_mass.index_select(0, best)
    return x[picks], mass.sum(1)


def summarise(
    x: torch.Tensor,
    k: int,
    *,
    rounds: int = _ROUNDS,
    oversample: float | None = None,
    chunk: int = 4096,
) -> tuple[torch.Tensor, torch.Tensor]:
    """k-means|| oversampling: candidate points ``[m, d]`` and their weights ``[m]``.

    Bahmani et al., "Scalable k-means++", VLDB 2012, Algorithm 2: one point
    drawn uniformly, then ``rounds`` rounds in which every point joins the
    candidates independently with probability ``min(1, l * D^2 / phi)``
    (``D``: distance to the nearest candidate so far, ``phi``: the sum of
    ``D^2``, ``l = oversample``, default ``k / 2``). The weight of a
    candidate is the number of points nearest to it (they sum to ``n``).
    About ``1 + rounds * l`` candidates result.
    """
    x = x.float()
    n = x.shape[0]
    rate = oversample if oversample is not None else max(k / 2.0, 1.0)
    chosen = [torch.randint(n, (1,), device=x.device)]
    closest = (x - x[chosen[0]]).pow(2).sum(-1)
    owner = torch.zeros(n, dtype=torch.int64, device=x.device)
    total = 1
    for _ in range(rounds):
        phi = float(closest.sum())
        if phi <= 0.0:
            break
        new = (torch.rand(n, device=x.device) < closest * (rate / phi)).nonzero().squeeze(1)
        if new.numel() == 0:
            continue
        near, dist = nearest_code(x, x[new], chunk=chunk)
        better = dist < closest
        closest = torch.where(better, dist, closest)
        owner = torch.where(better, near + total, owner)
        chosen.append(new)
        total += new.numel()
    picks = torch.cat(chosen)
    return x[picks], torch.bincount(owner, minlength=total).float()


def lloyd(
    x: torch.Tensor,
    centroids: torch.Tensor,
    *,
    iters: int,
    metric: Metric = "l2",
    chunk: int = 4096,
    weight: torch.Tensor | None = None,
) -> KMeansResult:
    """Run ``iters`` Lloyd iterations from ``centroids`` ``[k, d]`` (fewer once no assignment changes).

    Assignment uses ``metric``; the update is the (``weight``-weighted) mean
    of the assigned points. A centroid that loses all its points moves onto
    the point farthest from its own centroid, so no entry stays empty.
    With ``weight`` ``[n]``, counts and the error are weighted too.
    """
    x = x.float()
    c = centroids.float().clone()
    k = c.shape[0]
    w = None if weight is None else weight.float()
    previous = None
    for it in range(iters + 1):
        codes, dist = nearest_code(x, c, metric=metric, chunk=chunk)
        counts = torch.bincount(codes, weights=w, minlength=k).float()
        if it == iters or (previous is not None and torch.equal(codes, previous) and bool((counts > 0).all())):
            break  # converged: the remaining iterations would change nothing
        previous = codes
        sums = torch.zeros_like(c).index_add_(0, codes, x if w is None else x * w.unsqueeze(1))
        filled = counts > 0
        c[filled] = sums[filled] / counts[filled].unsqueeze(1)
        empty = int((~filled).sum())
        if empty:
            far = dist.topk(min(empty, dist.shape[0])).indices
            c[(~filled).nonzero().squeeze(1)[: far.shape[0]]] = x[far]
    sq = (x - c[codes]).pow(2).sum(-1)
    mse = sq.mean() if w is None else (sq * w).sum() / w.sum().clamp_min(1e-30)
    return KMeansResult(c, counts, float(mse))


def fit_kmeans(
    x: torch.Tensor,
    k: int,
    *,
    iters: int = 10,
    restarts: int = 3,
    metric: Metric = "l2",
    chunk: int = 4096,
) -> KMeansResult:
    """k-means on ``x`` ``[n, d]``: the best of ``restarts`` seeded runs, refined on all points.

    Up to ``4 k`` points, each restart is greedy k-means++ seeding plus
    ``iters`` Lloyd iterations on all points, and the run with the lowest
    MSE is kept. On more points, the restarts run on a k-means|| summary of
    ``x`` (:func:`summarise`, about ``2.5 k`` weighted candidates): weighted
    seeding plus ``iters`` weighted Lloyd iterations each; the run with the
    lowest weighted MSE then gets ``iters`` Lloyd iterations on all points.

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
    exact = n <= 4 * k or n * k <= _SUMMARY_ABOVE
    points, weight = (x, None) if exact else summarise(x, k, chunk=chunk)
    if weight is not None:  # restarts compete on the summary's seeding cost; one Lloyd run on all points
        seeds, cost = _seed(points, k, candidates=None, weight=weight, runs=restarts)
        return lloyd(x, seeds[int(cost.argmin())], iters=iters, metric=metric, chunk=chunk)
    best: KMeansResult | None = None
    for _ in range(restarts):
        run = lloyd(x, seed_plus_plus(x, k), iters=iters, metric=metric, chunk=chunk)
        if best is None or run.mse < best.mse:
            best = run
    assert best is not None
    return best
