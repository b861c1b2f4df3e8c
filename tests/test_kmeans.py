"""k-means seeding (k-means++ and the k-means|| summary) and Lloyd iterations."""

import math

import pytest
import torch

from rvqlayer import fit_kmeans
from rvqlayer import kmeans as kmeans_module
from rvqlayer.kmeans import lloyd, seed_plus_plus, summarise


def _blobs(seed: int, k: int = 6, per: int = 200, d: int = 3, spread: float = 0.05):
    g = torch.Generator().manual_seed(seed)
    centres = torch.randn(k, d, generator=g) * 4
    x = (centres.unsqueeze(1) + spread * torch.randn(k, per, d, generator=g)).reshape(-1, d)
    return x, centres


def test_seeding_picks_data_points_one_per_blob():
    torch.manual_seed(0)
    x, centres = _blobs(0)
    seeds = seed_plus_plus(x, 6)
    assert all(bool((x == s).all(1).any()) for s in seeds)
    nearest = torch.cdist(seeds, centres).argmin(1)
    assert sorted(nearest.tolist()) == list(range(6))


def test_fit_recovers_separated_centres():
    torch.manual_seed(1)
    x, centres = _blobs(1)
    fit = fit_kmeans(x, 6, iters=10, restarts=3)
    assert fit.counts.tolist() == [200.0] * 6
    # Each blob is one cluster, so each centroid is that blob's sample mean (the k-means optimum
    # for this partition). How far a sample mean lies from the true centre is sampling noise of
    # the data, not a property of the code, so only a loose distance is asserted. Tolerance: float32
    # summation of n values errs by at most (n - 1) u sum|x_i|, u = 2^-24 (N. J. Higham, "Accuracy
    # and Stability of Numerical Algorithms", 2nd ed. 2002, section 4.2, from memory); divided by n,
    # plus one rounding of the division, that is at most n u max|x_i|.
    blob_means = x.double().reshape(6, 200, 3).mean(1)
    nearest = torch.cdist(fit.centroids.double(), blob_means).argmin(1)
    assert sorted(nearest.tolist()) == list(range(6))
    tol = 200 * 2.0**-24 * float(x.abs().max())
    torch.testing.assert_close(fit.centroids.double(), blob_means[nearest], atol=tol, rtol=0.0)
    gap = torch.cdist(fit.centroids, centres).min(1).values  # a sample mean is ~0.006 off; centres ~4 apart
    assert float(gap.max()) < 0.1
    # expected cost of the blobs: d * spread^2 per point
    assert math.isclose(fit.mse, 3 * 0.05**2, rel_tol=0.15)


def test_fewer_points_than_entries_gives_distinct_codewords():
    torch.manual_seed(2)
    x = torch.randn(5, 4)
    fit = fit_kmeans(x, 12)
    assert fit.centroids.shape == (12, 4)
    assert torch.unique(fit.centroids, dim=0).shape[0] == 12
    assert fit.mse < 1e-12


def test_lloyd_refills_empty_clusters():
    g = torch.Generator().manual_seed(4)
    x = torch.cat([0.1 * torch.randn(10, 1, generator=g), 5 + 0.1 * torch.randn(10, 1, generator=g)])
    start = torch.tensor([[0.0], [5.0], [100.0]])  # the third centre attracts nothing
    fit = lloyd(x, start, iters=3)
    assert float(fit.counts.min()) > 0
    assert float(fit.centroids.max()) <= float(x.max())


def test_restarts_never_hurt():
    x, _ = _blobs(3, k=8, spread=0.5)
    torch.manual_seed(3)
    one = fit_kmeans(x, 8, restarts=1)
    torch.manual_seed(3)
    three = fit_kmeans(x, 8, restarts=3)  # its first run is the same as `one`
    assert three.mse <= one.mse + 1e-9


def _cost(x: torch.Tensor, centres: torch.Tensor) -> float:
    return float(torch.cdist(x.double(), centres.double()).pow(2).min(1).values.sum())


@pytest.mark.parametrize("points", ["all", "summary"])
def test_seeding_cost_within_the_kmeans_plus_plus_bound(points):
    # Arthur & Vassilvitskii, "k-means++: the advantages of careful seeding", SODA 2007,
    # Thm 1.1: the expected cost after seeding alone is at most 8 (ln k + 2) times the optimum.
    # Bahmani et al., "Scalable k-means++", VLDB 2012, Thm 1 and Sec. 3.3, prove an O(log k)
    # factor for k-means|| followed by k-means++ on the weighted candidates; we hold that
    # path to the same constant. On 20 well-separated blobs the optimum is the blob
    # partition, so its cost is the scatter around the blob means. (Uniform seeding, which
    # misses blobs, measured thousands of times the optimum here.)
    k, per = 20, 100
    g = torch.Generator().manual_seed(7)
    centres = 10 * torch.randn(k, 4, generator=g)
    x = (centres.unsqueeze(1) + 0.05 * torch.randn(k, per, 4, generator=g)).reshape(-1, 4)
    optimum = _cost(x, x.view(k, per, 4).mean(1))
    torch.manual_seed(7)
    ratios = []
    for _ in range(10):
        if points == "all":
            seeds = seed_plus_plus(x, k)
        else:
            candidates, weight = summarise(x, k)
            assert candidates.shape[0] < x.shape[0]
            seeds = seed_plus_plus(candidates, k, weight=weight)
        ratios.append(_cost(x, seeds) / optimum)
    assert sum(ratios) / len(ratios) <= 8 * (math.log(k) + 2)


def test_summary_candidates_are_points_weighted_by_their_share():
    torch.manual_seed(8)
    x, _ = _blobs(8, k=6, per=300, d=3, spread=0.5)
    candidates, weight = summarise(x, 6)
    assert all(bool((x == c).all(1).any()) for c in candidates)
    assert float(weight.sum()) == x.shape[0]
    assert float(weight.min()) >= 1.0  # every candidate is nearest to itself at least
    nearest = torch.cdist(x, candidates).argmin(1)
    assert torch.equal(torch.bincount(nearest, minlength=candidates.shape[0]).float(), weight)


def test_weights_act_as_repeated_points():
    g = torch.Generator().manual_seed(9)
    x = torch.randn(40, 3, generator=g)
    weight = torch.randint(1, 4, (40,), generator=g)
    start = x[:5].clone()
    weighted = lloyd(x, start, iters=4, weight=weight.float())
    repeated = lloyd(x.repeat_interleave(weight, dim=0), start, iters=4)
    torch.testing.assert_close(weighted.centroids, repeated.centroids)
    torch.testing.assert_close(weighted.counts, repeated.counts)
    assert weighted.mse == pytest.approx(repeated.mse, rel=1e-5)


def test_large_fits_use_the_summary_and_match_exact_quality(monkeypatch):
    x, _ = _blobs(10, k=16, per=200, d=4, spread=0.3)
    torch.manual_seed(10)
    exact = fit_kmeans(x, 16)
    monkeypatch.setattr(kmeans_module, "_SUMMARY_ABOVE", 0)
    called = []
    original = kmeans_module.summarise
    monkeypatch.setattr(kmeans_module, "summarise", lambda *a, **kw: called.append(1) or original(*a, **kw))
    torch.manual_seed(10)
    fast = fit_kmeans(x, 16)
    assert called == [1]
    # 16 separated blobs: both find the blob partition, cost d * spread^2 per point.
    assert fast.mse == pytest.approx(exact.mse, rel=0.02)
    assert fast.counts.sum() == x.shape[0]
