"""Joint refinement of all stages' codewords: least squares with the codes fixed, then re-encoding.

A residual quantizer trained stage by stage fits each codebook to the residual
the earlier stages left, never to the final error. With the codes of every
vector fixed, the reconstruction ``sum_s C_s[c_s]`` is linear in all the
codewords at once, so the codewords that minimise the total squared error
solve one least-squares problem (the joint codebook update of additive
quantization; Babenko & Lempitsky, CVPR 2014). Re-encoding with the new
codewords and fitting again gives a few rounds of alternating minimisation;
a round is kept only when it lowers the error of the encoder that will
actually be used.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Literal

import torch

from ._checks import check_choice, check_int, fail

FitMethod = Literal["auto", "joint", "alternating"]
Encoder = Callable[[torch.Tensor, list[torch.Tensor]], torch.Tensor]

JOINT_LIMIT = 2048  # "auto" solves jointly up to this many codewords in all (a 2048^2 float64 matrix is 32 MiB)


@dataclass
class RefineResult:
    """What :func:`refine_codebooks` returns.

    Attributes:
        codebooks: the refined codewords, one float32 ``[k_s, d]`` tensor per stage.
        codes: int64 ``[n, stages]``, the encoder's codes for the refined codewords.
        errors: mean squared error per element before refinement, then after
            each kept round (never increasing).
    """

    codebooks: list[torch.Tensor]
    codes: torch.Tensor
    errors: list[float]


def reconstruction_error(
    x: torch.Tensor, codes: torch.Tensor, codebooks: Sequence[torch.Tensor], chunk: int = 65536
) -> float:
    """Mean squared error per element of ``x`` ``[n, d]`` against ``sum_s codebooks[s][codes[:, s]]`` (float64 sum)."""
    total = 0.0
    for start in range(0, x.shape[0], chunk):
        block = x[start : start + chunk].double()
        for s, c in enumerate(codebooks):
            block = block - c.double()[codes[start : start + chunk, s]]
        total += float((block * block).sum())
    return total / max(x.numel(), 1)


def fit_codewords(
    x: torch.Tensor,
    codes: torch.Tensor,
    codebooks: Sequence[torch.Tensor],
    *,
    method: FitMethod = "auto",
    chunk: int = 65536,
    ridge: float = 1e-6,
    sweeps: int = 50,
) -> list[torch.Tensor]:
    """Codewords of all stages that minimise ``sum_n ||x_n - sum_s C_s[codes[n, s]]||^2`` for fixed codes.

    Args:
        x: ``[n, d]`` vectors.
        codes: int64 ``[n, stages]`` with ``0 <= codes[:, s] < k_s``.
        codebooks: current codewords, one ``[k_s, d]`` per stage; a codeword
            no vector uses, and the directions the error cannot see (moving
            every codeword of one stage by ``v`` and of another by ``-v``),
            stay where they are.
        method: ``"joint"`` solves the normal equations of all stages at
            once: with ``A`` the one-hot design of all stages' codes,
            ``(A^T A + r I) C = A^T x + r C_0``, where ``A^T A`` holds the
            counts of co-occurring code pairs, accumulated over row blocks of
            ``chunk`` (memory a few times ``(sum k_s)^2`` float64 whatever
            ``n``), and
            ``r = ridge * (mean count)`` keeps the system positive definite.
            ``"alternating"`` re-fits one stage at a time to what the other
            stages leave (each step the exact minimiser for that stage) until
            the error stops falling or after ``sweeps`` sweeps; memory
            ``n * d`` float64. ``"auto"``: joint up to 2048 codewords in all.
        chunk: rows per block.
        ridge: see ``"joint"``.
        sweeps: most sweeps of ``"alternating"``.

    Returns:
        float32 codewords, one ``[k_s, d]`` per stage.
    """
    check_choice("method", method, ("auto", "joint", "alternating"))
    sizes = [int(c.shape[0]) for c in codebooks]
    if method == "auto":
        method = "joint" if sum(sizes) <= JOINT_LIMIT else "alternating"
    if method == "joint":
        return _fit_joint(x, codes, codebooks, chunk=chunk, ridge=ridge)
    return _fit_alternating(x, codes, codebooks, sweeps=sweeps)


def _fit_joint(
    x: torch.Tensor, codes: torch.Tensor, codebooks: Sequence[torch.Tensor], *, chunk: int, ridge: float
) -> list[torch.Tensor]:
    sizes = [int(c.shape[0]) for c in codebooks]
    offsets = torch.tensor([0, *sizes[:-1]], device=x.device).cumsum(0)
    m, d = sum(sizes), x.shape[1]
    gram = torch.zeros(m * m, dtype=torch.float64, device=x.device)
    rhs = torch.zeros(m, d, dtype=torch.float64, device=x.device)
    for start in range(0, x.shape[0], chunk):
        idx = codes[start : start + chunk] + offsets  # [b, stages]: column of each stage's code in A
        block = x[start : start + chunk].double()
        ones = torch.ones(idx.numel(), dtype=torch.float64, device=x.device)
        for s in range(idx.shape[1]):  # row idx[:, s] of A^T A gains one at every code the vector uses
            gram.index_add_(0, (idx[:, s : s + 1] * m + idx).reshape(-1), ones)
            rhs.index_add_(0, idx[:, s], block)
    gram = gram.view(m, m)
    start_books = torch.cat([c.detach().double() for c in codebooks])
    diag = gram.diagonal()
    used = diag > 0
    r = ridge * (float(diag[used].mean()) if bool(used.any()) else 1.0)
    system = gram + r * torch.eye(m, dtype=torch.float64, device=x.device)
    factor = torch.linalg.cholesky(system)
    solved = torch.cholesky_solve(rhs + r * start_books, factor)
    solved = torch.where(used.unsqueeze(1), solved, start_books)
    return [part.float() for part in solved.split(sizes)]


def _fit_alternating(
    x: torch.Tensor, codes: torch.Tensor, codebooks: Sequence[torch.Tensor], *, sweeps: int
) -> list[torch.Tensor]:
    books = [c.detach().double().clone() for c in codebooks]
    residual = x.double().clone()
    for s, c in enumerate(books):
        residual -= c[codes[:, s]]
    error = float((residual * residual).sum())
    for _ in range(sweeps):
        for s, c in enumerate(books):
            target = residual + c[codes[:, s]]
            counts = torch.zeros(c.shape[0], dtype=torch.float64, device=x.device)
            counts.index_add_(0, codes[:, s], torch.ones_like(codes[:, s], dtype=torch.float64))
            sums = torch.zeros_like(c).index_add_(0, codes[:, s], target)
            used = counts > 0
            c[used] = sums[used] / counts[used].unsqueeze(1)
            residual = target - c[codes[:, s]]
        new_error = float((residual * residual).sum())
        if new_error >= error * (1.0 - 1e-9):
            break
        error = new_error
    return [c.float() for c in books]


def refine_codebooks(
    x: torch.Tensor,
    codebooks: Sequence[torch.Tensor],
    encode: Encoder,
    *,
    rounds: int = 3,
    method: FitMethod = "auto",
    chunk: int = 65536,
) -> RefineResult:
    """Rounds of joint least-squares codewords (codes fixed) and re-encoding; never raises the error.

    Args:
        x: ``[n, d]`` training vectors.
        codebooks: starting codewords, one ``[k_s, d]`` per stage.
        encode: ``encode(x, codebooks) -> codes`` int64 ``[n, stages]``: the
            encoder whose error counts (greedy, or beam search).
        rounds: at most this many fit-and-re-encode rounds; a round that
            does not lower the error of ``encode`` is dropped and ends the
            refinement.
        method, chunk: see :func:`fit_codewords`.
    """
    check_int("rounds", rounds, 0)
    check_int("chunk", chunk, 1)
    if x.ndim != 2 or any(c.ndim != 2 or c.shape[1] != x.shape[1] for c in codebooks):
        raise fail("x", "[n, d] with codebooks of shape [k, d]", f"shape {tuple(x.shape)}")
    books = [c.detach().float().clone() for c in codebooks]
    codes = encode(x, books)
    errors = [reconstruction_error(x, codes, books, chunk)]
    for _ in range(rounds):
        fitted = fit_codewords(x, codes, books, method=method, chunk=chunk)
        new_codes = encode(x, fitted)
        new_error = reconstruction_error(x, new_codes, fitted, chunk)
        if not new_error < errors[-1]:
            break
        books, codes = fitted, new_codes
        errors.append(new_error)
    return RefineResult(codebooks=books, codes=codes, errors=errors)
