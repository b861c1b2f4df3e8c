"""Nearest-code search in bounded memory, greedy and beam search over stages.

Distances are computed in float32 whatever the input dtype or autocast state.

Squared distances use the expansion ``||x - c||^2 = ||x||^2 - 2 x.c + ||c||^2``
(one matrix product per block), but relative to a centre ``m``, the mean of
the codewords: ``x - m`` and ``c - m`` replace ``x`` and ``c``. The distance
is the same in exact arithmetic; in float32 it stops the expansion from
cancelling when data and codewords sit far from the origin (at an offset of
1e3 the plain expansion picked the wrong code for most vectors).

For ``metric="cosine"`` the search compares angles; a multi-stage (residual)
encoding still subtracts the chosen codeword itself (not its unit vector)
from the residual, as the layer does in training.
"""

from __future__ import annotations

from typing import Literal

import torch
from einops import rearrange, repeat

Metric = Literal["l2", "cosine"]


def _no_autocast(device: torch.device) -> torch.autocast:
    return torch.autocast(device_type=device.type, enabled=False)


# Distance blocks hold at most this many floats (4 MiB), so the pass that finds each
# row's minimum reads the block from cache: measured here, encode at 16384 x 128,
# 8 stages, 1024 entries ran 1.23-1.26 x the limit with 256-2048 rows per block
# against 1.37 x with 4096.
_BLOCK_FLOATS = 2**20


def _block_rows(chunk: int, entries: int) -> int:
    """Rows per distance block: at most ``chunk``, and at most ``_BLOCK_FLOATS / entries``."""
    return max(1, min(chunk, _BLOCK_FLOATS // max(entries, 1)))


class _Table:
    """One stage's codewords prepared for search (float32, no gradient).

    ``l2``: ``centre`` ``[d]`` and ``folded`` ``[d + 1, k]``: rows ``0..d-1`` hold
    ``-2 (c - centre)`` transposed, row ``d`` holds ``||c - centre||^2``. A block
    ``(x - centre)`` with a column of ones appended, times ``folded``, is
    ``||x - c||^2 - ||x - centre||^2`` in one matrix product (no separate pass to
    add the codeword norms). ``cosine``: ``folded`` holds the unit codewords
    transposed ``[d, k]``.
    """

    def __init__(self, codewords: torch.Tensor, metric: Metric) -> None:
        self.metric = metric
        self.codewords = codewords.detach().float()
        self.entries, self.dim = self.codewords.shape
        if metric == "cosine":
            self.centre = None
            self.folded = torch.nn.functional.normalize(self.codewords, dim=-1).T.contiguous()
        else:
            self.centre = self.codewords.mean(0)
            moved = self.codewords - self.centre
            self.folded = torch.cat([(moved * -2.0).T, (moved * moved).sum(-1).unsqueeze(0)]).contiguous()

    def scores(self, block: torch.Tensor, out: torch.Tensor | None = None) -> torch.Tensor:
        """``[b, k]`` scores to minimise for ``block`` ``[b, d]`` (l2: already centred).

        ``l2``: squared distance minus ``||block||^2``; ``cosine``: minus the
        cosine similarity (``block`` is normalised here).
        """
        if self.metric == "cosine":
            unit = torch.nn.functional.normalize(block, dim=-1)
            return torch.mm(unit, self.folded, out=out).neg_()
        return torch.addmm(self.folded[self.dim], block, self.folded[: self.dim], out=out)

    def scores_folded(self, block: torch.Tensor, out: torch.Tensor) -> torch.Tensor:
        """Like :meth:`scores` for ``block`` ``[b, d + 1]`` whose last column is ones (l2 only)."""
        return torch.mm(block, self.folded, out=out)


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
        chunk: rows per distance block at most (fewer when ``chunk * k`` exceeds
            2**20 floats); memory is at most ``chunk * k`` floats.

    Returns:
        ``codes`` int64 ``[n]`` and ``dist`` float32 ``[n]``: the squared
        distance for ``"l2"``, ``1 - cos`` for ``"cosine"``.

    >>> c = torch.tensor([[0.0], [1.0]])
    >>> nearest_code(torch.tensor([[0.2], [0.9]]), c)[0].tolist()
    [0, 1]
    """
    n = x.shape[0]
    with _no_autocast(x.device), torch.no_grad():
        table = _Table(codewords, metric)
        if torch.compiler.is_compiling():  # a traced graph takes every row in one block (shapes may be symbolic)
            return _nearest_traced(x.detach().float(), table)
        codes = torch.empty(n, dtype=torch.int64, device=x.device)
        dist = torch.empty(n, dtype=torch.float32, device=x.device)
        chunk = _block_rows(chunk, table.entries)
        buffer = torch.empty(min(chunk, n), table.entries, device=x.device)
        if table.centre is not None:
            moved = torch.ones(min(chunk, n), table.dim + 1, device=x.device)  # last column stays 1
        for start in range(0, n, chunk):
            block = x[start : start + chunk].detach()
            rows = block.shape[0]
            if table.centre is not None:
                centred = moved[:rows, : table.dim]
                torch.sub(block.float(), table.centre, out=centred)
                best, idx = table.scores_folded(moved[:rows], out=buffer[:rows]).min(-1)
                dist[start : start + rows] = best.add_(torch.einsum("nd,nd->n", centred, centred)).clamp_min_(0.0)
            else:
                best, idx = table.scores(block.float(), out=buffer[:rows]).min(-1)
                dist[start : start + rows] = best.add_(1.0)
            codes[start : start + rows] = idx
    return codes, dist


def _nearest_traced(x: torch.Tensor, table: _Table) -> tuple[torch.Tensor, torch.Tensor]:
    """Codes and distances of all rows in one block, without preallocated outputs (for tracing)."""
    if table.centre is None:
        best, idx = table.scores(x).min(-1)
        return idx, best + 1.0
    moved = x - table.centre
    best, idx = table.scores(moved).min(-1)
    return idx, (best + (moved * moved).sum(-1)).clamp_min(0.0)


def greedy_encode(
    x: torch.Tensor,
    codebooks: list[torch.Tensor],
    *,
    metric: Metric = "l2",
    chunk: int = 4096,
) -> torch.Tensor:
    """Residual codes chosen stage by stage (each stage's nearest codeword).

    Stage ``s`` picks the codeword nearest (by ``metric``) to what stages
    ``1..s-1`` left, then subtracts that codeword. Rows are processed in
    blocks of ``chunk`` through every stage, so the extra memory is about
    ``chunk * (k + 2 d)`` floats besides the ``[n, stages]`` codes.

    Args:
        x: ``[n, d]`` vectors.
        codebooks: one ``[k_s, d]`` tensor per stage.
        metric: ``"l2"`` or ``"cosine"``.
        chunk: rows per block at most (fewer when ``chunk * k`` exceeds 2**20 floats).

    Returns:
        int64 ``[n, len(codebooks)]``.

    >>> books = [torch.tensor([[0.0], [4.0]]), torch.tensor([[-1.0], [1.0]])]
    >>> greedy_encode(torch.tensor([[3.2], [0.9]]), books).tolist()
    [[1, 0], [0, 1]]
    """
    n = x.shape[0]
    with _no_autocast(x.device), torch.no_grad():
        tables = [_Table(c, metric) for c in codebooks]
        if torch.compiler.is_compiling():  # traced: every row in one block, no in-place updates
            res, picked = x.detach().float(), []
            for table in tables:
                idx, _ = _nearest_traced(res, table)
                picked.append(idx)
                res = res - table.codewords[idx]
            return torch.stack(picked, 1) if picked else torch.empty(n, 0, dtype=torch.int64, device=x.device)
        out = torch.empty(n, len(codebooks), dtype=torch.int64, device=x.device)
        # What stage s subtracts after its pick so the residual lands relative to stage s+1's centre.
        steps = [_step_table(t, nxt) for t, nxt in zip(tables, tables[1:])]
        widest = max((t.entries for t in tables), default=1)
        chunk = _block_rows(chunk, widest)
        buffer = torch.empty(min(chunk, n), widest, device=x.device)
        l2 = metric == "l2" and bool(tables)
        d = x.shape[1]
        # l2: the residual (relative to the current stage's centre) with a column of ones appended.
        work = torch.ones(min(chunk, n), d + 1, device=x.device) if l2 else None
        for start in range(0, n, chunk):
            block = x[start : start + chunk].detach().float()
            rows = block.shape[0]
            if work is not None:
                folded = work[:rows]
                res = folded[:, :d]
                torch.sub(block, tables[0].centre, out=res)
            else:
                res = block.clone()
            for s, table in enumerate(tables):
                scores = buffer[:rows, : table.entries]
                if work is not None:
                    idx = table.scores_folded(folded, out=scores).min(-1).indices
                else:
                    idx = table.scores(res, out=scores).min(-1).indices
                out[start : start + rows, s] = idx
                if s < len(steps):
                    res.sub_(steps[s].index_select(0, idx))
    return out


def _step_table(table: _Table, following: _Table) -> torch.Tensor:
    """``[k, d]`` codewords moved from ``table``'s centre to ``following``'s (l2), or as they are."""
    step = table.codewords
    if table.centre is not None:
        step = step - table.centre
    if following.centre is not None:
        step = step + following.centre
    return step


def beam_encode(
    x: torch.Tensor,
    codebooks: list[torch.Tensor],
    *,
    beam: int,
    metric: Metric = "l2",
    chunk: int = 4096,
) -> torch.Tensor:
    """Residual codes chosen by beam search over stages.

    Keeps the ``beam`` best partial paths per vector; at every stage each
    path is extended by every codeword and the ``beam`` best candidates
    survive. What "best" means depends on ``metric``:

    - ``"l2"``: the smallest squared residual ``||x - sum of chosen codewords||^2``
      (the final pick is the path of least squared error);
    - ``"cosine"``: the smallest sum over stages of ``1 - cos(residual, codeword)``,
      the criterion greedy cosine search minimises one stage at a time.

    With either metric ``beam=1`` is greedy encoding (:func:`greedy_encode`),
    and a beam wide enough to keep every path is the exhaustive search.

    Args:
        x: ``[n, d]`` vectors.
        codebooks: one ``[k_s, d]`` tensor per stage.
        beam: paths kept per vector (>= 1).
        metric: ``"l2"`` or ``"cosine"``.
        chunk: candidate paths per block (``chunk // beam`` vectors); a block holds
            ``chunk * k`` candidate scores, and the peak is a few times that.

    Returns:
        int64 ``[n, len(codebooks)]``.
    """
    n, d = x.shape
    stages = len(codebooks)
    out = torch.empty(n, stages, dtype=torch.int64, device=x.device)
    with _no_autocast(x.device), torch.no_grad():
        tables = [_Table(c, metric) for c in codebooks]
        rows = max(1, chunk // beam)
        for start in range(0, n, rows):
            res = rearrange(x[start : start + rows].detach().float(), "b d -> b 1 d")
            b = res.shape[0]
            score = res.new_zeros(b, 1)  # l2: squared residual; cosine: summed 1 - cos
            if metric == "l2":
                score = (res * res).sum(-1)
            paths = torch.empty(b, 1, 0, dtype=torch.int64, device=x.device)
            for table in tables:
                k, p = table.entries, res.shape[1]
                flat = rearrange(res, "b p d -> (b p) d")
                if table.centre is not None:
                    moved = flat - table.centre
                    # ||r - c||^2 = ||r - m||^2 + (||c - m||^2 - 2 (r - m).(c - m))
                    cand = table.scores(moved).add_((moved * moved).sum(-1, keepdim=True))
                else:
                    cand = table.scores(flat).add_(1.0).add_(rearrange(score, "b p -> (b p) 1"))
                cand = rearrange(cand, "(b p) k -> b (p k)", p=p)
                keep = min(beam, cand.shape[1])
                score, pick = cand.topk(keep, dim=1, largest=False)
                parent, code = pick.div(k, rounding_mode="floor"), pick.remainder(k)
                paths = torch.cat(
                    [paths.gather(1, repeat(parent, "b q -> b q s", s=paths.shape[-1])), code.unsqueeze(-1)], dim=-1
                )
                res = res.gather(1, repeat(parent, "b q -> b q d", d=d)) - table.codewords[code]
                if metric == "l2":
                    score = (res * res).sum(-1)  # exact squared residual, not the expanded estimate
            best = score.argmin(1)
            out[start : start + b] = paths[torch.arange(b, device=x.device), best]
    return out
