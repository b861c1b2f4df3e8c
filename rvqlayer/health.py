"""Codebook health report, computed from statistics the layer already keeps.

Every figure comes from buffers updated during training (no pass over data).
Those buffers are all-reduced inside each training step under
``torch.distributed``, so the report on any rank reflects all ranks.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

import torch

from ._checks import check_float


def perplexity(counts: torch.Tensor) -> float:
    """``exp(H)`` of the usage distribution ``counts`` ``[K]``, H the entropy in nats.

    Between 1 (a single used entry) and K (uniform use of all K entries);
    all-zero counts give 0 (nothing observed).

    >>> round(perplexity(torch.ones(8)), 6)
    8.0
    """
    return math.exp(entropy_nats(counts)) if float(counts.sum()) > 0 else 0.0


def entropy_nats(counts: torch.Tensor) -> float:
    """Shannon entropy ``-sum p log p`` (nats) of the usage distribution ``counts`` ``[K]``.

    ``p = counts / counts.sum()``; entries with ``p = 0`` add nothing
    (``0 log 0 = 0``). Negative counts are treated as 0.

    >>> round(entropy_nats(torch.tensor([1.0, 1.0, 0.0])), 6)  # log 2
    0.693147
    """
    c = counts.detach().double().clamp_min(0)
    total = c.sum()
    if float(total) <= 0:
        return 0.0
    p = c / total
    p = p[p > 0]  # after dividing: a tiny count can underflow to 0
    return float(-(p * p.log()).sum())


def _db(ratio: float) -> float:
    return 10.0 * math.log10(ratio) if ratio > 0 else float("-inf")


@dataclass
class StageHealth:
    """Health of one stage (1-based ``stage``).

    Attributes:
        usage: share of entries whose moving-average count is above the dead
            threshold (0..1).
        dead: number of entries below it.
        reseeds: codes reseeded so far.
        perplexity: from the moving-average counts (1..entries).
        batch_perplexity: from the last training batch's counts.
        energy_left: moving average of ``||residual after this stage||^2 /
            ||x||^2`` (lookup space); ``energy_left_db`` is the same in dB.
        commitment: moving average of the stage's squared error per element.
        drift: moving average of the mean codeword movement per update.
        entropy_bits: usage entropy in bits (what an entropy coder would need).
        bits: fixed-length bits of this stage, ``log2(entries)``.
        steps: training steps that fed the stage's energy and commitment
            averages (0: nothing measured yet, ``energy_left`` is then 1).
    """

    stage: int
    entries: int
    usage: float
    dead: int
    reseeds: int
    perplexity: float
    batch_perplexity: float
    energy_left: float
    energy_left_db: float
    commitment: float
    drift: float
    entropy_bits: float
    bits: float
    steps: int


@dataclass
class HealthReport:
    """Per-stage health and totals.

    Attributes:
        stages: one :class:`StageHealth` per stage.
        bits_per_vector: fixed-length bits of all stages.
        entropy_bits: sum of the stages' usage entropies (entropy-coded estimate).
        energy_left / energy_left_db: after the last stage.
    """

    stages: list[StageHealth] = field(default_factory=list)
    bits_per_vector: float = 0.0
    entropy_bits: float = 0.0
    energy_left: float = 1.0
    energy_left_db: float = 0.0

    def as_dict(self) -> dict[str, float]:
        """Flat ``{"stage<k>/<figure>": value, "<total figure>": value}``; k is 1-based."""
        out: dict[str, float] = {}
        for s in self.stages:
            for key, value in asdict(s).items():
                if key not in ("stage", "entries"):
                    out[f"stage{s.stage}/{key}"] = float(value)
        out.update(
            bits_per_vector=self.bits_per_vector,
            entropy_bits=self.entropy_bits,
            energy_left=self.energy_left,
            energy_left_db=self.energy_left_db,
        )
        return out

    def table(self) -> str:
        """A fixed-width text table, one row per stage and a total row."""
        head = (
            f"{'stage':>5} {'usage':>6} {'dead':>5} {'reseeds':>7} {'perplex':>8} {'batch_pp':>8} "
            f"{'left_dB':>8} {'commit':>9} {'drift':>9} {'H_bits':>6}"
        )
        lines = [head]
        for s in self.stages:
            lines.append(
                f"{s.stage:>5} {s.usage:>6.1%} {s.dead:>5} {s.reseeds:>7} {s.perplexity:>8.1f} "
                f"{s.batch_perplexity:>8.1f} {s.energy_left_db:>8.2f} {s.commitment:>9.3g} "
                f"{s.drift:>9.3g} {s.entropy_bits:>6.2f}"
            )
        lines.append(
            f"total: {self.bits_per_vector:.1f} bits/vector fixed, {self.entropy_bits:.1f} entropy-coded, "
            f"energy left {self.energy_left_db:.2f} dB"
        )
        return "\n".join(lines)


@dataclass(frozen=True)
class StageStatistics:
    """What a layer exposes about one stage; the input of :func:`health_report`.

    :meth:`MultiStageQuantizer.stage_statistics` builds these from the
    figures each part keeps where it computes them: the codebook its usage,
    reseeds and drift, the layer the chain figures (energy left, commitment).

    Attributes:
        stage: 1-based stage number.
        entries: codewords K.
        usage_counts: ``[K]`` moving average of the assignments actually made
            (reseeding does not count as use), or counts of given codes.
        batch_counts: ``[K]`` assignments in the last training batch.
        reseeds: codes reseeded so far.
        drift: moving average of the mean codeword movement per update.
        dead_share: default dead-code threshold, share of the uniform rate.
        energy_left: moving average of ``||residual after the stage||^2 / ||x||^2``.
        commitment: moving average of the stage's squared error per element.
        steps: training steps that fed ``energy_left`` and ``commitment``.
    """

    stage: int
    entries: int
    usage_counts: torch.Tensor
    batch_counts: torch.Tensor
    reseeds: int
    drift: float
    dead_share: float
    energy_left: float
    commitment: float
    steps: int


def stage_health(stats: StageStatistics, dead_below: float | None = None) -> StageHealth:
    """Health of one stage from its :class:`StageStatistics`."""
    share = stats.dead_share if dead_below is None else dead_below
    counts = stats.usage_counts
    dead = int((counts < share * counts.sum() / stats.entries).sum())
    return StageHealth(
        stage=stats.stage,
        entries=stats.entries,
        usage=1.0 - dead / stats.entries,
        dead=dead,
        reseeds=stats.reseeds,
        perplexity=perplexity(counts),
        batch_perplexity=perplexity(stats.batch_counts),
        energy_left=stats.energy_left,
        energy_left_db=_db(stats.energy_left),
        commitment=stats.commitment,
        drift=stats.drift,
        entropy_bits=entropy_nats(counts) / math.log(2.0),
        bits=math.log2(stats.entries),
        steps=stats.steps,
    )


def health_report(stats: Sequence[StageStatistics], dead_below: float | None = None) -> HealthReport:
    """The :class:`HealthReport` of a layer's per-stage statistics; a pure function.

    ``dead_below`` is the dead-code threshold as a share of the uniform usage
    rate, in ``(0, 1]``; ``None`` takes each stage's ``dead_share`` (the
    codebook's ``reseed_below``, 0.03 when reseeding is off).
    """
    if dead_below is not None:
        check_float("dead_below", dead_below, 0.0, 1.0, low_open=True)
    stages = [stage_health(s, dead_below) for s in stats]
    left = stages[-1].energy_left if stages else 1.0
    return HealthReport(
        stages=stages,
        bits_per_vector=sum(s.bits for s in stages),
        entropy_bits=sum(s.entropy_bits for s in stages),
        energy_left=left,
        energy_left_db=_db(left),
    )


def quantizer_health(quantizer: Any, dead_below: float | None = None) -> HealthReport:
    """The report of any layer with ``stage_statistics()``; changes nothing.

    >>> from rvqlayer import MultiStageQuantizer
    >>> torch.manual_seed(0) and None
    >>> q = MultiStageQuantizer(4, stages=2, entries=8)
    >>> _ = q(torch.randn(256, 4))
    >>> report = quantizer_health(q)
    >>> len(report.stages), report.bits_per_vector, report.stages[0].usage
    (2, 6.0, 1.0)
    """
    return health_report(quantizer.stage_statistics(), dead_below)
