"""Joint codebook refinement with the codes fixed (rvqlayer.refine and MultiStageQuantizer.refine)."""

import pytest
import torch

from rvqlayer import MultiStageQuantizer, RvqlayerError
from rvqlayer.ema import smoothed_codewords
from rvqlayer.refine import fit_codewords, reconstruction_error, refine_codebooks


def _design(codes, sizes):
    """Dense one-hot design matrix [n, sum k] of all stages' codes (the slow, obvious reference)."""
    cols = []
    for s, k in enumerate(sizes):
        cols.append(torch.nn.functional.one_hot(codes[:, s], k).double())
    return torch.cat(cols, 1)


def _problem(seed, n=300, d=3, sizes=(5, 4, 6)):
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(n, d, generator=g)
    codes = torch.stack([torch.randint(k, (n,), generator=g) for k in sizes], 1)
    books = [torch.randn(k, d, generator=g) for k in sizes]
    return x, codes, books


@pytest.mark.parametrize("method", ["joint", "alternating"])
def test_fit_reaches_the_dense_least_squares_optimum(method):
    x, codes, books = _problem(0)
    a = _design(codes, [5, 4, 6])
    best = torch.linalg.lstsq(a, x.double(), driver="gelsd").solution
    optimum = float(((a @ best - x.double()) ** 2).mean())
    fitted = fit_codewords(x, codes, books, method=method, sweeps=2000)
    got = reconstruction_error(x, codes, fitted)
    assert got == pytest.approx(optimum, rel=1e-5)
    # The reconstruction (a projection) is unique even though the codewords are not.
    torch.testing.assert_close(a @ torch.cat(fitted).double(), a @ best, atol=1e-4, rtol=0)


def test_joint_fit_in_small_chunks_equals_one_chunk():
    x, codes, books = _problem(1, n=1000)
    one = fit_codewords(x, codes, books, method="joint", chunk=10_000)
    many = fit_codewords(x, codes, books, method="joint", chunk=37)
    for a, b in zip(one, many):
        torch.testing.assert_close(a, b, atol=1e-5, rtol=1e-5)


def test_unused_codewords_stay_where_they_are():
    x, codes, books = _problem(2)
    codes[:, 0] = codes[:, 0].clamp_max(3)  # code 4 of stage 0 is never used
    for method in ("joint", "alternating"):
        fitted = fit_codewords(x, codes, books, method=method)
        torch.testing.assert_close(fitted[0][4], books[0][4])


def _perfect_toy():
    coarse = torch.tensor([[0.0, 0.0], [10.0, 0.0], [0.0, 10.0], [10.0, 10.0]])
    fine = torch.tensor([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])
    x = (coarse.unsqueeze(1) + fine.unsqueeze(0)).reshape(-1, 2).repeat(3, 1)
    return x, [coarse, fine]


def test_perfectly_fitted_codebooks_are_a_fixed_point():
    x, books = _perfect_toy()
    q = MultiStageQuantizer(2, stages=2, entries=4, init="random")
    encode = lambda v, b: q._encode_with(v, b, 1)  # noqa: E731
    codes = encode(x, books)
    assert reconstruction_error(x, codes, books) == 0.0
    for method in ("joint", "alternating"):
        fitted = fit_codewords(x, codes, books, method=method)
        for a, b in zip(fitted, books):
            torch.testing.assert_close(a, b, atol=1e-5, rtol=0)
    result = refine_codebooks(x, books, encode, rounds=3)
    assert result.errors == [0.0]
    for a, b in zip(result.codebooks, books):
        assert torch.equal(a, b)


@pytest.mark.parametrize("seed", range(3))
@pytest.mark.parametrize("beam", [1, 4])
def test_layer_refine_never_raises_the_error(seed, beam):
    torch.manual_seed(seed)
    q = MultiStageQuantizer(4, stages=3, entries=16, init_restarts=1)
    x = torch.randn(3000, 4) * torch.tensor([1.5, 1.0, 0.7, 0.3])
    for i in range(3):
        q(x[i * 1000 : (i + 1) * 1000])
    q.eval()
    before = float((q.decode(q.encode(x, beam=beam)) - x).pow(2).mean())
    errors = q.refine(x, rounds=4, beam=beam)
    after = float((q.decode(q.encode(x, beam=beam)) - x).pow(2).mean())
    assert errors[0] == pytest.approx(before, rel=1e-4)
    assert errors[-1] == pytest.approx(after, rel=1e-4)
    assert all(b < a for a, b in zip(errors, errors[1:]))
    assert after <= before


def test_layer_refine_keeps_ema_statistics_consistent():
    torch.manual_seed(0)
    q = MultiStageQuantizer(3, stages=2, entries=8, init_restarts=1)
    x = torch.randn(2000, 3)
    q(x[:500])
    totals = [float(cb.ema_count.sum()) for cb in q.codebooks]
    q.refine(x, rounds=2)
    codes = q.encode(x)
    for s, cb in enumerate(q.codebooks):
        torch.testing.assert_close(smoothed_codewords(cb.ema_count, cb.ema_sum, cb.eps), cb.codewords)
        usage = torch.bincount(codes[:, s], minlength=8).float()
        torch.testing.assert_close(cb.ema_count, usage * totals[s] / 2000)
        torch.testing.assert_close(cb.usage_count, cb.ema_count)  # what health reports
    # The next EMA step starts from the refined codewords (decay 0.99: a 1% step toward the batch),
    # not from stale sums that would pull them back to where they were.
    q.train()
    before = [cb.codewords.clone() for cb in q.codebooks]
    q(x[:500])
    for b, cb in zip(before, q.codebooks):
        assert float((cb.codewords - b).norm(dim=1).max()) < 0.02  # seeds 0-4, 1 and 2 threads: at most 0.002


def test_layer_refine_initialises_and_works_for_gradient_codebooks():
    torch.manual_seed(0)
    q = MultiStageQuantizer(3, stages=2, entries=8, update="gradient", code_dim=2)
    x = torch.randn(500, 3)
    errors = q.refine(x, rounds=2)
    assert all(bool(cb.initialised) for cb in q.codebooks)
    assert errors == sorted(errors, reverse=True)
    for cb in q.codebooks:
        assert torch.equal(cb.previous_codewords, cb.codewords.detach())


def test_layer_refine_rejects_bad_input_without_changing_state():
    torch.manual_seed(0)
    q = MultiStageQuantizer(3, stages=2, entries=8)
    q(torch.randn(100, 3))
    state = {k: v.clone() for k, v in q.state_dict().items()}
    for kwargs, arg in [
        (dict(data=torch.randn(10, 4)), "data"),
        (dict(data=torch.randn(10, 3), rounds=-1), "rounds"),
        (dict(data=torch.randn(10, 3), beam=0), "beam"),
        (dict(data=torch.randn(10, 3), method="exact"), "method"),
        (dict(data=torch.randn(0, 3)), "data"),
    ]:
        with pytest.raises(RvqlayerError, match=f"`{arg}`"):
            q.refine(**kwargs)
    for k, v in q.state_dict().items():
        assert torch.equal(v, state[k]), k
