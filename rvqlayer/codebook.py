"""One quantization stage: nearest-code search, EMA or gradient learning,
k-means initialisation and dead-code reseeding."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Literal

import torch
import torch.nn.functional as F
from torch import nn

from . import distributed as _dist
from ._checks import check_choice, check_float, check_int, fail
from .ema import assignment_stats, moving_average_, smoothed_codewords
from .kmeans import fit_kmeans
from .search import Metric, nearest_code

Update = Literal["ema", "gradient"]
Init = Literal["kmeans", "random"]


def same_subset(n: int, size: int, device: torch.device) -> torch.Tensor:
    """``size`` distinct indices in ``[0, n)`` drawn on rank 0 and broadcast, so every rank takes the same rows."""
    return _dist.broadcast(torch.randperm(n, device=device)[:size].contiguous())


class Codebook(nn.Module):
    """A single stage of ``entries`` codewords of size ``code_dim``.

    ``forward(x, weight=None, codes=None)`` takes ``[n, code_dim]`` vectors and
    returns the codes (int64 ``[n]``; the nearest codewords unless ``codes``
    are given, for example by beam search) and the chosen codewords
    (``[n, code_dim]``, float32).
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
        # Use actually made: starts like ema_count, follows the assignments, never reset by reseeding.
        self.register_buffer("usage_count", torch.ones(entries))
        self.register_buffer("ema_drift", torch.zeros(()))
        self.register_buffer("initialised", torch.tensor(self.init == "random"))
        self.register_buffer("step", torch.zeros((), dtype=torch.int64))
        self.register_buffer("reseeds", torch.zeros((), dtype=torch.int64))
        self.register_buffer("pending_reseed", torch.zeros(()))  # share asked for by request_reseed; 0 = none

    def _apply(self, fn, recurse=True):  # type: ignore[no-untyped-def]
        # Statistics (and EMA codewords, derived from them) stay float32 whatever .half() does.
        super()._apply(fn, recurse)
        keep = ["ema_count", "last_count", "usage_count", "ema_drift", "pending_reseed"]
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
        traced = torch.compiler.is_compiling()  # value-reading checks are for eager callers only
        if not traced and codes.numel() and (int(codes.min()) < 0 or int(codes.max()) >= self.entries):
            raise fail("codes", f"in [0, {self.entries - 1}]", f"values in [{int(codes.min())}, {int(codes.max())}]")
        return F.embedding(codes, self.codewords.float())

    def search(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Nearest code ``[n]`` and its distance ``[n]`` for ``x`` ``[n, code_dim]``; no learning."""
        return nearest_code(x, self.codewords, metric=self.metric, chunk=self.chunk)

    def forward(
        self, x: torch.Tensor, weight: torch.Tensor | None = None, codes: torch.Tensor | None = None
    ) -> tuple[torch.Tensor, torch.Tensor]:
        codes, q, update = self.plan_step(x, weight, codes=codes)
        if update is not None:
            self.commit_step(update)
        return codes, q

    def plan_step(
        self,
        x: torch.Tensor,
        weight: torch.Tensor | None = None,
        start: StepUpdate | None = None,
        codes: torch.Tensor | None = None,
    ) -> tuple[torch.Tensor, torch.Tensor, StepUpdate | None]:
        """Codes ``[n]``, codewords ``[n, code_dim]`` and, in training, the update not yet applied.

        Nothing in the module changes here; :meth:`commit_step` writes the
        update. The multi-stage layer plans every stage first and commits only
        when all stages succeeded, so a failing step changes no stage.
        ``start`` is an update planned before (the multi-stage layer's k-means
        fit of several batches); this step's learning is added to it.
        ``codes`` (int64 ``[n]``), when given, replace the nearest-code search
        (for example codes found by beam search).
        """
        if x.ndim != 2 or x.shape[1] != self.code_dim:
            raise fail("x", f"of shape [n, {self.code_dim}]", f"shape {tuple(x.shape)}")
        if codes is not None and (codes.shape != (x.shape[0],) or codes.dtype != torch.int64):
            raise fail("codes", f"int64 of shape [{x.shape[0]}]", f"{codes.dtype} of shape {tuple(codes.shape)}")
        if weight is None:
            weight = torch.ones(x.shape[0], dtype=torch.bool, device=x.device)
        if not self.training:
            if codes is None:
                codes, _ = self.search(x)
            return codes, F.embedding(codes, self.codewords.float()), None
        update = StepUpdate() if start is None else start
        if not bool(self.initialised) and "initialised" not in update.values:
            self._plan_init(x[weight], update)
        current = update.values.get("codewords", self.codewords.detach())
        if codes is None:
            codes, _ = nearest_code(x, current, metric=self.metric, chunk=self.chunk)
        table = self.codewords.float()
        if "codewords" in update.values:  # initialised in this step: the new values, gradient still to the parameter
            table = table + (current.float() - table).detach()
        q = F.embedding(codes, table)
        update.lookup = table.detach().clone()
        self._plan_learning(x.detach(), codes, weight, update)
        return codes, q, update

    @torch.no_grad()
    def commit_step(self, update: StepUpdate) -> None:
        """Write a planned update into the module's tensors."""
        for name, value in update.values.items():
            getattr(self, name).data.copy_(value)
        self.step.add_(update.steps)
        self.reseeds.add_(update.reseeded)

    # ---------------------------------------------------------------- learning
    @torch.no_grad()
    def initialise(self, x: torch.Tensor) -> None:
        """Fit the codewords to ``x`` ``[n, code_dim]`` by k-means (all ranks' rows, fitted on rank 0).

        Does nothing while no rank has any row.
        """
        update = StepUpdate()
        self._plan_init(x, update)
        self.commit_step(update)

    @torch.no_grad()
    def _plan_init(self, x: torch.Tensor, update: StepUpdate) -> None:
        rows = _dist.gather_rows(x.detach().float())
        if rows.shape[0] == 0:
            return
        total = rows.shape[0]
        if total > self.init_points:
            rows = rows[same_subset(total, self.init_points, rows.device)]
        self.plan_fit(rows, float(total), update)

    @torch.no_grad()
    def plan_fit(self, rows: torch.Tensor, batch_rows: float, update: StepUpdate) -> None:
        """Plan the k-means fit of ``rows`` ``[m, code_dim]`` (the same on every rank): fitted on rank 0, broadcast.

        ``batch_rows`` (vectors per training batch, all ranks together) scales
        the fitted counts to the scale of the EMA's per-batch counts.
        """
        if _dist.rank() == 0:
            fit = fit_kmeans(
                rows,
                self.entries,
                iters=self.init_iters,
                restarts=self.init_restarts,
                metric=self.metric,
                chunk=self.chunk,
            )
            centroids, counts = fit.centroids.contiguous(), fit.counts * (batch_rows / rows.shape[0])
        else:  # the other ranks receive rank 0's fit
            centroids = rows.new_zeros(self.entries, self.code_dim)
            counts = rows.new_zeros(self.entries)
        centroids = _dist.broadcast(centroids)
        counts = _dist.broadcast(counts).to(self.ema_count)
        update.values.update(codewords=centroids, ema_count=counts, usage_count=counts.clone())
        update.values["initialised"] = torch.ones((), dtype=torch.bool)
        if self.update == "ema":
            update.values["ema_sum"] = centroids * counts.unsqueeze(1)
        else:
            update.values["previous_codewords"] = centroids

    @torch.no_grad()
    def _plan_learning(self, x: torch.Tensor, codes: torch.Tensor, weight: torch.Tensor, update: StepUpdate) -> None:
        k, d = self.entries, self.code_dim
        counts, sums = assignment_stats(x, codes, weight, k)
        if self.update == "ema":
            packed = _dist.all_reduce_sum(torch.cat([counts, sums.flatten()]))
            counts, sums = packed[:k], packed[k:].view(k, d)
        else:
            counts = _dist.all_reduce_sum(counts)
        if float(counts.sum()) == 0.0:
            return  # no real row on any rank: the step changes nothing
        values, g = update.values, self.ema_decay
        old = values.get("codewords", self.codewords.detach())
        count = moving_average_(values.get("ema_count", self.ema_count).clone(), counts, g)
        if self.update == "ema":
            ema_sum = moving_average_(values.get("ema_sum", self.ema_sum).clone(), sums, g)
            codewords = smoothed_codewords(count, ema_sum, self.eps)
            moved = (codewords - old).norm(dim=1).mean()
        else:
            codewords = old.clone()
            moved = (self.codewords.detach() - self.previous_codewords).norm(dim=1).mean()
        values.update(ema_count=count, last_count=counts)
        values["usage_count"] = moving_average_(values.get("usage_count", self.usage_count).clone(), counts, g)
        if int(self.step) > 0:
            values["ema_drift"] = moving_average_(self.ema_drift.clone(), moved, g)
        below = max(self.reseed_below, float(self.pending_reseed))
        values["pending_reseed"] = torch.zeros_like(self.pending_reseed)
        if below > 0:
            update.reseeded = self._plan_reseed(x, weight, below, count, codewords, values.get("ema_sum"))
        values["codewords"] = codewords
        if self.update == "ema":
            values["ema_sum"] = ema_sum
        else:
            values["previous_codewords"] = codewords
        update.steps = 1

    def dead_codes(self, below: float | None = None) -> torch.Tensor:
        """Bool ``[K]``: codes whose moving-average count is under ``below`` times the uniform rate.

        ``below`` defaults to ``reseed_below`` (or 0.03 when reseeding is off).
        This is the count the reseeding rule reads; a reseeded code gets the
        uniform rate here. What the codes were actually used for is
        ``usage_count`` (read by :meth:`statistics`).
        """
        return _below_share(self.ema_count, self.dead_share(below))

    def dead_share(self, below: float | None = None) -> float:
        """The dead-code threshold as a share of the uniform rate (``reseed_below``, or 0.03 when off)."""
        return below if below is not None else (self.reseed_below or 0.03)

    def request_reseed(self, below: float) -> None:
        """Reseed, at the next training step, every code under ``below`` times the uniform rate."""
        self.pending_reseed.fill_(check_float("below", below, 0.0, 1.0, low_open=True))

    def _plan_reseed(
        self,
        x: torch.Tensor,
        weight: torch.Tensor,
        below: float,
        count: torch.Tensor,
        codewords: torch.Tensor,
        ema_sum: torch.Tensor | None,
    ) -> int:
        """Move dead codes (in the planned ``count``) onto rows of ``x`` whose ``weight`` is True.

        Edits the planned tensors in place; reads the rows it picks without copying ``x``.
        """
        dead = _below_share(count, below)
        n_dead = int(dead.sum())
        if n_dead == 0:
            return 0
        real = weight.nonzero().squeeze(1)
        have = torch.tensor([float(real.numel() > 0)], device=x.device)
        if real.numel() > 0:
            picks = x[real[torch.randint(real.numel(), (n_dead,), device=x.device)]].float()
            xf = x.float()
            energy = (torch.einsum("nd,nd->n", xf, xf) * weight).sum() / (real.numel() * x.shape[1])
            scale = energy.sqrt().clamp_min(1e-6)
            picks = picks + 0.01 * scale * torch.randn_like(picks)
        else:
            picks = torch.zeros(n_dead, self.code_dim, device=x.device)
        _dist.broadcast(have)
        if float(have) == 0.0:
            return 0
        picks = _dist.broadcast(picks.contiguous())
        rate = count.sum() / self.entries
        codewords[dead] = picks.to(codewords.dtype)
        count[dead] = rate
        if ema_sum is not None:
            ema_sum[dead] = picks * rate
        return n_dead

    def statistics(self, counts: torch.Tensor | None = None) -> dict[str, Any]:
        """This stage's own figures for health reporting (see :class:`~rvqlayer.health.StageStatistics`).

        ``counts`` ``[K]`` replaces the moving-average usage (for example the
        codes of a held-out set).
        """
        usage = self.usage_count if counts is None else counts
        return {
            "entries": self.entries,
            "usage_counts": usage.detach().float().cpu().clone(),
            "batch_counts": (self.last_count if counts is None else counts).detach().float().cpu().clone(),
            "reseeds": int(self.reseeds),
            "drift": float(self.ema_drift),
            "dead_share": self.dead_share(),
        }


def _below_share(counts: torch.Tensor, share: float) -> torch.Tensor:
    """Bool ``[K]``: counts under ``share`` times their uniform rate ``sum / K``."""
    return counts < share * counts.sum() / counts.shape[0]


@dataclass
class StepUpdate:
    """A planned training step of one :class:`Codebook`: new tensor values, not yet written.

    Attributes:
        values: buffer or parameter name -> its new value.
        steps: 1 when the step learned something (0: no real rows anywhere).
        reseeded: codes moved onto batch vectors.
        lookup: a copy of the codewords this step's codes were chosen from
            (so a caller can look them up again after the update is written).
    """

    values: dict[str, torch.Tensor] = field(default_factory=dict)
    steps: int = 0
    reseeded: int = 0
    lookup: torch.Tensor | None = None  # the [K, code_dim] float32 codewords the codes index, as they were
