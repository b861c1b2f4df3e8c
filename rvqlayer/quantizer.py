"""The multi-stage (residual) vector quantizer layer."""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from typing import Any, Literal

import torch
import torch.nn.functional as F
from einops import rearrange
from torch import nn

from . import distributed as _dist
from ._checks import all_finite, check_choice, check_features, check_float, check_int, check_mask, fail
from ._limits import MAX_CODEBOOK_VALUES, MAX_DIM, MAX_ENTRIES, MAX_STAGES
from .bitrate import bitrate as _bitrate
from .bitrate import bits_per_vector as _bits_per_vector
from .codebook import Codebook, Init, StepUpdate, Update, same_subset
from .ema import moving_average_, smoothed_codewords
from .health import HealthReport, StageStatistics, health_report
from .refine import FitMethod, refine_codebooks
from .rotation import ESTIMATORS, rotation_trick
from .search import Metric, beam_encode, greedy_encode, nearest_code

# Longest lookup-space vector accepted: (2 * norm)^2 times a few stays below float32's maximum.
MAX_LOOKUP_NORM = 4e18
# The fields of the persistent ``layout`` buffer, in order.
_LAYOUT_NUMBERS = ("dim", "entries", "code_dim")
_LAYOUT_CHOICES = {"update": ("ema", "gradient"), "metric": ("l2", "cosine")}

Estimator = Literal["straight_through", "rotation"]


def _row_energy(r: torch.Tensor) -> torch.Tensor:
    """Squared norm of every row ``[n]`` of ``r`` ``[n, d]``, without an ``[n, d]`` temporary."""
    return torch.einsum("nd,nd->n", r, r)


@dataclass
class _Plan:
    """What the backward pass of :class:`_Commitment` needs besides tensors autograd tracks.

    ``books``: each stage's codewords as they were when its codes were chosen; ``coefs``:
    ``2 beta / denom_s`` per stage; ``chunk``: rows recomputed at a time; ``through``:
    the output's gradient passes to ``z`` here (straight-through estimator).
    """

    books: list[torch.Tensor]
    coefs: torch.Tensor
    chunk: int
    through: bool = True


class _Commitment(torch.autograd.Function):
    """Commitment loss (and, with ``plan.through``, the straight-through output) as one autograd node.

    Forward returns ``value`` (the codeword sum) and ``commit`` (the commitment
    loss, computed by the caller). Backward gives ``z`` the output's gradient
    unchanged (straight-through estimator; only when ``plan.through``) plus ``g * sum_s coef_s w_s r_{s+1}``,
    the commitment loss's gradient (``r_{s+1} = r_s - q_s`` is the residual after
    stage ``s``, ``w_s`` its real, undropped rows). The residuals are recomputed
    from the codes, ``chunk`` rows at a time, with the same operations as the
    forward pass, so autograd keeps no ``[n, d]`` tensor of its own.
    """

    @staticmethod
    def forward(ctx, z, value, commit, codes, real, plan):  # type: ignore[no-untyped-def, override]
        ctx.set_materialize_grads(False)
        ctx.save_for_backward(z, codes, real)
        ctx.plan = plan
        ctx.mark_non_differentiable(codes)
        return value.view_as(value), commit.view_as(commit)

    @staticmethod
    def backward(ctx, grad_value, grad_commit):  # type: ignore[no-untyped-def, override]
        z, codes, real = ctx.saved_tensors
        plan: _Plan = ctx.plan
        if not plan.through:
            grad_value = None
        if grad_commit is None or not plan.books:
            return grad_value, None, None, None, None, None
        grad = torch.empty_like(z, dtype=torch.float32)
        with torch.no_grad():
            for start in range(0, z.shape[0], plan.chunk):
                rows = slice(start, start + plan.chunk)
                r = z[rows].detach().float().clone()
                acc = torch.zeros_like(r)
                for s, book in enumerate(plan.books):
                    stage = codes[rows, s]
                    used = stage >= 0
                    r.sub_(F.embedding(stage.clamp_min(0), book) * used.unsqueeze(1))
                    acc.addcmul_(r, ((used & real[rows]) * plan.coefs[s]).unsqueeze(1))
                acc.mul_(grad_commit)
                grad[rows] = acc if grad_value is None else acc.add_(grad_value[rows])
        return grad, None, None, None, None, None


@dataclass
class QuantizerOutput:
    """What :class:`MultiStageQuantizer` returns.

    Attributes:
        quantized: same shape and dtype as the input; the gradient reaches
            the input unchanged (straight-through estimator) or through the
            rotation trick (``estimator="rotation"``).
        codes: int64 ``[..., stages]`` (the input's shape without its feature
            axis, then one code per stage); ``-1`` marks a stage that stage
            dropout left out for that vector.
        loss: scalar auxiliary loss to add to the training loss.
        stage_count: int64 ``[...]``, stages used for each vector.
    """

    quantized: torch.Tensor
    codes: torch.Tensor
    loss: torch.Tensor
    stage_count: torch.Tensor


class MultiStageQuantizer(nn.Module):
    """Residual vector quantizer: stage k quantizes what stages 1..k-1 left.

    Args:
        dim: feature size of the input.
        stages: number of codebooks.
        entries: codewords per codebook; each stage costs ``log2(entries)`` bits.
        code_dim: lookup size; smaller than ``dim`` adds learned linear
            projections ``dim -> code_dim -> dim`` around the lookup.
        update: ``"ema"`` or ``"gradient"`` codebook learning.
        ema_decay: decay of the moving averages (codebooks and statistics).
        beta: weight of the commitment loss ``||r_k - sg(q_k)||^2``
            (0.25 as in VQ-VAE).
        init: ``"kmeans"`` on the first training batch, stage by stage on the
            residuals, or ``"random"`` at construction.
        init_iters, init_restarts, init_points: k-means settings (see
            :class:`Codebook`).
        init_batches: k-means initialisation waits for this many training
            batches (of all ranks) and fits them together, or fits as soon as
            ``init_points`` vectors are collected. Until then the layer works
            as it was built (codes of the random construction-time codewords,
            ``quantized`` their sum, the loss against them) and learns
            nothing; the collected vectors are kept in the state dict.
        reseed_below: dead-code threshold as a share of the uniform usage
            rate; 0 disables reseeding.
        stage_dropout: in training, the probability that an example keeps a
            random number of stages in ``1..stages`` instead of all of them.
        metric: ``"l2"`` or ``"cosine"`` nearest-code search.
        axis: the feature axis of the input (``1`` for ``[batch, channels, time]``).
        chunk: rows per distance block (bounds memory).
        eps: count smoothing of the EMA update.
        train_beam: beam width of the encoding inside ``forward`` (training
            and eval): the EMA statistics, losses and output use the codes
            that ``encode(x, stages=k, beam=train_beam)`` gives, for each
            vector's stage count ``k``; 1 = greedy. The first training batch
            (k-means initialisation) is encoded greedily.
        estimator: how the gradient crosses the quantizer:
            ``"straight_through"`` copies it to the lookup-space input ``z``;
            ``"rotation"`` (Fifty et al., ICLR 2025) carries ``z`` onto the sum
            of its chosen codewords by a rotation and rescaling held constant
            in the backward pass (applied once, to the whole lookup-space
            vector, not per stage). The forward value is the same.

    The loss is ``beta * sum_k mse(r_k, sg(q_k))`` over stages (each term a
    mean over the vector's elements and the real, undropped vectors), plus
    ``sum_k mse(sg(r_k), q_k)`` when ``update="gradient"``.

    >>> torch.manual_seed(0) and None
    >>> q = MultiStageQuantizer(8, stages=3, entries=16)
    >>> out = q(torch.randn(4, 10, 8))
    >>> out.quantized.shape, out.codes.shape
    (torch.Size([4, 10, 8]), torch.Size([4, 10, 3]))
    >>> q.bits_per_vector(stages=2)
    8.0
    """

    def __init__(
        self,
        dim: int,
        *,
        stages: int = 8,
        entries: int = 1024,
        code_dim: int | None = None,
        update: Update = "ema",
        ema_decay: float = 0.99,
        beta: float = 0.25,
        init: Init = "kmeans",
        init_iters: int = 10,
        init_restarts: int = 3,
        init_points: int = 8192,
        init_batches: int = 1,
        reseed_below: float = 0.03,
        stage_dropout: float = 0.0,
        metric: Metric = "l2",
        axis: int = -1,
        chunk: int = 4096,
        eps: float = 1e-5,
        train_beam: int = 1,
        estimator: Estimator = "straight_through",
    ) -> None:
        super().__init__()
        self.dim = check_int("dim", dim, 1, MAX_DIM)
        self.stages = check_int("stages", stages, 1, MAX_STAGES)
        self.entries = check_int("entries", entries, 1, MAX_ENTRIES)
        code_dim = dim if code_dim is None else code_dim
        self.code_dim = check_int("code_dim", code_dim, 1, dim)
        if self.stages * self.entries * self.code_dim > MAX_CODEBOOK_VALUES:
            raise fail(
                "stages * entries * code_dim",
                f"at most {MAX_CODEBOOK_VALUES} codebook values (4 GiB of float32 with the EMA sums)",
                self.stages * self.entries * self.code_dim,
            )
        self.update = check_choice("update", update, ("ema", "gradient"))
        self.beta = check_float("beta", beta, 0.0, float("inf"), high_open=True)
        self.stage_dropout = check_float("stage_dropout", stage_dropout, 0.0, 1.0)
        self.metric = check_choice("metric", metric, ("l2", "cosine"))
        self.axis = check_int("axis", axis, -(2**31))
        self.chunk = check_int("chunk", chunk, 1)
        self.init_batches = check_int("init_batches", init_batches, 1)
        self.train_beam = check_int("train_beam", train_beam, 1)
        self.estimator = check_choice("estimator", estimator, ESTIMATORS)
        self.codebooks = nn.ModuleList(
            Codebook(
                entries,
                self.code_dim,
                update=update,
                ema_decay=ema_decay,
                eps=eps,
                init=init,
                init_iters=init_iters,
                init_restarts=init_restarts,
                init_points=init_points,
                reseed_below=reseed_below,
                metric=metric,
                chunk=chunk,
            )
            for _ in range(stages)
        )
        first = self.codebooks[0]
        self.ema_decay = first.ema_decay
        # The single owner of the options: repr, export metadata, checkpoints and load checks read it.
        self._config = {
            "dim": self.dim,
            "stages": self.stages,
            "entries": self.entries,
            "code_dim": self.code_dim,
            "update": self.update,
            "ema_decay": first.ema_decay,
            "beta": self.beta,
            "init": first.init,
            "init_iters": first.init_iters,
            "init_restarts": first.init_restarts,
            "init_points": first.init_points,
            "init_batches": self.init_batches,
            "reseed_below": first.reseed_below,
            "stage_dropout": self.stage_dropout,
            "metric": self.metric,
            "axis": self.axis,
            "chunk": self.chunk,
            "eps": first.eps,
            "train_beam": self.train_beam,
            "estimator": self.estimator,
        }
        if self.code_dim < dim:
            self.project_in: nn.Module = nn.Linear(dim, self.code_dim)
            self.project_out: nn.Module = nn.Linear(self.code_dim, dim)
        else:
            self.project_in = nn.Identity()
            self.project_out = nn.Identity()
        # Moving averages for health reporting (lookup space, real vectors only).
        self.register_buffer("energy_left", torch.ones(stages))
        self.register_buffer("stage_error", torch.zeros(stages))
        self.register_buffer("stats_steps", torch.zeros(stages, dtype=torch.int64))
        if self.init_batches > 1 and first.init == "kmeans":
            # Vectors collected for k-means over the first batches (identical on every rank; emptied
            # once fitted) and [batches, vectors] seen so far, all ranks together.
            self.register_buffer("init_rows", torch.zeros(0, self.code_dim))
            self.register_buffer("init_seen", torch.zeros(2, dtype=torch.int64))
        self._ranks_checked = False  # the first training step under torch.distributed compares the ranks
        # What the tensors mean, stored with them: loading checks it field by field.
        layout = [self._config[name] for name in _LAYOUT_NUMBERS] + [
            _LAYOUT_CHOICES[name].index(self._config[name]) for name in _LAYOUT_CHOICES
        ]
        self.register_buffer("layout", torch.tensor(layout, dtype=torch.int64))
        # Follows .half()/.to(dtype): the dtype of what decode returns.
        self.register_buffer("dtype_probe", torch.zeros(0), persistent=False)
        self.register_load_state_dict_pre_hook(_check_loaded_state)

    def _apply(self, fn, recurse=True):  # type: ignore[no-untyped-def]
        # Health statistics stay float32 whatever .half() does.
        super()._apply(fn, recurse)
        for name in ("energy_left", "stage_error"):
            t = self._buffers[name]
            if t is not None and t.dtype != torch.float32:
                self._buffers[name] = t.float()
        return self

    def config(self) -> dict[str, Any]:
        """Every constructor option, as a plain JSON-serialisable dict.

        ``MultiStageQuantizer(**q.config())`` builds a layer with the same
        options; export files, checkpoints and ``repr`` all read this dict.

        >>> MultiStageQuantizer(4, stages=2, entries=8).config()["entries"]
        8
        """
        return dict(self._config)

    def extra_repr(self) -> str:
        return ", ".join(f"{k}={v!r}" for k, v in self._config.items())

    # ----------------------------------------------------------------- helpers
    def _check_stages(self, stages: int | None) -> int:
        if stages is None:
            return self.stages
        return check_int("stages", stages, 1, self.stages)

    def _flatten(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Size]:
        """``[..., dim]`` rows of ``x`` and the vector shape (``x`` without its feature axis)."""
        moved = x.movedim(self._axis(x.ndim), x.ndim - 1)
        return rearrange(moved, "... d -> (...) d"), moved.shape[:-1]

    def _unflatten(self, rows: torch.Tensor, lead: torch.Size) -> torch.Tensor:
        out = rows.reshape(*lead, self.dim)
        return out.movedim(out.ndim - 1, self._axis(out.ndim)) if out.ndim > 1 else out

    def _axis(self, ndim: int) -> int:
        """The feature axis as a non-negative index (exported ONNX graphs reject negative ones)."""
        return self.axis + ndim if self.axis < 0 else self.axis

    def _stage_counts(self, lead: torch.Size, n_use: int, device: torch.device) -> torch.Tensor:
        """Stages used per vector ``[...]``: per example (first axis) under stage dropout."""
        if not (self.training and self.stage_dropout > 0.0):
            return torch.full(lead, n_use, dtype=torch.int64, device=device)
        examples = lead[0] if len(lead) else 1
        drop = torch.rand(examples, device=device) < self.stage_dropout
        drawn = torch.randint(1, n_use + 1, (examples,), device=device)
        per_example = torch.where(drop, drawn, torch.full_like(drawn, n_use))
        shape = (examples,) + (1,) * max(len(lead) - 1, 0)
        return per_example.view(shape).expand(lead).reshape(lead) if len(lead) else per_example.view(())

    # ----------------------------------------------------------------- forward
    def forward(self, x: torch.Tensor, mask: torch.Tensor | None = None, stages: int | None = None) -> QuantizerOutput:
        """Quantize ``x`` (feature axis ``axis``); learn in training mode.

        Args:
            x: float tensor with ``dim`` features on ``axis``.
            mask: optional bool ``[...]`` (``x`` without its feature axis);
                False marks padding kept out of statistics, initialisation,
                reseeding and losses.
            stages: use only the first ``stages`` codebooks.

        A training step is all or nothing: every stage is searched and its
        update planned first, and the codebooks and statistics are written
        only once all stages succeeded.
        """
        check_features("x", x, self.dim, self.axis)
        n_use = self._check_stages(stages)
        rows, lead = self._flatten(x)
        if mask is not None:
            check_mask(mask, tuple(lead))
            real = mask.reshape(-1).to(rows.device)
        else:
            real = torch.ones(rows.shape[0], dtype=torch.bool, device=rows.device)
        if self.training and not self._ranks_checked:
            self._check_ranks()
        z = self._project_in(rows)
        zf = _finite_lookup_input(z)
        init_plan = self._plan_collection(zf.detach()[real]) if self.training and self._waiting() else None
        waiting = init_plan is not None and init_plan.updates is None
        stage_count = self._stage_counts(lead, n_use, rows.device)
        counts = stage_count.reshape(-1)
        dropout = self.training and self.stage_dropout > 0.0

        # Autograd sees, per stage, only the codebook term of update="gradient". The commitment
        # loss is one node (_Commitment) that recomputes the residuals from the codes in backward
        # and, with the straight-through estimator, also carries the output's gradient: no
        # [n, code_dim] tensor is kept per stage.
        residual = zf.detach().clone()
        codes = torch.full((rows.shape[0], n_use), -1, dtype=torch.int64, device=rows.device)
        searched = self._beam_codes(residual, counts, n_use)
        loss = residual.new_zeros(())
        commit = residual.new_zeros(())
        chain = _ChainStats.empty(n_use, residual.device)
        signal = _row_energy(residual)
        updates, books, coefs = [], [], []
        for s in range(n_use):
            used = counts > s
            learn = used & real
            if waiting:  # k-means initialisation still collects vectors: encode only, learn nothing
                stage_codes, _ = self.codebooks[s].search(residual)
                q, update = F.embedding(stage_codes, self.codebooks[s].codewords.float()), None
            else:
                start = init_plan.updates[s] if init_plan is not None and init_plan.updates is not None else None
                given = None if searched is None else searched[:, s].clamp_min(0)
                stage_codes, q, update = self.codebooks[s].plan_step(residual, learn, start, codes=given)
            updates.append(update)
            lookup = update.lookup if update is not None else None
            books.append(lookup if lookup is not None else self.codebooks[s].codewords.detach().float().clone())
            if dropout:
                q = q * used.unsqueeze(1)
            codes[:, s] = torch.where(used, stage_codes, torch.full_like(stage_codes, -1))
            w = learn.float()
            denom = (w.sum() * self.code_dim).clamp_min(1.0)
            coefs.append(2.0 * self.beta / denom)
            if self.update == "gradient":
                loss = loss + ((((residual - q) ** 2).sum(-1)) * w).sum() / denom
            with torch.no_grad():
                residual.sub_(q)
                err = _row_energy(residual)
                commit += self.beta * (err * w).sum() / denom
                if self.training and not waiting:
                    chain.add(s, squared_error=(err * w).sum(), rows=w.sum(), energy=(signal * w).sum())
            del q
        if self.training:
            with torch.no_grad():
                if not waiting:
                    chain = chain.all_reduce()
                    for codebook, update in zip(self.codebooks, updates):
                        codebook.commit_step(update)
                    self._commit_chain(chain)
                if init_plan is not None:
                    self._commit_collection(init_plan, n_use)

        # The value is the codeword sum z - r (in the residual's storage); the gradient goes to z
        # straight through or by the rotation trick.
        value = residual.neg_().add_(zf.detach())
        through = self.estimator != "rotation"
        if zf.requires_grad:
            plan = _Plan(books, torch.stack(coefs) if coefs else residual.new_zeros(0), self.chunk, through)
            carried, commit = _Commitment.apply(zf, value, commit, codes, real, plan)
            value = carried if through else rotation_trick(zf, value)
        out = self._project_out(value)
        return QuantizerOutput(
            quantized=self._unflatten(out, lead).to(x.dtype),
            codes=codes.reshape(*lead, n_use),
            loss=loss + commit,
            stage_count=stage_count,
        )

    # ------------------------------------------------------ k-means initialisation
    def _waiting(self) -> bool:
        """True while k-means over several batches has not fitted every stage.

        With ``init_batches=1`` each stage fits itself in its first training step instead.
        """
        return "init_rows" in self._buffers and not all(bool(cb.initialised) for cb in self.codebooks)

    @torch.no_grad()
    def _plan_collection(self, z: torch.Tensor) -> _InitPlan:
        """Add the real vectors ``z`` ``[n, code_dim]`` of every rank; plan the fit of every stage once enough are in.

        Nothing is written here (see :meth:`_commit_collection`).
        """
        rows = _dist.gather_rows(z.float())
        limit = self.codebooks[0].init_points
        held = self.init_rows  # at most init_points rows are kept, and they feed every stage
        batches, seen = int(self.init_seen[0]) + 1, int(self.init_seen[1]) + rows.shape[0]
        room = limit - held.shape[0]
        if rows.shape[0] > room:
            rows = rows[same_subset(rows.shape[0], room, rows.device)]
        held = torch.cat([held, rows.to(held)])
        if held.shape[0] == 0 or (batches < self.init_batches and held.shape[0] < limit):
            return _InitPlan(held, batches, seen, None)
        updates, residual = [], held
        for cb in self.codebooks:  # stage by stage on the residuals
            update = StepUpdate()
            if not bool(cb.initialised):
                cb.plan_fit(residual, seen / batches, update)
            codewords = update.values.get("codewords", cb.codewords.detach()).float()
            codes, _ = nearest_code(residual, codewords, metric=cb.metric, chunk=cb.chunk)
            residual = residual - F.embedding(codes, codewords)
            updates.append(update)
        return _InitPlan(held[:0], batches, seen, updates)

    @torch.no_grad()
    def _commit_collection(self, plan: _InitPlan, used: int) -> None:
        """Write the collected rows, and the fits of the stages this step did not use."""
        if plan.updates is not None:
            for codebook, update in zip(self.codebooks[used:], plan.updates[used:]):
                codebook.commit_step(update)
        self.init_rows = plan.rows
        self.init_seen.copy_(torch.tensor([plan.batches, plan.seen]))

    # ------------------------------------------------------------ several ranks
    def _rank_fingerprint(self) -> dict[str, Any]:
        """What must be equal on every rank: options, tensor shapes, init flags, steps, codeword sums."""
        facts: dict[str, Any] = {f"option {k}": v for k, v in self._config.items()}
        for name, t in list(self.named_parameters()) + list(self.named_buffers()):
            facts[f"shape of {name}"] = [list(t.shape), str(t.dtype)]
        for s, cb in enumerate(self.codebooks):
            facts[f"stage {s + 1} initialised, step"] = [bool(cb.initialised), int(cb.step)]
            if bool(cb.initialised):
                facts[f"stage {s + 1} codeword sum"] = float(cb.codewords.detach().double().sum())
        return facts

    def _check_ranks(self) -> None:
        """First training step under ``torch.distributed``: every rank must hold the same layer.

        One small all-gather of the fingerprint; an RvqlayerError naming what differs otherwise.
        """
        if _dist.is_distributed():
            mine = self._rank_fingerprint()
            device = self.codebooks[0].ema_count.device
            every = [json.loads(b) for b in _dist.gather_bytes(json.dumps(mine, sort_keys=True).encode(), device)]
            differ = sorted({k for facts in every for k in set(facts) | set(mine) if facts.get(k) != mine.get(k)})
            if differ:
                shown = "; ".join(
                    f"{k}: " + ", ".join(f"{facts.get(k)!r} on rank {r}" for r, facts in enumerate(every))
                    for k in differ[:8]
                )
                more = f" (and {len(differ) - 8} more)" if len(differ) > 8 else ""
                raise fail("the layer", "the same on every rank", shown + more)
        self._ranks_checked = True

    def _project_in(self, rows: torch.Tensor) -> torch.Tensor:
        """Rows ``[n, dim]`` into the lookup space, in the projection's own dtype."""
        if isinstance(self.project_in, nn.Linear):
            rows = rows.to(self.project_in.weight.dtype)
        return self.project_in(rows)

    def _project_out(self, rows: torch.Tensor) -> torch.Tensor:
        if isinstance(self.project_out, nn.Linear):
            rows = rows.to(self.project_out.weight.dtype)
        return self.project_out(rows)

    @torch.no_grad()
    def _beam_codes(self, z: torch.Tensor, counts: torch.Tensor, n_use: int) -> torch.Tensor | None:
        """Beam-search codes ``[n, n_use]`` (-1 past each row's stage count), or None for greedy.

        None while ``train_beam`` is 1 or a used codebook is not yet initialised.
        Rows with ``k`` stages get ``encode``'s beam codes for ``k`` stages.
        """
        if self.train_beam == 1 or not all(bool(cb.initialised) for cb in self.codebooks[:n_use]):
            return None
        out = torch.full((z.shape[0], n_use), -1, dtype=torch.int64, device=z.device)
        books = [cb.codewords for cb in self.codebooks[:n_use]]
        for k in torch.unique(counts).tolist():
            rows = counts == k
            out[rows, :k] = beam_encode(z[rows], books[:k], beam=self.train_beam, metric=self.metric, chunk=self.chunk)
        return out

    @torch.no_grad()
    def _commit_chain(self, chain: _ChainStats) -> None:
        """Fold one step's per-stage figures into the moving averages (energy left, commitment).

        A stage with no real row, no input energy or a non-finite figure keeps
        its averages: one silent or extreme batch cannot poison them.
        """
        g = self.ema_decay
        tiny = torch.finfo(torch.float32).tiny
        for s in range(chain.rows.shape[0]):
            rows, energy = float(chain.rows[s]), float(chain.energy[s])
            if rows == 0 or not energy > tiny:
                continue
            left = chain.squared_error[s] / chain.energy[s]
            mse = chain.squared_error[s] / (chain.rows[s] * self.code_dim)
            if not (math.isfinite(float(left)) and math.isfinite(float(mse))):
                continue
            if int(self.stats_steps[s]) == 0:
                self.energy_left[s] = left
                self.stage_error[s] = mse
            else:
                moving_average_(self.energy_left[s], left, g)
                moving_average_(self.stage_error[s], mse, g)
            self.stats_steps[s] += 1

    # ------------------------------------------------------- encode and decode
    @torch.no_grad()
    def encode(self, x: torch.Tensor, stages: int | None = None, beam: int = 1) -> torch.Tensor:
        """Codes int64 ``[..., stages]`` for ``x``; no learning, deterministic.

        ``beam > 1`` searches over stages (beam search, see
        :func:`~rvqlayer.search.beam_encode`; by ``metric``) instead of choosing
        greedily stage by stage (:func:`~rvqlayer.search.greedy_encode`).
        """
        check_features("x", x, self.dim, self.axis)
        n_use = self._check_stages(stages)
        check_int("beam", beam, 1)
        rows, lead = self._flatten(x)
        z = _finite_lookup_input(self._project_in(rows))
        codes = self._encode_with(z, [cb.codewords for cb in self.codebooks[:n_use]], beam)
        return codes.reshape(*lead, n_use)

    @torch.no_grad()
    def decode(self, codes: torch.Tensor) -> torch.Tensor:
        """Vectors for ``codes`` ``[..., s]`` with ``1 <= s <= stages``; ``-1`` skips a stage.

        Returns ``[..., dim]`` with the feature axis moved to ``axis``, in the
        layer's dtype (that of its projections, or of ``.to(dtype)``).
        """
        self._check_codes(codes)
        needed = self.axis + 1 if self.axis >= 0 else -self.axis
        if codes.ndim < needed:
            raise fail("codes", f"at least {needed} dimensions for axis={self.axis}", f"shape {tuple(codes.shape)}")
        lead = codes.shape[:-1]
        flat = rearrange(codes, "... s -> (...) s").long()
        total = torch.zeros(flat.shape[0], self.code_dim, device=flat.device)
        for s in range(flat.shape[1]):
            c = flat[:, s]
            total = total + self.codebooks[s].lookup(c.clamp_min(0)) * (c >= 0).unsqueeze(1)
        return self._unflatten(self._project_out(total), lead).to(self.dtype_probe.dtype)

    def _check_codes(self, codes: Any) -> None:
        """Integer codes ``[..., s]``, ``1 <= s <= stages``, values in ``[-1, entries - 1]`` (-1: stage skipped)."""
        if not isinstance(codes, torch.Tensor):
            raise fail("codes", "a torch.Tensor", type(codes).__name__)
        if codes.dtype.is_floating_point or codes.dtype.is_complex or codes.dtype == torch.bool:
            raise fail("codes", "an integer tensor", f"dtype {codes.dtype}")
        if codes.ndim == 0 or not (1 <= codes.shape[-1] <= self.stages):
            raise fail("codes", f"of shape [..., s] with 1 <= s <= {self.stages}", f"shape {tuple(codes.shape)}")
        traced = torch.compiler.is_compiling()  # value-reading checks are for eager callers only
        if not traced and codes.numel() and (int(codes.min()) < -1 or int(codes.max()) >= self.entries):
            raise fail(
                "codes",
                f"in [0, {self.entries - 1}] (or -1 for a skipped stage)",
                f"values in [{int(codes.min())}, {int(codes.max())}]",
            )

    # ------------------------------------------------------------- refinement
    def _encode_with(self, z: torch.Tensor, books: list[torch.Tensor], beam: int) -> torch.Tensor:
        """Codes ``[n, len(books)]`` of lookup-space ``z`` ``[n, code_dim]`` with the given codewords."""
        if beam > 1:
            return beam_encode(z, books, beam=beam, metric=self.metric, chunk=self.chunk)
        return greedy_encode(z, books, metric=self.metric, chunk=self.chunk)

    @torch.no_grad()
    def refine(
        self,
        data: torch.Tensor,
        *,
        rounds: int = 3,
        beam: int = 1,
        method: FitMethod = "auto",
        chunk: int = 65536,
    ) -> list[float]:
        """Re-fit all stages' codewords jointly to ``data`` with the codes fixed, re-encode; a few rounds.

        Works in the lookup space (after ``project_in``, which is not changed).
        Each round solves for the codewords of every stage at once that
        minimise the total squared error of ``data`` for its current codes
        (:func:`rvqlayer.refine.fit_codewords`; memory bounded by ``chunk``
        rows and the number of codewords, not by the size of ``data``), then
        encodes ``data`` again with ``beam`` (1 = greedy); a round that does
        not lower that error is dropped, so the error on ``data`` never rises.
        Codebooks not yet initialised are first fitted by k-means, stage by
        stage. Afterwards the usage counts are those of the new codes (scaled
        to the previous total count), and for EMA layers the running sums are
        set so that the next EMA update starts from the refined codewords.
        Meant for offline use (a frozen encoder) on one process.

        Args:
            data: float tensor with ``dim`` features on ``axis``.
            rounds: at most this many rounds (>= 0).
            beam: beam width of the encoder the codewords are refined for.
            method: ``"auto"``, ``"joint"`` or ``"alternating"`` (see
                :func:`rvqlayer.refine.fit_codewords`).
            chunk: rows per block when accumulating.

        Returns:
            the mean squared error per lookup element on ``data`` before, then
            after each kept round.
        """
        check_features("data", data, self.dim, self.axis)
        check_int("rounds", rounds, 0)
        check_int("beam", beam, 1)
        check_choice("method", method, ("auto", "joint", "alternating"))
        check_int("chunk", chunk, 1)
        rows, _ = self._flatten(data)
        if rows.shape[0] == 0:
            raise fail("data", "at least one vector", "none")
        z = _finite_lookup_input(self._project_in(rows))
        residual = z
        for cb in self.codebooks:
            if not bool(cb.initialised):
                cb.initialise(residual)
            residual = residual - cb.lookup(cb.search(residual)[0])
        books = [cb.codewords.detach().float() for cb in self.codebooks]
        result = refine_codebooks(
            z, books, lambda x, b: self._encode_with(x, b, beam), rounds=rounds, method=method, chunk=chunk
        )
        for s, cb in enumerate(self.codebooks):
            usage = torch.bincount(result.codes[:, s], minlength=cb.entries).float()
            total = float(cb.ema_count.sum())
            usage = usage * (total / rows.shape[0]) if total > 0 else usage
            cb.ema_count.copy_(usage)
            cb.usage_count.copy_(usage)
            cb.codewords.data.copy_(result.codebooks[s].to(cb.codewords.dtype))
            if cb.update == "ema":
                # sums such that the layer's own formula m / N~ gives back the refined codewords
                per_count = smoothed_codewords(cb.ema_count, torch.ones_like(cb.ema_count).unsqueeze(1), cb.eps)
                cb.ema_sum.copy_(result.codebooks[s] / per_count)
            else:
                cb.previous_codewords.copy_(cb.codewords.detach())
        return result.errors

    # ------------------------------------------------------------------ health
    def stage_statistics(self, codes: torch.Tensor | None = None) -> list[StageStatistics]:
        """What the layer knows about each stage, as plain records (see :mod:`rvqlayer.health`).

        ``codes`` (int64 ``[..., s]``, ``-1`` for skipped stages) replaces the
        training usage by the use these codes make of each entry.
        """
        usage: list[torch.Tensor | None] = [None] * self.stages
        if codes is not None:
            self._check_codes(codes)
            flat = rearrange(codes, "... s -> (...) s").long()
            for s in range(flat.shape[1]):
                c = flat[:, s]
                usage[s] = torch.bincount(c[c >= 0], minlength=self.entries).float()
            usage = usage[: flat.shape[1]]
        return [
            StageStatistics(
                stage=s + 1,
                energy_left=float(self.energy_left[s]),
                commitment=float(self.stage_error[s]),
                steps=int(self.stats_steps[s]),
                **self.codebooks[s].statistics(usage[s]),
            )
            for s in range(len(usage))
        ]

    def health(self, dead_below: float | None = None, codes: torch.Tensor | None = None) -> HealthReport:
        """Per-stage usage, perplexity, dead codes, reseeds, energy left, commitment and drift.

        Computed from the statistics kept during training, or, with ``codes``
        (int64 ``[..., s]``, for example a held-out set's), usage and
        perplexity of those codes. ``dead_below`` (share of the uniform usage
        rate) defaults to ``reseed_below``.
        """
        return health_report(self.stage_statistics(codes), dead_below)

    def truncated(self, stages: int) -> MultiStageQuantizer:
        """An independent layer holding the first ``stages`` stages: a lower-bitrate model.

        Codebooks, their statistics, the per-stage health figures and the
        projections are copied (same dtypes and device); ``config()["stages"]``
        is ``stages``, every other option is unchanged, and so is the training
        mode. Its codes are the first ``stages`` codes of this layer's greedy
        codes, and it saves and loads like any other layer.

        >>> q = MultiStageQuantizer(4, stages=3, entries=8, init="random")
        >>> small = q.truncated(stages=2)
        >>> small.stages, torch.equal(small.codebooks[1].codewords, q.codebooks[1].codewords)
        (2, True)
        """
        keep = check_int("stages", stages, 1, self.stages)
        options = self.config()
        options["stages"] = keep
        with torch.random.fork_rng(devices=[]):  # building draws codewords; keep the caller's random stream
            small = MultiStageQuantizer(**options)
        state = {}
        for name, t in self.state_dict().items():
            if name.startswith("codebooks.") and int(name.split(".")[1]) >= keep:
                continue
            if name in ("energy_left", "stage_error", "stats_steps"):
                t = t[:keep]
            state[name] = t.detach().clone()
        small.load_state_dict(state, assign=True)
        return small.train(self.training)

    # ----------------------------------------------------------------- bitrate
    def bits_per_vector(self, stages: int | None = None) -> float:
        """Fixed-length bits per vector with the first ``stages`` codebooks."""
        return _bits_per_vector(self._check_stages(stages), self.entries)

    def bitrate(self, frame_rate: float, stages: int | None = None) -> float:
        """Bits per second at ``frame_rate`` vectors per second."""
        return _bitrate(frame_rate, self._check_stages(stages), self.entries)


def _finite_lookup_input(z: torch.Tensor) -> torch.Tensor:
    """``z`` in float32 (the dtype of every distance and statistic), checked to stay finite there.

    Rejects values that overflow float32, and vectors so long that squared
    distances between them would (norm above ``MAX_LOOKUP_NORM``).
    """
    lookup = z.float()
    if lookup.numel() and not torch.compiler.is_compiling():  # value-reading checks are for eager callers only
        if not all_finite(lookup):
            bad = int((~torch.isfinite(lookup)).sum())
            raise fail("x", "finite in float32 after the input projection", f"{bad} non-finite values")
        norms = _row_energy(lookup.detach())
        if not bool((norms <= MAX_LOOKUP_NORM**2).all()):
            raise fail(
                "x",
                f"vectors of norm at most {MAX_LOOKUP_NORM:.1e} in the lookup space (squared distances must stay "
                "finite in float32)",
                f"{int((~(norms <= MAX_LOOKUP_NORM**2)).sum())} longer vectors",
            )
    return lookup


@dataclass
class _ChainStats:
    """One training step's per-stage sums over real rows (summed over ranks by :meth:`all_reduce`).

    Attributes:
        squared_error: ``[S]`` squared error left after each stage.
        rows: ``[S]`` real rows that reached each stage.
        energy: ``[S]`` squared norm of those rows' input (lookup space).
    """

    squared_error: torch.Tensor
    rows: torch.Tensor
    energy: torch.Tensor

    @classmethod
    def empty(cls, stages: int, device: torch.device) -> _ChainStats:
        return cls(*torch.zeros(3, stages, device=device))

    def add(self, stage: int, **figures: torch.Tensor) -> None:
        for name, value in figures.items():
            getattr(self, name)[stage] = value

    def all_reduce(self) -> _ChainStats:
        packed = _dist.all_reduce_sum(torch.stack([self.squared_error, self.rows, self.energy]))
        return _ChainStats(*packed)


@dataclass
class _InitPlan:
    """k-means collection of one training step: rows to keep, batches and vectors seen, fits (None: still waiting)."""

    rows: torch.Tensor
    batches: int
    seen: int
    updates: list[StepUpdate] | None


def _layout_fields(layout: torch.Tensor) -> dict[str, Any]:
    values = [int(v) for v in layout.tolist()]
    named = dict(zip(_LAYOUT_NUMBERS, values))
    for (name, choices), v in zip(_LAYOUT_CHOICES.items(), values[len(_LAYOUT_NUMBERS) :]):
        named[name] = choices[v] if 0 <= v < len(choices) else f"<unknown {v}>"
    return named


def _check_loaded_state(
    module: MultiStageQuantizer,
    state_dict: dict[str, Any],
    prefix: str,
    local_metadata: Any,
    strict: bool,
    missing_keys: list[str],
    unexpected_keys: list[str],
    error_msgs: list[str],
) -> None:
    """Check a state before any of the layer's tensors is written: all or nothing.

    The state's ``layout`` must match the layer's (dim, entries, code_dim,
    update, metric); a state with more stages loads its first ``stages``
    (see :meth:`MultiStageQuantizer.truncated`); every tensor must have the
    layer's shape and finite values. A state without ``layout`` (written
    before it existed) is checked by shapes alone.
    """
    own = module.state_dict()
    key = prefix + "layout"
    if key in state_dict:
        layout = state_dict[key]
        if not isinstance(layout, torch.Tensor) or layout.shape != module.layout.shape:
            raise fail(f"state_dict[{key!r}]", f"a tensor of shape {tuple(module.layout.shape)}", repr(layout))
        theirs, ours = _layout_fields(layout), _layout_fields(module.layout)
        differ = [f"{n}={theirs[n]!r} (layer: {ours[n]!r})" for n in ours if theirs[n] != ours[n]]
        if differ:
            raise fail("state_dict", "the state of a layer with the same options", "one with " + ", ".join(differ))
    else:
        state_dict[key] = module.layout.clone()
    head = prefix + "codebooks."
    indices = {int(k[len(head) :].split(".", 1)[0]) for k in state_dict if k.startswith(head)}
    held = max(indices) + 1 if indices else 0
    if indices and held < module.stages:
        raise fail("state_dict", f"the state of at least {module.stages} stages", f"{held} stages")
    if held > module.stages:  # the first stages of a larger layer
        for k in [
            k for k in state_dict if k.startswith(head) and int(k[len(head) :].split(".", 1)[0]) >= module.stages
        ]:
            del state_dict[k]
        for name in ("energy_left", "stage_error", "stats_steps"):
            t = state_dict.get(prefix + name)
            if isinstance(t, torch.Tensor) and t.ndim == 1 and t.shape[0] == held:
                state_dict[prefix + name] = t[: module.stages]
    for name, ref in own.items():
        full = prefix + name
        if full not in state_dict:
            if strict:
                raise fail("state_dict", f"a value for {full!r}", "none")
            continue
        t = state_dict[full]
        if not isinstance(t, torch.Tensor):
            raise fail(f"state_dict[{full!r}]", "a tensor", type(t).__name__)
        if name == "init_rows":  # collected k-means rows: any count up to init_points
            limit = module.codebooks[0].init_points
            if t.ndim != 2 or t.shape[1] != ref.shape[1] or t.shape[0] > limit:
                raise fail(f"state_dict[{full!r}]", f"of shape [m, {ref.shape[1]}] with m <= {limit}", tuple(t.shape))
        elif t.shape != ref.shape:
            raise fail(f"state_dict[{full!r}]", f"of shape {tuple(ref.shape)}", f"shape {tuple(t.shape)}")
        if t.is_floating_point() and t.numel() and not bool(torch.isfinite(t).all()):
            raise fail(
                f"state_dict[{full!r}]",
                "finite (no NaN or Inf)",
                f"{int((~torch.isfinite(t)).sum())} non-finite values",
            )
    if strict:
        extra = sorted(k for k in state_dict if k.startswith(prefix) and k[len(prefix) :] not in own)
        if extra:
            raise fail("state_dict", "only this layer's tensors", f"unexpected {extra[:3]}")
    # Every check passed: the collected k-means rows take the incoming length, and the
    # ranks are compared again at the next training step.
    rows = state_dict.get(prefix + "init_rows")
    if "init_rows" in module._buffers and isinstance(rows, torch.Tensor):
        module._buffers["init_rows"] = module.init_rows.new_zeros(rows.shape)
    module._ranks_checked = False
