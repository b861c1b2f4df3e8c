"""Nearest-code search in bounded memory, and beam search over stages.

Distances are computed in float32 whatever the input dtype or autocast state.
"""

from __future__ import annotations

from typing import Literal

import torch

Metric = Literal["l2", "cosine"]


def _no_autocast(device: torch.device) -> torch.autocast:
    return torch.autocast(device_type=device.type, enabled=False)


def nearest_code(
    x: torch.Tensor,
    codewords: torch.Tensor,
    *,
    metric: Metric = "l2",
    chunk: int = 4096,
) -> tuple[torch.Tensor, torch.Tensor]:
    """Index of the nearest codeword for every row.

    Args:
        x: ``[n, d]`` vectors.
        codewords: ``[k, d]`` codewords.
        metric: ``"l2"`` (squared Euclidean) or ``"cosine"`` (largest cosine
            similarity; both sides normalised for the comparison only).
        chunk: rows per distance block; memory is ``chunk * k`` floats.

    Returns:
        ``codes`` int64 ``[n]`` and ``dist`` float32 ``[n]``: the squared
        distance for ``"l2"``, ``1 - cos`` for ``"cosine"``.

    >>> c = torch.tensor([[0.0], [1.0]])
    >>> nearest_code(torch.tensor([[0.2], [0.9]]), c)[0].tolist()
    [0, 1]
    """
    n = x.shape[0]
    with _no_autocast(x.device), torch.no_grad():
        c = codewords.detach().float()
        c_sq = None
        if metric == "cosine":
            c = torch.nn.functional.normalize(c, dim=-1)
        else:
            c_sq = (c * c).sum(-1)
        if torch.compiler.is_compiling():  # a traced graph takes every row in one block (shapes may be symbolic)
            return _nearest_block(x.detach().float(), c, c_sq)
        codes = torch.empty(n, dtype=torch.int64, device=x.device)
        dist = torch.empty(n, dtype=torch.float32, device=x.device)
        for start in range(0, n, chunk):
            idx, d = _nearest_block(x[start : start + chunk].detach().float(), c, c_sq)
            codes[start : start + chunk] = idx
            dist[start : start + chunk] = d
    return codes, dist


def _nearest_block(
    block: torch.Tensor, c: torch.Tensor, c_sq: torch.Tensor | None
) -> tuple[torch.Tensor, torch.Tensor]:
    """Codes and distances of one block; ``c_sq`` is None for cosine (``c`` then normalised)."""
    if c_sq is None:
        best, idx = (torch.nn.functional.normalize(block, dim=-1) @ c.T).max(-1)
        return idx, 1.0 - best
    best, idx = torch.addmm(c_sq, block, c.T, alpha=-2.0).min(-1)
    return idx, (best + (block * block).sum(-1)).clamp_min_(0.0)


def beam_encode(
    x: torch.Tensor,
    codebooks: list[torch.Tensor],
    *,
    beam: int,
    chunk: int = 4096,
) -> torch.Tensor:
    """Residual codes chosen by beam search over stages (least final squared error).

    Keeps the ``beam`` best partial paths per vector; at every stage each path
    is extended by every codeword and the ``beam`` paths with the smallest
    squared residual survive. ``beam=1`` is greedy encoding.

    Args:
        x: ``[n, d]`` vectors.
        codebooks: one ``[k_s, d]`` tensor per stage.
        beam: paths kept per vector (>= 1).
        chunk: candidate paths per block (``chunk // beam`` vectors); a block holds
            ``chunk * k`` candidate errors, and the peak is a few times that.

    Returns:
        int64 ``[n, len(codebooks)]``.
    """
    n, d = x.shape
    stages = len(codebooks)
    out = torch.empty(n, stages, dtype=torch.int64, device=x.device)
    with _no_autocast(x.device), torch.no_grad():
        books = [c.detach().float() for c in codebooks]
        books_sq = [(c * c).sum(-1) for c in books]
        rows = max(1, chunk // beam)
        for start in range(0, n, rows):
            res = x[start : start + rows].detach().float().unsqueeze(1)  # [b, 1, d]
            err = (res * res).sum(-1)  # [b, p]
            paths = torch.empty(res.shape[0], 1, 0, dtype=torch.int64, device=x.device)
            for c, c_sq in zip(books, books_sq):
                k = c.shape[0]
                # ||r - c||^2 = ||r||^2 - 2 r.c + ||c||^2 for every path and codeword: [b, p, k]
                cand = err.unsqueeze(-1) - 2.0 * (res @ c.T) + c_sq
                flat = cand.flatten(1)
                keep = min(beam, flat.shape[1])
                err, pick = flat.topk(keep, dim=1, largest=False)
                parent, code = pick // k, pick % k
                paths = torch.cat(
                    [paths.gather(1, parent.unsqueeze(-1).expand(-1, -1, paths.shape[-1])), code.unsqueeze(-1)],
                    dim=-1,
                )
                res = res.gather(1, parent.unsqueeze(-1).expand(-1, -1, d)) - c[code]
                err = (res * res).sum(-1)
            best = err.argmin(1)
            out[start : start + rows] = paths[torch.arange(paths.shape[0], device=x.device), best]
    return out
