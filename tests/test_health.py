"""Health report: closed forms, figures against direct measurement, read-only."""

from __future__ import annotations

import copy
import math

import pytest
import scipy.stats
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from rvqlayer import HealthReport, MultiStageQuantizer, RvqlayerError, StageHealth
from rvqlayer.health import entropy_nats, perplexity, quantizer_health

# Shannon entropy H(p) = -sum_i p_i log p_i with 0 log 0 = 0 (C. E. Shannon, "A Mathematical
# Theory of Communication", Bell System Technical Journal 27, 1948, eq. for H; Cover & Thomas,
# "Elements of Information Theory", 2nd ed. 2006, eq. 2.1; both from memory). Perplexity = exp(H)
# in nats: K for uniform use of K entries (H = log K), 1 for a single used entry (H = 0).


@pytest.mark.parametrize("k", [1, 2, 7, 64, 1024])
def test_perplexity_of_uniform_usage_is_k(k: int) -> None:
    assert perplexity(torch.full((k,), 3.5)) == pytest.approx(k, rel=1e-12)
    assert entropy_nats(torch.ones(k)) == pytest.approx(math.log(k), abs=1e-12)


@pytest.mark.parametrize("k", [1, 5, 1024])
def test_perplexity_of_a_single_used_code_is_one(k: int) -> None:
    counts = torch.zeros(k)
    counts[k // 2] = 17.0
    assert perplexity(counts) == 1.0
    assert entropy_nats(counts) == 0.0


def test_perplexity_of_nothing_observed_is_zero() -> None:
    assert perplexity(torch.zeros(8)) == 0.0
    assert entropy_nats(torch.zeros(8)) == 0.0


@settings(max_examples=40, deadline=None)
@given(st.lists(st.floats(0.0, 1e6, allow_nan=False), min_size=1, max_size=50))
def test_entropy_matches_scipy_and_perplexity_bounds(values: list[float]) -> None:
    counts = torch.tensor(values, dtype=torch.float64)
    if float(counts.sum()) <= 0:
        assert perplexity(counts) == 0.0
        return
    # scipy.stats.entropy normalises pk and uses the natural log (SciPy reference documentation).
    assert entropy_nats(counts) == pytest.approx(float(scipy.stats.entropy(values)), abs=1e-9)
    used = int((counts > 0).sum())
    assert 1.0 - 1e-9 <= perplexity(counts) <= used * (1 + 1e-9)
    assert perplexity(counts * 123.0) == pytest.approx(perplexity(counts), rel=1e-9)


def _layer(**kw) -> MultiStageQuantizer:
    torch.manual_seed(0)
    options = dict(stages=3, entries=8, init="random", reseed_below=0.0, ema_decay=0.0)
    options.update(kw)
    return MultiStageQuantizer(6, **options)


def test_energy_left_matches_measured_error_on_the_batch() -> None:
    # ema_decay=0: the moving averages equal the last batch exactly. The training step looks codes up
    # with the codewords it starts with and then moves them (EMA update), so the reference is an
    # eval-mode pass through a copy taken just before that step.
    q = _layer()
    q.train()
    for _ in range(3):
        q(torch.randn(300, 6))
    x = 1.5 * torch.randn(400, 6) + 0.3
    before = copy.deepcopy(q).eval()
    q(x)
    report = q.health()
    codes = before.encode(x)
    energy = x.pow(2).sum(-1).mean()  # mean ||x||^2 per vector
    for k in range(1, 4):
        err = (x - before.decode(codes[:, :k])).pow(2)
        stage = report.stages[k - 1]
        assert stage.energy_left == pytest.approx(float(err.sum(-1).mean() / energy), rel=1e-5)
        assert stage.energy_left_db == pytest.approx(10 * math.log10(stage.energy_left), rel=1e-9)
        assert stage.commitment == pytest.approx(float(err.mean()), rel=1e-5)  # per element
    assert report.energy_left == report.stages[-1].energy_left
    assert report.energy_left < 1.0


def test_drift_is_the_mean_codeword_movement_of_the_last_update() -> None:
    q = _layer(stages=1)
    q.train()
    q(torch.randn(200, 6))  # first update does not count toward drift
    start = q.codebooks[0].codewords.clone()
    q(torch.randn(200, 6) + 1.0)
    moved = (q.codebooks[0].codewords - start).norm(dim=1).mean()
    assert q.health().stages[0].drift == pytest.approx(float(moved), rel=1e-5)
    assert float(moved) > 0


def test_usage_dead_perplexity_and_bits_from_known_counts() -> None:
    q = _layer(stages=2)
    first, second = q.codebooks
    # usage_count: the moving average of assignments actually made (what health reads)
    first.usage_count.copy_(torch.tensor([50.0, 30.0, 10.0, 0.01, 0.0, 0.0, 0.0, 0.0]))
    first.last_count.copy_(torch.tensor([4.0, 4.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0]))
    first.reseeds.fill_(7)
    second.usage_count.fill_(2.0)
    report = q.health(dead_below=0.03)
    s1, s2 = report.stages
    # uniform rate 90.01 / 8 = 11.25; under 0.03 of it: the 0.01 entry and the four empty ones.
    assert (s1.dead, s1.usage, s1.reseeds) == (5, 3 / 8, 7)
    assert s1.perplexity == pytest.approx(math.exp(scipy.stats.entropy([50, 30, 10, 0.01])), rel=1e-6)
    assert s1.batch_perplexity == pytest.approx(2.0, rel=1e-9)
    assert (s2.dead, s2.usage, s2.perplexity) == (0, 1.0, pytest.approx(8.0))
    assert s1.bits == s2.bits == 3.0 and report.bits_per_vector == 6.0 == q.bits_per_vector()
    assert report.entropy_bits == pytest.approx(s1.entropy_bits + s2.entropy_bits)
    assert s2.entropy_bits == pytest.approx(3.0)
    # at the full uniform rate the entry with 10 counts is dead too
    assert q.health(dead_below=1.0).stages[0].dead == 6


def test_health_changes_no_state_and_reports_every_stage() -> None:
    q = _layer()
    q.train()
    q(torch.randn(100, 6))
    state = {k: v.clone() for k, v in q.state_dict().items()}
    report = q.health()
    assert isinstance(report, HealthReport) and all(isinstance(s, StageHealth) for s in report.stages)
    assert [s.stage for s in report.stages] == [1, 2, 3]
    assert all(s.steps == 1 for s in report.stages)
    for key, value in q.state_dict().items():
        assert torch.equal(value, state[key]), key


def test_as_dict_and_table() -> None:
    q = _layer()
    q.train()
    q(torch.randn(100, 6))
    report = quantizer_health(q)
    flat = report.as_dict()
    assert flat["stage2/perplexity"] == report.stages[1].perplexity
    assert flat["energy_left_db"] == report.energy_left_db
    assert {f"stage{k}/usage" for k in (1, 2, 3)} <= set(flat)
    assert all(isinstance(v, float) for v in flat.values())
    lines = report.table().splitlines()
    assert len(lines) == 1 + 3 + 1 and lines[0].split()[0] == "stage"
    assert lines[-1].startswith("total: 9.0 bits/vector")


@pytest.mark.parametrize("bad", [0.0, -0.1, 1.5])
def test_dead_below_is_checked(bad: float) -> None:
    with pytest.raises(RvqlayerError, match="`dead_below`"):
        _layer().health(dead_below=bad)


def test_reseeds_do_not_read_as_use() -> None:
    # Every vector goes to one code; the others are reseeded each step, which resets their
    # reseeding count (ema_count) but is no use of them.
    torch.manual_seed(0)
    q = MultiStageQuantizer(2, stages=1, entries=8, init="random", reseed_below=0.5, ema_decay=0.0)
    cb = q.codebooks[0]
    x = torch.full((64, 2), 5.0)  # the winner sits on it; reseeded codes land 1% of its scale away
    for _ in range(12):
        q(x)
    stage = q.health().stages[0]
    assert int(cb.reseeds) > 0
    assert stage.usage <= 2 / 8 and stage.perplexity < 1.5


def test_health_of_given_codes_counts_their_use() -> None:
    q = _layer(stages=2)
    codes = torch.tensor([[0, 1], [0, 2], [1, -1], [0, 3]])
    report = q.health(codes=codes)
    s1, s2 = report.stages
    # stage 1 uses entries 0 (3x) and 1 (1x) of 8; stage 2 uses 1, 2, 3 once each (-1: stage left out)
    assert (s1.dead, s2.dead) == (6, 5)
    assert s1.perplexity == pytest.approx(math.exp(scipy.stats.entropy([3, 1])), rel=1e-6)
    assert s2.perplexity == pytest.approx(3.0, rel=1e-6)
    assert len(q.health(codes=codes[:, :1]).stages) == 1
    with pytest.raises(RvqlayerError, match="`codes`"):
        q.health(codes=torch.tensor([[0, 8]]))
