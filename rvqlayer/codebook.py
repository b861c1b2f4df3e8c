"""One quantization stage: nearest-code search, EMA or gradient learning,
k-means initialisation and dead-code reseeding."""

from __future__ import annotations

from typing import Literal

import torch
import torch.nn.functional as F
from torch import nn

from . import distributed as _dist
from ._checks import check_choice, check_float, check_int, fail
from .ema import assignment_stats, ema_step, smoothed_codewords
from .kmeans import fit_kmeans
from .search import Metric, nearest_code

Update = Literal["ema", "gradient"]
Init = Literal["kmeans", "random"]


class Codebook(nn.Module):
    """A single stage of ``entries`` codewords of size ``code_dim``.

    ``forward(x, weight=None)`` takes ``[n, code_dim]`` vectors and returns the
    codes (int64 ``[n]``) and the chosen codewords (``[n, code_dim]``, float32).
    In training mode it also learns: k-means initialisation on the first batch
    (``init="kmeans"``), the EMA update (``update="ema"``), usage statistics
    and dead-code reseeding. Rows whose ``weight`` is False are encoded but
    take no part in learning. In eval mode nothing changes.

    Args:
        entries: number of codewords K.
        code_dim: size of each codeword.
        update: ``"ema"`` (moving-average counts and sums) or ``"gradient"``
            (codewords are parameters trained by the codebook loss).
        ema_decay: decay g of the moving averages (counts, sums, statistics).
        eps: count smoothing constant of the EMA update.
        init: ``"kmeans"`` (on the first training batch) or ``"random"``
            (standard normal codewords drawn at construction).
        init_iters: Lloyd iterations after seeding.
        init_restarts: seeded k-means runs; the lowest-error one is kept.
        init_points: at most this many vectors (a random subset) feed k-means.
        reseed_below: a code whose moving-average count falls below this share
            of the uniform rate (total count / K) is moved onto a vector of
            the current batch; 0 turns reseeding off.
        metric: ``"l2"`` or ``"cosine"`` (search by angle; the codeword is
            the mean of the vectors assigned to it).
        chunk: rows per distance block.

    >>> torch.manual_seed(0) and None
    >>> cb = Codebook(16, 4)
    >>> codes, q = cb(torch.randn(256, 4))
    >>> codes.shape, q.shape, bool(cb.initialised)
    (torch.Size([256]), torch.Size([256, 4]), True)
    """

    codewords: torch.Tensor

    def __init__(
        self,
        entries: int,
        code_dim: int,
        *,
        update: Update = "ema",
        ema_decay: float = 0.99,
        eps: float = 1e-5,
        init: Init = "kmeans",
        init_iters: int = 10,
        init_restarts: int = 3,
        init_points: int = 8192,
        reseed_below: float = 0.03,
        metric: Metric = "l2",
        chunk: int = 4096,
    ) -> None:
        super().__init__()
        self.entries = check_int("entries", entries, 1)
        self.code_dim = check_int("code_dim", code_dim, 1)
        self.update = check_choice("update", update, ("ema", "gradient"))
        self.ema_decay = check_float("ema_decay", ema_decay, 0.0, 1.0, high_open=True)
        self.eps = check_float("eps", eps, 0.0, float("inf"), low_open=True, high_open=True)
        self.init = check_choice("init", init, ("kmeans", "random"))
        self.init_iters = check_int("init_iters", init_iters, 0)
        self.init_restarts = check_int("init_restarts", init_restarts, 1)
        self.init_points = check_int("init_points", init_points, 1)
        self.reseed_below = check_float("reseed_below", reseed_below, 0.0, 1.0)
        self.metric = check_choice("metric", metric, ("l2", "cosine"))
        self.chunk = check_int("chunk", chunk, 1)

        start = torch.randn(entries, code_dim)
        if self.update == "gradient":
            self.codewords = nn.Parameter(start)  # type: ignore[assignment]
            self.register_buffer("previous_codewords", start.clone())
        else:
            self.register_buffer("codewords", start)
            self.register_buffer("ema_sum", start.clone())
        self.register_buffer("ema_count", torch.ones(entries))
        self.register_buffer("last_count", torch.zeros(entries))
        self.register_buffer("ema_drift", torch.zeros(()))
        self.register_buffer("initialised", torch.tensor(self.init == "random"))
        self.register_buffer("step", torch.zeros((), dtype=torch.int64))
        self.register_buffer("reseeds", torch.zeros((), dtype=torch.int64))
        self.register_buffer("pending_reseed", torch.zeros(()))  # share asked for by request_reseed; 0 = none

    def _apply(self, fn, recurse=True):  # type: ignore[no-untyped-def]
        # Statistics (and EMA codewords, derived from them) stay float32 whatever .half() does.
        super()._apply(fn, recurse)
        keep = ["ema_count", "last_count", "ema_drift", "pending_reseed"]
        keep += ["codewords", "ema_sum"] if self.update == "ema" else ["previous_codewords"]
        for name in keep:
            t = self._buffers[name]
            if t is not None and t.is_floating_point() and t.dtype != torch.float32:
                self._buffers[name] = t.float()
        return self

    def extra_repr(self) -> str:
        return (
            f"entries={self.entries}, code_dim={self.code_dim}, update={self.update!r}, "
            f"ema_decay={self.ema_decay}, init={self.init!r}, reseed_below={self.reseed_below}, "
            f"metric={self.metric!r}"
        )

    # ------------------------------------------------------------------ lookup
    def lookup(self, codes: torch.Tensor) -> torch.Tensor:
        """Codewords ``[..., code_dim]`` (float32) for int64 ``codes`` ``[...]``."""
        if codes.numel() and (int(codes.min()) < 0 or int(codes.max()) >= self.entries):
            raise fail("codes", f"in [0, {self.entries - 1}]", f"values in [{int(codes.min())}, {int(codes.max())}]")
        return F.embedding(codes, self.codewords.float())

    def search(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Nearest code ``[n]`` and its distance ``[n]`` for ``x`` ``[n, code_dim]``; no learning."""
        return nearest_code(x, self.codewords, metric=self.metric, chunk=self.chunk)

    def forward(self, x: torch.Tensor, weight: torch.Tensor | None = None) -> tuple[torch.Tensor, torch.Tensor]:
        if x.ndim != 2 or x.shape[1] != self.code_dim:
            raise fail("x", f"of shape [n, {self.code_dim}]", f"shape {tuple(x.shape)}")
        if weight is None:
            weight = torch.ones(x.shape[0], dtype=torch.bool, device=x.device)
        learn = self.training
        if learn and not bool(self.initialised):
            self.initialise(x[weight])
        codes, _ = self.search(x)
        q = F.embedding(codes, self.codewords.float())
        if learn:
            self._learn(x.detach(), codes, weight)
        return codes, q

    # ---------------------------------------------------------------- learning
    @torch.no_grad()
    def initialise(self, x: torch.Tensor) -> None:
        """Fit the codewords to ``x`` ``[n, code_dim]`` by k-means (all ranks' rows, fitted on rank 0).

        Does nothing while no rank has any row.
        """
        rows = _dist.gather_rows(x.detach().float())
        if rows.shape[0] == 0:
            return
        used = rows
        if rows.shape[0] > self.init_points:
            used = rows[torch.randperm(rows.shape[0], device=rows.device)[: self.init_points]]
        fit = fit_kmeans(
            used, self.entries, iters=self.init_iters, restarts=self.init_restarts, metric=self.metric, chunk=self.chunk
        )
        centroids = _dist.broadcast(fit.centroids.contiguous())
        counts = _dist.broadcast(fit.counts * (rows.shape[0] / used.shape[0]))
        counts = counts.to(self.ema_count)
        self.codewords.data.copy_(centroids)
        self.ema_count.copy_(counts)
        if self.update == "ema":
            self.ema_sum.copy_(centroids * counts.unsqueeze(1))
        else:
            self.previous_codewords.copy_(centroids)
        self.initialised.fill_(True)

    @torch.no_grad()
    def _learn(self, x: torch.Tensor, codes: torch.Tensor, weight: torch.Tensor) -> None:
        k, d = self.entries, self.code_dim
        counts, sums = assignment_stats(x, codes, weight.float(), k)
        if self.update == "ema":
            packed = _dist.all_reduce_sum(torch.cat([counts, sums.flatten()]))
            counts, sums = packed[:k], packed[k:].view(k, d)
            ema_step(self.ema_count, self.ema_sum, counts, sums, self.ema_decay)
            new = smoothed_codewords(self.ema_count, self.ema_sum, self.eps)
            moved = (new - self.codewords).norm(dim=1).mean()
            self.codewords.copy_(new)
        else:
            counts = _dist.all_reduce_sum(counts)
            self.ema_count.mul_(self.ema_decay).add_(counts, alpha=1.0 - self.ema_decay)
            moved = (self.codewords - self.previous_codewords).norm(dim=1).mean()
        self.last_count.copy_(counts)
        if int(self.step) > 0:
            self.ema_drift.mul_(self.ema_decay).add_(moved, alpha=1.0 - self.ema_decay)
        self.step.add_(1)
        below = max(self.reseed_below, float(self.pending_reseed))
        self.pending_reseed.zero_()
        if below > 0:
            self._reseed(x[weight], below)
        if self.update == "gradient":
            self.previous_codewords.copy_(self.codewords)

    def dead_codes(self, below: float | None = None) -> torch.Tensor:
        """Bool ``[K]``: codes whose moving-average count is under ``below`` times the uniform rate.

        ``below`` defaults to ``reseed_below`` (or 0.03 when reseeding is off).
        """
        share = below if below is not None else (self.reseed_below or 0.03)
        return self.ema_count < share * self.ema_count.sum() / self.entries

    def request_reseed(self, below: float) -> None:
        """Reseed, at the next training step, every code under ``below`` times the uniform rate."""
        self.pending_reseed.fill_(check_float("below", below, 0.0, 1.0, low_open=True))

    def _reseed(self, rows: torch.Tensor, below: float) -> None:
        dead = self.dead_codes(below)
        n_dead = int(dead.sum())
        if n_dead == 0:
            return
        have = torch.tensor([float(rows.shape[0] > 0)], device=rows.device)
        if rows.shape[0] > 0:
            picks = rows[torch.randint(rows.shape[0], (n_dead,), device=rows.device)].float()
            scale = rows.float().pow(2).mean().sqrt().clamp_min(1e-6)
            picks = picks + 0.01 * scale * torch.randn_like(picks)
        else:
            picks = torch.zeros(n_dead, self.code_dim, device=rows.device)
        _dist.broadcast(have)
        if float(have) == 0.0:
            return
        picks = _dist.broadcast(picks.contiguous())
        rate = self.ema_count.sum() / self.entries
        self.codewords.data[dead] = picks.to(self.codewords.dtype)
        self.ema_count[dead] = rate
        if self.update == "ema":
            self.ema_sum[dead] = picks * rate
        self.reseeds.add_(n_dead)
