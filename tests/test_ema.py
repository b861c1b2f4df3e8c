"""EMA codebook update: a worked example and the limits of the smoothing convention."""

import torch

from rvqlayer import Codebook
from rvqlayer.ema import assignment_stats, ema_step, smoothed_codewords


def _two_code_book(decay: float, eps: float = 1e-5) -> Codebook:
    cb = Codebook(2, 1, init="random", ema_decay=decay, eps=eps, reseed_below=0.0)
    cb.codewords.copy_(torch.tensor([[0.0], [10.0]]))
    cb.ema_count.copy_(torch.tensor([1.0, 1.0]))
    cb.ema_sum.copy_(torch.tensor([[0.0], [10.0]]))
    return cb


def test_worked_example_two_steps():
    # Hand computation with g = 0.5 (VQ-VAE appendix A.1 update, van den Oord et al. 2017):
    # step 1: x = 1, 2 -> code 0; 9 -> code 1: n = (2, 1), sum = (3, 9)
    #   N = 0.5*(1,1) + 0.5*(2,1) = (1.5, 1.0);  m = 0.5*(0,10) + 0.5*(3,9) = (1.5, 9.5);  e = (1.0, 9.5)
    # step 2: x = 0 -> code 0; 11 -> code 1: n = (1, 1), sum = (0, 11)
    #   N = (1.25, 1.0);  m = (0.75, 10.25);  e = (0.6, 10.25)
    cb = _two_code_book(0.5, eps=1e-9)
    cb.train()
    codes, _ = cb(torch.tensor([[1.0], [2.0], [9.0]]))
    assert codes.tolist() == [0, 0, 1]
    torch.testing.assert_close(cb.ema_count, torch.tensor([1.5, 1.0]))
    torch.testing.assert_close(cb.ema_sum, torch.tensor([[1.5], [9.5]]))
    torch.testing.assert_close(cb.codewords, torch.tensor([[1.0], [9.5]]))
    codes, _ = cb(torch.tensor([[0.0], [11.0]]))
    assert codes.tolist() == [0, 1]
    torch.testing.assert_close(cb.ema_count, torch.tensor([1.25, 1.0]))
    torch.testing.assert_close(cb.codewords, torch.tensor([[0.6], [10.25]]))
    assert int(cb.step) == 2


def test_smoothing_tends_to_paper_update():
    # The count smoothing is an implementation convention; as eps -> 0 it must give m / N exactly.
    torch.manual_seed(0)
    counts = torch.tensor([5.0, 0.5, 2.0, 0.01])
    sums = torch.randn(4, 3) * counts.unsqueeze(1)
    paper = sums / counts.unsqueeze(1)
    gaps = [float((smoothed_codewords(counts, sums, eps) - paper).abs().max()) for eps in (1e-1, 1e-3, 1e-5, 1e-7)]
    assert all(a > b for a, b in zip(gaps, gaps[1:]))
    assert gaps[-1] < 1e-4


def test_smoothing_keeps_unused_codes_finite():
    counts = torch.tensor([3.0, 0.0])
    sums = torch.tensor([[3.0], [0.0]])
    e = smoothed_codewords(counts, sums, 1e-5)
    assert torch.isfinite(e).all()


def test_count_from_zero_follows_closed_form():
    # With constant assignments and N_0 = 0, N_t = (1 - g^t) n (VQ-VAE EMA recursion, closed form).
    g, n = 0.9, torch.tensor([4.0, 1.0])
    counts, sums = torch.zeros(2), torch.zeros(2, 1)
    for t in range(1, 8):
        ema_step(counts, sums, n, n.unsqueeze(1), g)
        torch.testing.assert_close(counts, (1 - g**t) * n)


def test_assignment_stats_respects_weight():
    x = torch.tensor([[1.0], [2.0], [3.0]])
    codes = torch.tensor([0, 0, 1])
    counts, sums = assignment_stats(x, codes, torch.tensor([1.0, 0.0, 1.0]), 2)
    assert counts.tolist() == [1.0, 1.0]
    assert sums.squeeze(1).tolist() == [1.0, 3.0]


def test_assignment_stats_bool_weight_equals_float_weight():
    g = torch.Generator().manual_seed(3)
    x = torch.randn(200, 4, generator=g)
    codes = torch.randint(0, 7, (200,), generator=g)
    keep = torch.rand(200, generator=g) > 0.3
    c_bool, s_bool = assignment_stats(x, codes, keep, 7)
    c_float, s_float = assignment_stats(x, codes, keep.float(), 7)
    assert c_bool.shape == (7,) and s_bool.shape == (7, 4)
    torch.testing.assert_close(c_bool, c_float, rtol=0, atol=0)
    torch.testing.assert_close(s_bool, s_float)
