"""The multi-stage (residual) vector quantizer layer."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import torch
from torch import nn

from . import distributed as _dist
from ._checks import check_choice, check_features, check_float, check_int, check_mask, fail
from .bitrate import bitrate as _bitrate
from .bitrate import bits_per_vector as _bits_per_vector
from .codebook import Codebook, Init, Update
from .health import HealthReport, quantizer_health
from .search import Metric, beam_encode


@dataclass
class QuantizerOutput:
    """What :class:`MultiStageQuantizer` returns.

    Attributes:
        quantized: same shape and dtype as the input; the gradient reaches
            the input unchanged (straight-through estimator).
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
        reseed_below: dead-code threshold as a share of the uniform usage
            rate; 0 disables reseeding.
        stage_dropout: in training, the probability that an example keeps a
            random number of stages in ``1..stages`` instead of all of them.
        metric: ``"l2"`` or ``"cosine"`` nearest-code search.
        axis: the feature axis of the input (``1`` for ``[batch, channels, time]``).
        chunk: rows per distance block (bounds memory).
        eps: count smoothing of the EMA update.

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
        reseed_below: float = 0.03,
        stage_dropout: float = 0.0,
        metric: Metric = "l2",
        axis: int = -1,
        chunk: int = 4096,
        eps: float = 1e-5,
    ) -> None:
        super().__init__()
        self.dim = check_int("dim", dim, 1)
        self.stages = check_int("stages", stages, 1)
        self.entries = check_int("entries", entries, 1)
        code_dim = dim if code_dim is None else code_dim
        self.code_dim = check_int("code_dim", code_dim, 1, dim)
        self.update = check_choice("update", update, ("ema", "gradient"))
        self.beta = check_float("beta", beta, 0.0, float("inf"), high_open=True)
        self.stage_dropout = check_float("stage_dropout", stage_dropout, 0.0, 1.0)
        self.metric = check_choice("metric", metric, ("l2", "cosine"))
        self.axis = check_int("axis", axis, -(2**31))
        self.chunk = check_int("chunk", chunk, 1)
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
            "reseed_below": first.reseed_below,
            "stage_dropout": self.stage_dropout,
            "metric": self.metric,
            "axis": self.axis,
            "chunk": self.chunk,
            "eps": first.eps,
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
        moved = x.movedim(self.axis, -1)
        return moved.reshape(-1, self.dim), moved.shape[:-1]

    def _unflatten(self, rows: torch.Tensor, lead: torch.Size) -> torch.Tensor:
        out = rows.reshape(*lead, self.dim)
        return out.movedim(-1, self.axis) if out.ndim > 1 else out

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
        """
        check_features("x", x, self.dim, self.axis)
        n_use = self._check_stages(stages)
        rows, lead = self._flatten(x)
        if mask is not None:
            check_mask(mask, tuple(lead))
            real = mask.reshape(-1).to(rows.device)
        else:
            real = torch.ones(rows.shape[0], dtype=torch.bool, device=rows.device)
        stage_count = self._stage_counts(lead, n_use, rows.device)
        counts = stage_count.reshape(-1)

        z = self.project_in(rows)
        residual = z.float()
        total = torch.zeros_like(residual)
        codes = torch.full((rows.shape[0], n_use), -1, dtype=torch.int64, device=rows.device)
        loss = residual.new_zeros(())
        report = residual.new_zeros(3, n_use)  # squared error left, real rows, input energy
        signal = (residual.detach() ** 2).sum(-1)
        for s in range(n_use):
            used = counts > s
            learn = used & real
            stage_codes, q = self.codebooks[s](residual, learn)
            q = q * used.unsqueeze(1)
            codes[:, s] = torch.where(used, stage_codes, torch.full_like(stage_codes, -1))
            w = learn.float()
            denom = (w.sum() * self.code_dim).clamp_min(1.0)
            err = ((residual - q.detach()) ** 2).sum(-1)
            loss = loss + self.beta * (err * w).sum() / denom
            if self.update == "gradient":
                loss = loss + ((((residual.detach() - q) ** 2).sum(-1)) * w).sum() / denom
            if self.training:
                report[:, s] = torch.stack([(err.detach() * w).sum(), w.sum(), (signal * w).sum()])
            total = total + q.detach()
            residual = residual - q.detach()
        if self.training:
            self._record(report)

        # Straight-through: the value is the codeword sum, the gradient goes to z unchanged.
        zf = z.float()
        out = self.project_out(zf + (total - zf).detach())
        return QuantizerOutput(
            quantized=self._unflatten(out, lead).to(x.dtype),
            codes=codes.reshape(*lead, n_use),
            loss=loss,
            stage_count=stage_count,
        )

    @torch.no_grad()
    def _record(self, report: torch.Tensor) -> None:
        report = _dist.all_reduce_sum(report)
        err, rows, energy = report
        g = self.ema_decay
        for s in range(report.shape[1]):
            if float(rows[s]) == 0:
                continue
            left = err[s] / energy[s].clamp_min(torch.finfo(torch.float32).tiny)
            mse = err[s] / (rows[s] * self.code_dim)
            if int(self.stats_steps[s]) == 0:
                self.energy_left[s] = left
                self.stage_error[s] = mse
            else:
                self.energy_left[s] = g * self.energy_left[s] + (1 - g) * left
                self.stage_error[s] = g * self.stage_error[s] + (1 - g) * mse
            self.stats_steps[s] += 1

    # ------------------------------------------------------- encode and decode
    @torch.no_grad()
    def encode(self, x: torch.Tensor, stages: int | None = None, beam: int = 1) -> torch.Tensor:
        """Codes int64 ``[..., stages]`` for ``x``; no learning, deterministic.

        ``beam > 1`` searches over stages for the path of least squared error
        (beam search) instead of choosing greedily stage by stage.
        """
        check_features("x", x, self.dim, self.axis)
        n_use = self._check_stages(stages)
        check_int("beam", beam, 1)
        rows, lead = self._flatten(x)
        z = self.project_in(rows).float()
        if beam > 1:
            codes = beam_encode(z, [cb.codewords for cb in self.codebooks[:n_use]], beam=beam, chunk=self.chunk)
        else:
            codes = torch.empty(rows.shape[0], n_use, dtype=torch.int64, device=rows.device)
            for s in range(n_use):
                codes[:, s], _ = self.codebooks[s].search(z)
                z = z - self.codebooks[s].lookup(codes[:, s])
        return codes.reshape(*lead, n_use)

    @torch.no_grad()
    def decode(self, codes: torch.Tensor) -> torch.Tensor:
        """Vectors for ``codes`` ``[..., s]`` with ``1 <= s <= stages``; ``-1`` skips a stage.

        Returns ``[..., dim]`` with the feature axis moved to ``axis``.
        """
        if not isinstance(codes, torch.Tensor):
            raise fail("codes", "a torch.Tensor", type(codes).__name__)
        if codes.dtype.is_floating_point or codes.dtype.is_complex or codes.dtype == torch.bool:
            raise fail("codes", "an integer tensor", f"dtype {codes.dtype}")
        if codes.ndim == 0 or not (1 <= codes.shape[-1] <= self.stages):
            raise fail("codes", f"of shape [..., s] with 1 <= s <= {self.stages}", f"shape {tuple(codes.shape)}")
        if self.axis >= 0 and codes.ndim <= self.axis:
            raise fail(
                "codes", f"at least {self.axis + 1} dimensions for axis={self.axis}", f"shape {tuple(codes.shape)}"
            )
        if codes.numel() and (int(codes.min()) < -1 or int(codes.max()) >= self.entries):
            raise fail(
                "codes",
                f"in [0, {self.entries - 1}] (or -1 for a skipped stage)",
                f"values in [{int(codes.min())}, {int(codes.max())}]",
            )
        lead = codes.shape[:-1]
        flat = codes.reshape(-1, codes.shape[-1]).long()
        total = torch.zeros(flat.shape[0], self.code_dim, device=flat.device)
        for s in range(flat.shape[1]):
            c = flat[:, s]
            total = total + self.codebooks[s].lookup(c.clamp_min(0)) * (c >= 0).unsqueeze(1)
        return self._unflatten(self.project_out(total), lead)

    def health(self, dead_below: float | None = None) -> HealthReport:
        """Per-stage usage, perplexity, dead codes, reseeds, energy left, commitment and drift.

        Computed from the statistics kept during training; ``dead_below``
        (share of the uniform usage rate) defaults to ``reseed_below``.
        """
        return quantizer_health(self, dead_below)

    # ----------------------------------------------------------------- bitrate
    def bits_per_vector(self, stages: int | None = None) -> float:
        """Fixed-length bits per vector with the first ``stages`` codebooks."""
        return _bits_per_vector(self._check_stages(stages), self.entries)

    def bitrate(self, frame_rate: float, stages: int | None = None) -> float:
        """Bits per second at ``frame_rate`` vectors per second."""
        return _bitrate(frame_rate, self._check_stages(stages), self.entries)
