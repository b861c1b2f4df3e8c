"""The core layer checked against published values and a reference library.

Every comparison names its source beside it. Training always runs in training
mode on fresh random batches; the error is then measured in eval mode, through
``encode``/``decode`` (the codes are what a codec transmits), on a held-out
sample drawn from its own generator.

Why the settings are what they are (measured on this code, not tuned to pass):

- The EMA update is a relaxed Lloyd step: each training step moves a codeword
  about ``1 - ema_decay`` of the way to the centroid of its current cell. The
  k-means initialisation fits the first batch only, and in one or two
  dimensions the error surface is flat along some directions, so that fit
  lands above the optimum (8 Gaussian levels fitted on 1024 points: +6% on
  average, up to +21%, over 20 seeds) and the EMA needs many steps to average
  it away: after 300 steps at the default decay 0.99, 6 of 20 seeds are still
  more than 3% above Max's table; after 2000 steps none of 50 is. That is not
  enough margin by the rule for quality assertions (DEVELOPERS.md): after 2000
  steps of 1024 at decay 0.99, over seeds 0-4 the 8-level MSE read -0.13% to
  +0.78% of the table (margin 2.2% to the 3% bound, 2.4 times the spread) and
  the largest 4-level error 0.008-0.026 (margin 0.024 to 0.05, 1.3 times).
  The Gaussian checks therefore use decay 0.95 on batches of 4096: 2000 steps
  then amount to about 100 Lloyd steps, each averaged over about 80k samples.
- The 2-D check at 256 entries would need several thousand steps at decay
  0.99 (G = 0.0839-0.0844 after 600 steps of 4096 vectors, still above the
  square lattice), so it uses decay 0.9. After 600 steps (about 60 averaged
  Lloyd steps) G read 0.0822-0.0826 over seeds 0-4, only 1.6 times the spread
  below 1/12; after 1800 steps 0.0818-0.0821 (margin 4.4 times the spread).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
import pytest
import torch
from sklearn.cluster import KMeans

import rvqlayer
from rvqlayer import Codebook, MultiStageQuantizer, fit_kmeans

Sampler = Callable[[int, torch.Generator | None], torch.Tensor]


def _gaussian(dim: int) -> Sampler:
    return lambda n, gen: torch.randn(n, dim, generator=gen)


def _uniform(dim: int) -> Sampler:
    return lambda n, gen: torch.rand(n, dim, generator=gen)


def _train(q: MultiStageQuantizer, sample: Sampler, *, steps: int, batch: int, seed: int) -> MultiStageQuantizer:
    """Train ``q`` for ``steps`` fresh batches ``[batch, dim]`` drawn from the global generator."""
    torch.manual_seed(seed)
    q.train()
    for _ in range(steps):
        q(sample(batch, None))
    return q.eval()


def _held_out_mse(q: MultiStageQuantizer, sample: Sampler, n: int, seed: int = 12345) -> float:
    """Mean squared error per dimension of ``decode(encode(x))`` on ``n`` held-out vectors."""
    x = sample(n, torch.Generator().manual_seed(seed))
    x_hat = q.decode(q.encode(x))
    return float((x_hat - x).pow(2).mean())


def _show(check: str, measured: float, reference: str) -> None:
    """Print one measured value next to its reference (``pytest -rP`` shows it for passing tests)."""
    print(f"{check}: measured {measured:.6g}; reference {reference}")


def _sq_error_per_point(x: np.ndarray, centres: np.ndarray) -> float:
    """Mean over points of the squared distance (summed over dimensions) to the nearest centre, in float64."""
    d = ((x[:, None, :] - centres[None, :, :]) ** 2).sum(-1)
    return float(d.min(1).mean())


# ----------------------------------------------------------------- scalar, Gaussian
# Optimal (Lloyd-Max) MSE for a unit-variance Gaussian and N levels:
# J. Max, "Quantizing for minimum distortion", IRE Trans. Inf. Theory IT-6(1), 1960, table;
# S. P. Lloyd, "Least squares quantization in PCM", IEEE Trans. Inf. Theory IT-28(2), 1982.
LLOYD_MAX_MSE = {2: 0.3634, 4: 0.1175, 8: 0.03454}
# Positive output levels from the same table (the levels are symmetric about 0).
LLOYD_MAX_LEVELS = {2: [0.7979], 4: [0.4528, 1.5104], 8: [0.2451, 0.7560, 1.3439, 2.1519]}
SCALAR_STEPS, SCALAR_BATCH = 2000, 1024
GAUSSIAN_DECAY, GAUSSIAN_BATCH = 0.95, 4096


@pytest.mark.parametrize("entries", [2, 4, 8])
def test_scalar_gaussian_reaches_lloyd_max(entries: int) -> None:
    q = _train(
        MultiStageQuantizer(1, stages=1, entries=entries, ema_decay=GAUSSIAN_DECAY),
        _gaussian(1),
        steps=SCALAR_STEPS,
        batch=GAUSSIAN_BATCH,
        seed=20 + entries,
    )
    mse = _held_out_mse(q, _gaussian(1), 1 << 20)
    _show(f"Lloyd-Max MSE, N={entries}", mse, f"{LLOYD_MAX_MSE[entries]} +- 3%")
    # Max 1960 table: within 3% (a held-out sample of 2^20 adds about 0.15% of noise).
    assert mse == pytest.approx(LLOYD_MAX_MSE[entries], rel=0.03)

    # The levels themselves, where they are well determined. For 8 levels the
    # MSE surface is so flat that levels still off by up to 0.16 give an MSE
    # within 2.1% of the optimum, so only 2 and 4 levels are compared.
    if entries <= 4:
        half = torch.tensor(LLOYD_MAX_LEVELS[entries])
        table = torch.cat([-half.flip(0), half])  # Max 1960 table, symmetric levels
        levels = q.codebooks[0].codewords.flatten().sort().values
        _show(f"Lloyd-Max levels, N={entries}, largest error", float((levels - table).abs().max()), "+- 0.05")
        torch.testing.assert_close(levels, table, atol=0.05, rtol=0.0)


# ------------------------------------------------------------------ scalar, uniform
@pytest.mark.parametrize("entries", [2, 4, 8])
def test_scalar_uniform_matches_step_squared_over_12(entries: int) -> None:
    q = _train(
        MultiStageQuantizer(1, stages=1, entries=entries),
        _uniform(1),
        steps=SCALAR_STEPS,
        batch=SCALAR_BATCH,
        seed=30 + entries,
    )
    mse = _held_out_mse(q, _uniform(1), 1 << 20)
    _show(f"uniform MSE, N={entries}", mse, f"1/(12 N^2) = {1.0 / (12 * entries**2):.6g} +- 5%")
    # Uniform source of width W = 1 with N levels: MSE = W^2 / (12 N^2)
    # (W. R. Bennett, "Spectra of quantized signals", Bell Syst. Tech. J. 27, 1948;
    # R. M. Gray & D. L. Neuhoff, "Quantization", IEEE Trans. Inf. Theory 44(6), 1998).
    assert mse == pytest.approx(1.0 / (12 * entries**2), rel=0.05)


# ---------------------------------------------------------- Shannon rate-distortion
def _shannon_mse(bits_per_dim: float) -> float:
    # Distortion-rate function of an i.i.d. unit Gaussian under MSE, D(R) = 2^(-2R):
    # T. M. Cover & J. A. Thomas, "Elements of Information Theory", 2nd ed., 2006, Thm 10.3.2.
    # No quantizer of any kind can go below it.
    return 2.0 ** (-2.0 * bits_per_dim)


@pytest.mark.parametrize(
    ("dim", "stages", "entries"),
    [(1, 1, 4), (2, 2, 16), (4, 4, 16), (8, 4, 16)],
)
def test_never_below_shannon_bound(dim: int, stages: int, entries: int) -> None:
    q = _train(
        MultiStageQuantizer(dim, stages=stages, entries=entries),
        _gaussian(dim),
        steps=50,
        batch=4096,
        seed=40 + dim,
    )
    rate = q.bits_per_vector() / dim
    x = _gaussian(dim)(1 << 16, torch.Generator().manual_seed(7))
    for used in range(1, stages + 1):  # every prefix of the stages is a quantizer of its own
        mse = float((q.decode(q.encode(x, stages=used)) - x).pow(2).mean())
        bound = _shannon_mse(rate * used / stages)
        _show(f"MSE, dim {dim}, {used} of {stages} stages x {entries}", mse, f"> D(R) = {bound:.6g}")
        assert mse > bound, (used, mse, bound)


def test_one_bit_per_dimension_in_8d_is_within_1_5_db_of_shannon() -> None:
    # 256 entries in 8 dimensions: R = 8 bits / 8 dims = 1 bit per dimension, D(1) = 0.25.
    q = _train(MultiStageQuantizer(8, stages=1, entries=256), _gaussian(8), steps=100, batch=8192, seed=50)
    mse = _held_out_mse(q, _gaussian(8), 1 << 17)
    gap_db = 10.0 * math.log10(mse / _shannon_mse(1.0))  # Cover & Thomas 2006, Thm 10.3.2
    _show("8-D, 256 entries: MSE", mse, "D(1) = 0.25")
    _show("8-D, 256 entries: gap to D(R) in dB", gap_db, "0 < gap < 1.5")
    assert 0.0 < gap_db < 1.5


# ------------------------------------------------------------ scikit-learn k-means
def _mixture(seed: int, *, k: int = 12, dim: int = 4, n: int = 3000, spread: float = 10.0) -> torch.Tensor:
    """``n`` points ``[n, dim]`` from ``k`` unit-variance Gaussians with centres ~ N(0, spread^2)."""
    g = torch.Generator().manual_seed(seed)
    centres = spread * torch.randn(k, dim, generator=g)
    labels = torch.randint(k, (n,), generator=g)
    return centres[labels] + torch.randn(n, dim, generator=g)


MIXTURE_SEEDS = (0, 1, 2, 3, 4)


@pytest.mark.parametrize("path", ["exact", "summary"])
@pytest.mark.parametrize("k", [12, 24])
def test_kmeans_init_matches_scikit_learn(k: int, path: str, monkeypatch: pytest.MonkeyPatch) -> None:
    # 12 components: k = 12 fails when a component is left without a code; k = 24 (two codes
    # per component) compares the quality of the local optimum each finds inside components.
    # "summary" forces the path large fits take (seeding on a k-means|| summary, then Lloyd
    # on all points); these 3000 points would otherwise be fitted exactly.
    if path == "summary":
        monkeypatch.setattr(rvqlayer.kmeans, "_SUMMARY_ABOVE", 0)
    fit_ratios, init_ratios = [], []
    for seed in MIXTURE_SEEDS:
        x = _mixture(seed, k=12)
        x64 = x.double().numpy()
        # Reference: scikit-learn KMeans (k-means++ seeding, Arthur & Vassilvitskii, SODA 2007),
        # best of 3 runs. inertia_ is the SUM of squared distances, so inertia_ / n is the
        # mean over points of the squared distance summed over dimensions.
        reference = KMeans(n_clusters=k, n_init=3, init="k-means++", random_state=seed).fit(x64)
        ref_mse = reference.inertia_ / x.shape[0]

        torch.manual_seed(seed)
        fit = fit_kmeans(x, k)
        fit_mse = _sq_error_per_point(x64, fit.centroids.double().numpy())
        assert fit.mse == pytest.approx(fit_mse, rel=1e-4)  # same convention as inertia_ / n

        # The Codebook's own initialisation on its first training batch (k-means, then one EMA step).
        torch.manual_seed(seed)
        cb = Codebook(k, x.shape[1]).train()
        cb(x)
        cb_mse = _sq_error_per_point(x64, cb.codewords.double().numpy())
        fit_ratios.append(fit_mse / ref_mse)
        init_ratios.append(cb_mse / ref_mse)
        _show(f"k={k}, mixture {seed}: fit_kmeans / KMeans", fit_ratios[-1], "mean over mixtures <= 1.05")
        _show(f"k={k}, mixture {seed}: Codebook init / KMeans", init_ratios[-1], "mean over mixtures <= 1.05")

    # Which local optimum a seeded run lands in varies. For k = 24 one run's ratio read 0.986-1.015
    # (up to 0.018 apart on one mixture over 5 torch seeds): a 5% bound leaves a margin of 0.035,
    # under 3 times that spread (rule in DEVELOPERS.md). So the bound applies to the mean over the five
    # mixtures: 0.998-1.004 over 5 sets of torch seeds, the same on 1 and 2 threads (to 1e-14).
    # For k = 12 every run found all components: ratio 1 to 1e-14 on every seed, so each is bounded.
    assert float(np.mean(fit_ratios)) <= 1.05, fit_ratios
    assert float(np.mean(init_ratios)) <= 1.05, init_ratios
    if k == 12:
        assert max(fit_ratios + init_ratios) <= 1.05, (fit_ratios, init_ratios)


# ------------------------------------------------------------ 2-D, uniform square
def test_square_codebook_second_moment_between_hexagon_and_square_lattice() -> None:
    entries = 256
    q = _train(
        MultiStageQuantizer(2, stages=1, entries=entries, ema_decay=0.9),
        _uniform(2),
        steps=1800,
        batch=4096,
        seed=60,
    )
    area = 1.0
    g = entries * _held_out_mse(q, _uniform(2), 1 << 18) / area  # normalised second moment
    _show("normalised second moment G, K=256", g, "0.080188 < G < 0.083333 (about 0.0815 for a good codebook)")
    # Hexagonal cells 5 / (36 sqrt 3) = 0.080188 are the best any 2-D quantizer can do
    # (D. J. Newman, "The hexagon theorem", IEEE Trans. Inf. Theory IT-28, 1982); the square
    # lattice gives 1/12 (J. H. Conway & N. J. A. Sloane, "Voronoi regions of lattices, second
    # moments of polytopes, and quantization", IEEE Trans. Inf. Theory IT-28(2), 1982).
    # A good 256-cell codebook on a square sits near 0.0815 because of its boundary.
    assert 5.0 / (36.0 * math.sqrt(3.0)) < g < 1.0 / 12.0


# -------------------------------------------------------------------------- bitrate
def test_bitrate_common_practice() -> None:
    # Common practice: 75 frames/s, 1024 entries (10 bits) per stage;
    # 2 stages give 1.5 kbit/s and 8 stages 6 kbit/s.
    q = MultiStageQuantizer(4, stages=8, entries=1024, init="random")
    assert q.bitrate(75.0, stages=2) == 1500.0
    assert q.bitrate(75.0) == 6000.0
    assert rvqlayer.bitrate(75.0, 2, 1024) == 1500.0
    assert rvqlayer.bitrate(75.0, 8, 1024) == 6000.0
