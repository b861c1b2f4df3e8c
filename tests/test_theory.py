"""Reverse water-filling bound and the rate-distortion audit.

Closed forms from Cover & Thomas, Elements of Information Theory, 2nd ed. 2006,
Thm 10.3.2 (D(R) = s2 2^(-2R) for one Gaussian component) and Thm 10.3.3
(reverse water-filling over independent components).
"""

import math

import numpy as np
import pytest
import torch

from rvqlayer import MultiStageQuantizer, RvqlayerError
from rvqlayer.theory import audit_table, covariance_eigenvalues, rate_distortion_audit, water_filling_distortion


@pytest.mark.parametrize("d,s2,bits", [(1, 1.0, 3.0), (8, 1.0, 32.0), (8, 2.5, 5.0), (16, 0.3, 100.0)])
def test_equal_eigenvalues_give_the_closed_form(d, s2, bits):
    # Equal eigenvalues s2: every component gets R/d bits, D/d = s2 2^(-2R/d) (C&T 2006, Thm 10.3.3).
    got = water_filling_distortion([s2] * d, bits)
    assert got == pytest.approx(s2 * 2.0 ** (-2.0 * bits / d), rel=1e-12)


def test_zero_rate_costs_the_whole_variance():
    assert water_filling_distortion([3.0, 1.0, 0.5], 0.0) == pytest.approx(1.5)


def test_a_zero_eigenvalue_costs_nothing_and_takes_no_bits():
    # [1, 1, 0]: the two unit components share R bits, theta = 2^(-R), D = 2 theta, per dim / 3.
    for bits in (0.5, 2.0, 7.0):
        got = water_filling_distortion(np.array([1.0, 0.0, 1.0]), bits)
        assert got == pytest.approx(2.0 * 2.0 ** (-bits) / 3.0, rel=1e-12)


def test_low_rate_leaves_small_components_without_bits():
    # [4, 1]: while theta = 4 * 2^(-2R) >= 1 (R <= 1) the small component gets nothing:
    # D = (theta + 1) / 2 (C&T 2006, Thm 10.3.3).
    for bits in (0.25, 0.5, 1.0):
        theta = 4.0 * 2.0 ** (-2.0 * bits)
        assert water_filling_distortion([4.0, 1.0], bits) == pytest.approx((theta + 1.0) / 2.0, rel=1e-12)
    # Above 1 bit both are active: theta^2 = 4 * 2^(-2R), D = theta.
    for bits in (1.5, 4.0):
        theta = math.sqrt(4.0 * 2.0 ** (-2.0 * bits))
        assert water_filling_distortion([4.0, 1.0], bits) == pytest.approx(theta, rel=1e-12)


def test_bound_matches_a_bisection_on_theta():
    # An independent solution: bisection on theta of sum max(0, 1/2 log2(l / theta)) = R.
    rng = np.random.default_rng(0)
    for _ in range(20):
        lam = rng.exponential(size=int(rng.integers(1, 12))) ** 2
        lam[rng.random(lam.size) < 0.2] = 0.0
        bits = float(rng.uniform(0.0, 20.0))
        lo, hi = 1e-300, float(lam.max()) if lam.max() > 0 else 1.0
        for _ in range(2000):
            mid = math.sqrt(lo * hi)
            rate = sum(0.5 * math.log2(v / mid) for v in lam if v > mid)
            lo, hi = (mid, hi) if rate > bits else (lo, mid)
        expected = float(np.minimum(hi, lam).sum() / lam.size)
        if lam.max() == 0:
            expected = 0.0
        assert water_filling_distortion(torch.tensor(lam), bits) == pytest.approx(expected, rel=1e-9, abs=1e-300)


def test_more_bits_never_cost_more():
    lam = [5.0, 2.0, 0.5, 0.1, 0.0]
    values = [water_filling_distortion(lam, b) for b in np.linspace(0.0, 30.0, 61)]
    assert all(b <= a for a, b in zip(values, values[1:]))


@pytest.mark.parametrize(
    "eigenvalues,bits",
    [([], 1.0), ([[1.0]], 1.0), ([1.0, -0.5], 1.0), ([1.0, float("nan")], 1.0), ([1.0], -1.0), ([1.0], "2")],
)
def test_bad_input_is_named(eigenvalues, bits):
    with pytest.raises(RvqlayerError, match="eigenvalues|bits_per_vector"):
        water_filling_distortion(eigenvalues, bits)


def test_covariance_eigenvalues_in_chunks_match_numpy():
    x = torch.randn(1000, 5, dtype=torch.float64) @ torch.randn(5, 5, dtype=torch.float64) + 3.0
    expected = np.sort(np.linalg.eigvalsh(np.cov(x.numpy().T, bias=True)))[::-1]
    np.testing.assert_allclose(covariance_eigenvalues(x, chunk=77).numpy(), expected, rtol=1e-9, atol=1e-12)


def test_audit_reports_the_layer_error_beside_the_bound():
    torch.manual_seed(0)
    q = MultiStageQuantizer(4, stages=3, entries=16)
    x = torch.randn(2048, 4) * torch.tensor([2.0, 1.0, 0.5, 0.1])
    q(x)
    q.eval()
    rows = rate_distortion_audit(q, x, chunk=500)
    assert [r.stages for r in rows] == [1, 2, 3]
    lam = covariance_eigenvalues(x)
    for r in rows:
        codes = q.encode(x, stages=r.stages)
        mse = float((q.decode(codes) - x).double().pow(2).mean())
        assert r.mse == pytest.approx(mse, rel=1e-5)
        assert r.bits_per_vector == 4.0 * r.stages
        assert r.bound_mse == pytest.approx(water_filling_distortion(lam, r.bits_per_vector))
        assert r.gap_db == pytest.approx(10 * math.log10(r.mse / r.bound_mse))
    beam_rows = rate_distortion_audit(q, x, beam=4, stage_counts=[3])
    assert beam_rows[0].mse == pytest.approx(
        float((q.decode(q.encode(x, beam=4)) - x).double().pow(2).mean()), rel=1e-5
    )
    assert "gap dB" in audit_table(rows)
    assert not q.training


def test_audit_handles_a_channel_axis_and_restores_training_mode():
    torch.manual_seed(0)
    q = MultiStageQuantizer(3, stages=2, entries=8, axis=1)
    x = torch.randn(512, 3)
    q(x.T.unsqueeze(0))
    q.train()
    rows = rate_distortion_audit(q, x)
    assert q.training
    codes = q.encode(x.T.unsqueeze(0))
    mse = float((q.decode(codes)[0].T - x).double().pow(2).mean())
    assert rows[-1].mse == pytest.approx(mse, rel=1e-5)


def test_audit_rejects_bad_data():
    q = MultiStageQuantizer(3, stages=2, entries=8)
    with pytest.raises(RvqlayerError, match="`data`"):
        rate_distortion_audit(q, torch.randn(10, 4))
    with pytest.raises(RvqlayerError, match="`data`"):
        rate_distortion_audit(q, torch.full((10, 3), float("nan")))
    with pytest.raises(RvqlayerError, match="`stage_counts`"):
        rate_distortion_audit(q, torch.randn(10, 3), stage_counts=[3])
