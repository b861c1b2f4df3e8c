"""k-means seeding and Lloyd iterations."""

import math

import torch

from rvqlayer import fit_kmeans
from rvqlayer.kmeans import lloyd, seed_plus_plus


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
