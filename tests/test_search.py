"""Nearest-code and beam search against obviously correct references."""

import itertools

import numpy as np
import pytest
import torch

from rvqlayer import MultiStageQuantizer, beam_encode, greedy_encode, nearest_code


def _brute_l2(x: np.ndarray, c: np.ndarray) -> np.ndarray:
    return np.array([int(np.argmin([((row - cw) ** 2).sum() for cw in c])) for row in x])


@pytest.mark.parametrize("chunk", [1, 7, 4096])
def test_l2_matches_loop(chunk):
    g = torch.Generator().manual_seed(1)
    x = torch.randn(53, 5, generator=g, dtype=torch.float64)
    c = torch.randn(11, 5, generator=g, dtype=torch.float64)
    codes, dist = nearest_code(x, c, chunk=chunk)
    ref = _brute_l2(x.numpy(), c.numpy())
    assert codes.tolist() == ref.tolist()
    torch.testing.assert_close(dist, ((x - c[codes]) ** 2).sum(-1).float(), rtol=1e-5, atol=1e-5)


def test_cosine_matches_loop():
    g = torch.Generator().manual_seed(2)
    x = torch.randn(40, 4, generator=g)
    c = torch.randn(9, 4, generator=g) * torch.rand(9, 1, generator=g) * 5
    codes, dist = nearest_code(x, c, metric="cosine")
    xn = x / x.norm(dim=1, keepdim=True)
    cn = c / c.norm(dim=1, keepdim=True)
    ref = (xn @ cn.T).argmax(1)
    assert codes.tolist() == ref.tolist()
    torch.testing.assert_close(dist, 1 - (xn * cn[codes]).sum(1), rtol=1e-5, atol=1e-5)


def test_distances_stay_float32_under_autocast():
    # Two codewords closer than bf16 resolution around 1.0 (spacing 2^-7): a bf16 matmul would tie them.
    c = torch.tensor([[1.0, 0.0], [1.003, 0.0]])
    x = torch.tensor([[1.0025, 0.0], [1.0004, 0.0]])
    plain, _ = nearest_code(x, c)
    with torch.autocast("cpu", dtype=torch.bfloat16):
        mixed, dist = nearest_code(x, c)
    assert plain.tolist() == [1, 0]
    assert mixed.tolist() == plain.tolist()
    assert dist.dtype == torch.float32


def _exhaustive(x, books):
    best = None
    for combo in itertools.product(*[range(b.shape[0]) for b in books]):
        err = ((x - sum(b[i] for b, i in zip(books, combo))) ** 2).sum()
        if best is None or err < best[0]:
            best = (float(err), list(combo))
    return best


def _greedy(x, books):
    codes = []
    r = x.clone()
    for b in books:
        i = int(((r - b) ** 2).sum(-1).argmin())
        codes.append(i)
        r = r - b[i]
    return codes


def test_beam_one_is_greedy_and_full_beam_is_exhaustive():
    g = torch.Generator().manual_seed(3)
    books = [torch.randn(4, 3, generator=g) * s for s in (1.0, 0.6, 0.3)]
    x = torch.randn(25, 3, generator=g, dtype=torch.float32)
    greedy = beam_encode(x, books, beam=1)
    full = beam_encode(x, books, beam=64, chunk=5)
    for i in range(x.shape[0]):
        assert greedy[i].tolist() == _greedy(x[i], books)
        err, _ = _exhaustive(x[i], books)
        got = float(((x[i] - sum(b[c] for b, c in zip(books, full[i].tolist()))) ** 2).sum())
        assert got == pytest.approx(err, rel=1e-5, abs=1e-6)


def test_beam_never_worse_than_greedy_on_average():
    g = torch.Generator().manual_seed(4)
    books = [torch.randn(16, 6, generator=g) * s for s in (1.0, 0.7, 0.5, 0.35)]
    x = torch.randn(500, 6, generator=g)

    def err(codes):
        return float(((x - sum(b[codes[:, k]] for k, b in enumerate(books))) ** 2).sum(-1).mean())

    e1, e4 = err(beam_encode(x, books, beam=1)), err(beam_encode(x, books, beam=4))
    assert e4 < e1


def _offset_data(offset: float, seed: int, n: int = 3000, k: int = 64, d: int = 8):
    """Float32 data and codewords around ``offset`` with unit spread (the codebook fits the data)."""
    g = torch.Generator().manual_seed(seed)
    x = (torch.randn(n, d, generator=g, dtype=torch.float64) + offset).float()
    c = (torch.randn(k, d, generator=g, dtype=torch.float64) + offset).float()
    return x, c


@pytest.mark.parametrize("offset", [1e3, 1e4])
def test_l2_far_from_origin_matches_float64(offset):
    # Issue 8: the plain expansion ||x||^2 - 2 x.c + ||c||^2 cancels in float32 here
    # (64% of codes wrong at 1e3); distances relative to the codebook mean do not.
    x, c = _offset_data(offset, seed=5)
    codes, dist = nearest_code(x, c, chunk=1000)
    true = torch.cdist(x.double(), c.double()) ** 2
    best = true.min(1).values
    chosen = true.gather(1, codes.unsqueeze(1)).squeeze(1)
    assert float((chosen - best).max()) <= 1e-4 * (1 + float(best.max()))
    assert float((codes == true.argmin(1)).double().mean()) >= 0.999
    torch.testing.assert_close(dist.double(), chosen, rtol=1e-4, atol=1e-4)


def _greedy64(x: torch.Tensor, books: list[torch.Tensor], metric: str) -> torch.Tensor:
    """Greedy residual codes in float64, one stage at a time (the obvious loop over stages)."""
    r = x.double()
    out = []
    for b in books:
        b = b.double()
        if metric == "cosine":
            idx = (torch.nn.functional.normalize(r, dim=1) @ torch.nn.functional.normalize(b, dim=1).T).argmax(1)
        else:
            idx = torch.cdist(r, b).argmin(1)
        out.append(idx)
        r = r - b[idx]
    return torch.stack(out, 1)


# Cosine only at the origin: far from it every vector points the same way and
# float32 cannot tell the angles apart (a property of the data, not the search).
@pytest.mark.parametrize(("metric", "offset"), [("l2", 0.0), ("l2", 1e3), ("l2", 1e4), ("cosine", 0.0)])
def test_greedy_and_beam_one_match_float64_greedy(metric, offset):
    x, first = _offset_data(offset, seed=6, n=800, k=32, d=6)
    g = torch.Generator().manual_seed(7)
    books = [first] + [torch.randn(16, 6, generator=g) * s for s in (0.8, 0.5)]
    ref = _greedy64(x, books, metric)
    greedy = greedy_encode(x, books, metric=metric, chunk=300)
    beam1 = beam_encode(x, books, beam=1, metric=metric, chunk=300)
    assert float((greedy == ref).all(1).double().mean()) >= 0.995
    assert torch.equal(beam1, greedy)


def _exhaustive_cosine(x, books):
    best = None
    for combo in itertools.product(*[range(b.shape[0]) for b in books]):
        r, total = x.double(), 0.0
        for b, i in zip(books, combo):
            total += 1.0 - float(torch.nn.functional.cosine_similarity(r, b[i].double(), dim=0))
            r = r - b[i].double()
        if best is None or total < best[0] - 1e-12:
            best = (total, list(combo))
    return best


def test_cosine_beam_minimises_summed_angle_distance():
    g = torch.Generator().manual_seed(8)
    books = [torch.randn(4, 3, generator=g) * s for s in (1.0, 0.6, 0.3)]
    x = torch.randn(20, 3, generator=g)
    full = beam_encode(x, books, beam=64, metric="cosine", chunk=7)
    for i in range(x.shape[0]):
        want, _ = _exhaustive_cosine(x[i], books)
        got, r = 0.0, x[i].double()
        for b, c in zip(books, full[i].tolist()):
            got += 1.0 - float(torch.nn.functional.cosine_similarity(r, b[c].double(), dim=0))
            r = r - b[c].double()
        assert got == pytest.approx(want, rel=1e-5, abs=1e-6)


def test_beam_far_from_origin_is_exhaustive():
    x, first = _offset_data(1e4, seed=9, n=30, k=4, d=3)
    g = torch.Generator().manual_seed(10)
    books = [first] + [torch.randn(4, 3, generator=g) * s for s in (0.6, 0.3)]
    full = beam_encode(x, books, beam=64, chunk=5)
    for i in range(x.shape[0]):
        err, _ = _exhaustive(x[i].double(), [b.double() for b in books])
        got = float(((x[i].double() - sum(b[c].double() for b, c in zip(books, full[i].tolist()))) ** 2).sum())
        assert got == pytest.approx(err, rel=1e-4, abs=1e-4)


def test_greedy_encode_empty_and_single_stage():
    c = torch.randn(5, 3)
    assert greedy_encode(torch.empty(0, 3), [c]).shape == (0, 1)
    x = torch.randn(9, 3)
    assert torch.equal(greedy_encode(x, [c])[:, 0], nearest_code(x, c)[0])


def test_cosine_layer_beam_search_uses_cosine():
    # Issue 8: encode(beam > 1) searched by L2 in a cosine layer.
    torch.manual_seed(11)
    q = MultiStageQuantizer(3, stages=2, entries=4, metric="cosine", init="random").eval()
    x = torch.randn(20, 3)
    books = [cb.codewords for cb in q.codebooks]
    full = q.encode(x, beam=16)
    for i in range(x.shape[0]):
        want, combo = _exhaustive_cosine(x[i], books)
        assert full[i].tolist() == combo
