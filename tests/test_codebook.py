"""One stage: initialisation, reseeding, gradient mode, eval."""

import pytest
import torch

from rvqlayer import Codebook, RvqlayerError


def test_kmeans_init_happens_once_and_is_in_state_dict():
    torch.manual_seed(0)
    cb = Codebook(8, 2)
    assert not bool(cb.initialised)
    cb(torch.randn(300, 2))
    assert bool(cb.initialised)
    first = cb.codewords.clone()
    cb(torch.randn(300, 2) + 50)  # far away data: an EMA step, not a new k-means fit
    moved = (cb.codewords - first).norm(dim=1) > 1e-4
    assert int(moved.sum()) == 1  # a k-means refit would have moved every codeword
    assert "initialised" in cb.state_dict()


def test_random_init_is_data_independent_and_seeded():
    torch.manual_seed(5)
    a = Codebook(16, 3, init="random")
    torch.manual_seed(5)
    b = Codebook(16, 3, init="random")
    assert torch.equal(a.codewords, b.codewords)
    assert bool(a.initialised)


def test_dead_code_moves_onto_batch_vector():
    torch.manual_seed(1)
    cb = Codebook(4, 2, init="random", reseed_below=0.5)
    cb.codewords.copy_(torch.tensor([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [100.0, 100.0]]))
    cb.ema_sum.copy_(cb.codewords * 1.0)
    cb.ema_count.copy_(torch.tensor([1.0, 1.0, 1.0, 0.0]))  # code 3 is dead
    x = torch.rand(64, 2)
    cb(x)
    assert int(cb.reseeds) == 1
    moved = cb.codewords[3]
    assert float(torch.cdist(moved.unsqueeze(0), x).min()) < 0.1  # onto a batch vector, small jitter
    assert float(cb.ema_count[3]) > 0


def test_no_reseed_when_off():
    cb = Codebook(4, 2, init="random", reseed_below=0.0)
    cb.ema_count.copy_(torch.tensor([1.0, 1.0, 1.0, 0.0]))
    cb(torch.rand(64, 2))
    assert int(cb.reseeds) == 0


def test_requested_reseed_applies_once():
    torch.manual_seed(2)
    cb = Codebook(8, 2, init="random", reseed_below=0.0)
    cb.codewords.copy_(torch.zeros(8, 2))  # collapsed: every vector picks code 0
    cb.ema_sum.zero_()
    cb.ema_count.copy_(torch.tensor([8.0] + [0.0] * 7))
    x = torch.rand(256, 2)
    for _ in range(3):
        cb(x)
    assert int(cb.reseeds) == 0
    cb.request_reseed(0.5)
    cb(x)
    assert int(cb.reseeds) == 7
    cb(x)
    assert int(cb.reseeds) == 7


def test_gradient_mode_has_parameters_and_learns():
    torch.manual_seed(3)
    cb = Codebook(8, 2, update="gradient", init="random")
    assert [n for n, _ in cb.named_parameters()] == ["codewords"]
    assert "ema_sum" not in cb.state_dict()
    x = torch.randn(128, 2)
    codes, q = cb(x)
    loss = ((x - q) ** 2).sum(-1).mean()
    loss.backward()
    expected = torch.zeros(8, 2).index_add_(0, codes, 2 * (q - x).detach() / x.shape[0])
    torch.testing.assert_close(cb.codewords.grad, expected)


def test_eval_changes_nothing_even_uninitialised():
    torch.manual_seed(4)
    cb = Codebook(8, 3).eval()
    before = {k: v.clone() for k, v in cb.state_dict().items()}
    cb(torch.randn(50, 3))
    after = cb.state_dict()
    assert all(torch.equal(before[k], after[k]) for k in before)


def test_rejects_bad_options_and_shapes():
    with pytest.raises(RvqlayerError, match="`entries`"):
        Codebook(0, 2)
    with pytest.raises(RvqlayerError, match="`update`"):
        Codebook(4, 2, update="sgd")
    with pytest.raises(RvqlayerError, match="`x`"):
        Codebook(4, 2)(torch.randn(3, 5))
    with pytest.raises(RvqlayerError, match="`codes`"):
        Codebook(4, 2).lookup(torch.tensor([4]))
