"""Nearest-code and beam search against obviously correct references."""

import itertools

import numpy as np
import pytest
import torch

from rvqlayer import beam_encode, nearest_code


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
