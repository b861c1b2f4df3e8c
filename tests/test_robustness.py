"""Faults and hostile input: a step is all or nothing, loading is checked, statistics never lie."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from _layers import same_state, snapshot, trained
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from rvqlayer import MultiStageQuantizer, RvqlayerError, bitrate

_state = snapshot


def _unchanged(q, before) -> bool:
    return same_state(q.state_dict(), before)


def _trained(**kw) -> MultiStageQuantizer:
    return trained(0, **kw)


# --------------------------------------------------------- all-or-nothing step
def test_a_failing_stage_leaves_every_stage_untouched(monkeypatch):
    q = _trained()
    before = _state(q)

    def broken(*args, **kwargs):
        raise RuntimeError("stage 2 failed")

    monkeypatch.setattr(q.codebooks[1], "plan_step", broken)
    with pytest.raises(RuntimeError, match="stage 2"):
        q(torch.randn(64, 6))
    assert _unchanged(q, before)
    assert [int(cb.step) for cb in q.codebooks] == [3, 3, 3]


def test_first_step_failure_leaves_the_layer_uninitialised(monkeypatch):
    torch.manual_seed(1)
    q = MultiStageQuantizer(4, stages=2, entries=8)
    before = _state(q)
    monkeypatch.setattr(q.codebooks[1], "plan_step", lambda *a, **k: (_ for _ in ()).throw(RuntimeError("boom")))
    with pytest.raises(RuntimeError):
        q(torch.randn(64, 4))
    assert _unchanged(q, before) and not bool(q.codebooks[0].initialised)


# ------------------------------------------------------------------ input
def test_float64_values_that_overflow_float32_are_rejected_before_any_change():
    q = _trained()
    before = _state(q)
    x = torch.randn(32, 6, dtype=torch.float64) * 1e200
    with pytest.raises(RvqlayerError, match="`x`.*float32"):
        q(x)
    assert _unchanged(q, before)
    with pytest.raises(RvqlayerError, match="`x`"):
        q.eval().encode(x)


def test_decode_with_a_negative_axis_and_too_few_dimensions():
    q = MultiStageQuantizer(4, stages=2, entries=8, init="random", axis=-3).eval()
    with pytest.raises(RvqlayerError, match="`codes`.*3 dimensions"):
        q.decode(torch.zeros(5, 2, dtype=torch.int64))
    out = q.decode(torch.zeros(2, 5, 2, dtype=torch.int64))
    assert out.shape == (4, 2, 5)


@pytest.mark.parametrize(
    "options, arg",
    [
        (dict(entries=2**28), "entries"),
        (dict(stages=200_000), "stages"),
        (dict(stages=1024, entries=2**20), "stages \\* entries \\* code_dim"),
    ],
)
def test_huge_layers_are_refused_with_a_message(options, arg):
    with pytest.raises(RvqlayerError, match=f"`{arg}`"):
        MultiStageQuantizer(8, **options)
    with pytest.raises(RvqlayerError, match="`dim`"):
        MultiStageQuantizer(2**26)


def test_bitrate_takes_numpy_numbers_and_refuses_infinite_results():
    assert bitrate(np.float32(75.0), 2, 1024) == 1500.0
    assert bitrate(np.float64(75.0), np.int64(2), 1024) == 1500.0
    with pytest.raises(RvqlayerError, match="`frame_rate`"):
        bitrate(1e308, 8, 1024)


# ------------------------------------------------------------- statistics
def test_a_silent_batch_does_not_poison_energy_left():
    q = _trained()
    left = q.energy_left.clone()
    q(torch.zeros(64, 6))
    assert torch.isfinite(q.energy_left).all()
    torch.testing.assert_close(q.energy_left, left)
    q(torch.full((64, 6), 1e18))  # accepted, but the batch's energy sums overflow float32
    assert torch.isfinite(q.energy_left).all() and torch.isfinite(q.stage_error).all()
    before = _state(q)
    with pytest.raises(RvqlayerError, match="norm at most"):
        q(torch.full((64, 6), 1e19))  # squared distances would overflow: refused before any change
    assert _unchanged(q, before)


def test_steps_without_real_rows_change_nothing():
    q = _trained()
    before = _state(q)
    x = torch.randn(4, 10, 6)
    for _ in range(20):
        q(x, mask=torch.zeros(4, 10, dtype=torch.bool))
        q(torch.randn(0, 6))
    assert _unchanged(q, before)


# ------------------------------------------------------------- load_state_dict
def test_loading_a_state_with_nan_changes_nothing_and_names_the_tensor():
    q = _trained()
    before = _state(q)
    bad = _state(_trained())
    bad["codebooks.2.codewords"][3, 1] = float("nan")
    with pytest.raises(RvqlayerError, match=r"codebooks\.2\.codewords.*finite"):
        q.load_state_dict(bad)
    assert _unchanged(q, before)


def test_loading_a_state_of_another_metric_is_refused():
    q = _trained()
    other = _trained(metric="cosine")
    before = _state(q)
    with pytest.raises(RvqlayerError, match="metric='cosine'"):
        q.load_state_dict(other.state_dict())
    assert _unchanged(q, before)


def test_wrong_shapes_give_one_short_message():
    q = _trained()
    with pytest.raises(RvqlayerError) as info:
        q.load_state_dict(_trained(entries=32).state_dict())
    assert "entries=32" in str(info.value) and len(str(info.value).splitlines()) == 1


def test_first_stages_of_a_larger_layer_load():
    big = _trained(stages=3)
    small = MultiStageQuantizer(6, stages=2, entries=16)
    small.load_state_dict(big.state_dict())
    x = torch.randn(20, 6)
    assert torch.equal(small.eval().encode(x), big.eval().encode(x, stages=2))
    with pytest.raises(RvqlayerError, match="at least 4 stages"):
        MultiStageQuantizer(6, stages=4, entries=16).load_state_dict(big.state_dict())


def test_a_state_without_its_layout_still_loads():
    q = _trained()
    state = _state(q)
    del state["layout"]
    twin = MultiStageQuantizer(6, stages=3, entries=16)
    twin.load_state_dict(state)
    assert _unchanged(twin, _state(q))


# -------------------------------------------------------------------- dtypes
@pytest.mark.parametrize("code_dim", [3, 6])
@pytest.mark.parametrize("layer_dtype", [torch.float32, torch.float16, torch.bfloat16, torch.float64])
@pytest.mark.parametrize("input_dtype", [torch.float32, torch.bfloat16, torch.float64])
def test_every_dtype_combination_runs_and_keeps_dtypes(code_dim, layer_dtype, input_dtype, tmp_path):
    torch.manual_seed(0)
    q = MultiStageQuantizer(6, stages=2, entries=8, code_dim=code_dim).to(layer_dtype)
    x = torch.randn(64, 6).to(input_dtype)
    out = q(x)
    assert out.quantized.dtype == input_dtype and torch.isfinite(out.quantized.float()).all()
    q.eval()
    codes = q.encode(x)
    decoded = q.decode(codes)
    assert decoded.dtype == layer_dtype
    assert q(x).quantized.dtype == input_dtype
    for name in ("energy_left", "stage_error"):
        assert getattr(q, name).dtype == torch.float32
    assert q.codebooks[0].ema_count.dtype == torch.float32
    twin = MultiStageQuantizer(6, stages=2, entries=8, code_dim=code_dim).to(layer_dtype)
    twin.load_state_dict(q.state_dict())
    assert torch.equal(twin.eval().encode(x), codes)


# ---------------------------------------------------------------------- fuzz
_DTYPES = [torch.float32, torch.float64, torch.float16, torch.bfloat16, torch.int64]
_SPECIALS = [float("nan"), float("inf"), -float("inf"), 1e30, 1e200, 0.0]


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    lead=st.lists(st.integers(0, 5), min_size=0, max_size=3),
    axis_last=st.booleans(),
    dtype=st.sampled_from(_DTYPES),
    module_dtype=st.sampled_from([torch.float32, torch.float64, torch.bfloat16]),
    code_dim=st.sampled_from([2, 4]),
    special=st.one_of(st.none(), st.sampled_from(_SPECIALS)),
    position=st.integers(0, 10_000),
    masked=st.sampled_from(["none", "all", "none-real", "random", "wrong-shape"]),
    training=st.booleans(),
    stages=st.sampled_from([None, 1, 2, 0, 5]),
)
def test_fuzz_every_call_is_correct_or_a_clean_error(
    lead, axis_last, dtype, module_dtype, code_dim, special, position, masked, training, stages
):
    """Each call either returns finite, well-shaped output or raises RvqlayerError, with no buffer changed."""
    torch.manual_seed(position)
    q = MultiStageQuantizer(4, stages=2, entries=4, code_dim=code_dim, axis=-1 if axis_last else 0)
    q(torch.randn(32, 4).T.contiguous() if not axis_last else torch.randn(32, 4))  # initialised
    q = q.to(module_dtype).train(training)
    shape = list(lead) + [4] if axis_last else [4] + list(lead)
    x = (torch.randn(shape) * 3).to(dtype) if dtype != torch.int64 else torch.randint(-3, 3, shape)
    if special is not None and x.numel() and dtype != torch.int64:
        wide = x.double()
        wide.view(-1)[position % x.numel()] = special
        x = wide.to(dtype)  # 1e200 becomes inf in float32, 1e30 inf in float16
    vec_shape = tuple(lead)
    mask = {
        "none": None,
        "all": torch.ones(vec_shape, dtype=torch.bool),
        "none-real": torch.zeros(vec_shape, dtype=torch.bool),
        "random": torch.rand(vec_shape) < 0.5,
        "wrong-shape": torch.ones(tuple(lead) + (2,), dtype=torch.bool),
    }[masked]
    before = _state(q)
    float_x = dtype != torch.int64
    non_finite = float_x and not bool(torch.isfinite(x).all())
    overflow = float_x and bool((x.double().abs() > torch.finfo(torch.float32).max).any())
    expect_error = not float_x or non_finite or overflow or masked == "wrong-shape" or stages in (0, 5)
    try:
        out = q(x, mask=mask, stages=stages)
    except RvqlayerError:
        # 1e30 times a bfloat16/float32 projection can overflow float32: a documented rejection
        assert expect_error or special == 1e30, "unexpected rejection"
        assert _unchanged(q, before), "a rejected call changed state"
        return
    assert not expect_error, "bad input accepted"
    assert out.quantized.shape == x.shape and out.quantized.dtype == x.dtype
    n_use = stages or 2
    assert out.codes.shape == vec_shape + (n_use,)
    if special in (None, 0.0):
        assert torch.isfinite(out.quantized.float()).all()
    if not training or masked == "none-real" or x.numel() == 0:
        assert _unchanged(q, before), "a call that learns nothing changed state"
    for t in q.state_dict().values():
        if t.is_floating_point():
            assert torch.isfinite(t.float()).all(), "state became non-finite"
