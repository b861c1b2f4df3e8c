"""MultiStageQuantizer behaviour: gradients, stage dropout, masks, axis, state, errors, properties."""

import copy
import pickle

import pytest
import torch
from _layers import same_state, snapshot, trained
from hypothesis import given, settings
from hypothesis import strategies as st

from rvqlayer import MultiStageQuantizer, RvqlayerError

_trained, _buffers, _same = trained, snapshot, same_state


# ------------------------------------------------------------------ gradients
def test_straight_through_gradient_is_identity():
    q = _trained()
    x = torch.randn(20, 6, requires_grad=True)
    out = q(x)
    w = torch.randn_like(x)
    (out.quantized * w).sum().backward()
    torch.testing.assert_close(x.grad, w)


def test_commitment_gradient_matches_closed_form():
    # loss = beta * sum_k mean ||r_k - sg(q_k)||^2 / d  ->  d loss / dx = 2 beta / (n d) * sum_k r_{k+1}
    q = _trained(beta=0.7).eval()
    x = torch.randn(30, 6, requires_grad=True)
    out = q(x)
    out.loss.backward()
    r = x.detach().clone()
    expected = torch.zeros_like(r)
    for s in range(q.stages):
        r = r - q.codebooks[s].lookup(out.codes[:, s])
        expected += 2 * 0.7 / (30 * 6) * r
    torch.testing.assert_close(x.grad, expected)


def test_gradient_update_adds_codebook_loss():
    torch.manual_seed(1)
    q = MultiStageQuantizer(4, stages=1, entries=8, update="gradient", beta=0.25, init="random")
    x = torch.randn(64, 4)
    out = q(x)
    cw = q.codebooks[0].codewords
    mse = ((x - cw[out.codes[:, 0]]) ** 2).mean()
    torch.testing.assert_close(out.loss, 1.25 * mse)
    out.loss.backward()
    assert cw.grad is not None and float(cw.grad.abs().sum()) > 0


# -------------------------------------------------------------- stage dropout
def test_stage_dropout_rate_and_uniform_counts():
    torch.manual_seed(2)
    q = MultiStageQuantizer(2, stages=4, entries=4, stage_dropout=0.5, init="random", reseed_below=0.0)
    counts = torch.cat([q(torch.randn(500, 3, 2)).stage_count[:, 0] for _ in range(8)])
    n = counts.numel()
    # P(fewer than 4 stages) = p * 3/4 = 0.375; binomial sd = sqrt(n p (1-p)) -> 4 sd tolerance
    share = float((counts < 4).float().mean())
    assert abs(share - 0.375) < 4 * (0.375 * 0.625 / n) ** 0.5
    for k in (1, 2, 3):
        assert abs(float((counts == k).float().mean()) - 0.125) < 4 * (0.125 * 0.875 / n) ** 0.5


def test_stage_count_constant_within_example_and_off_in_eval():
    torch.manual_seed(3)
    q = MultiStageQuantizer(2, stages=4, entries=4, stage_dropout=1.0, init="random")
    out = q(torch.randn(16, 10, 2))
    assert bool((out.stage_count == out.stage_count[:, :1]).all())
    assert bool(((out.codes >= 0).sum(-1) == out.stage_count).all())
    q.eval()
    assert bool((q(torch.randn(16, 10, 2)).stage_count == 4).all())
    assert bool((q(torch.randn(16, 10, 2), stages=2).stage_count == 2).all())


def test_dropped_stages_add_nothing():
    torch.manual_seed(4)
    q = MultiStageQuantizer(3, stages=4, entries=8, stage_dropout=1.0, ema_decay=0.0, reseed_below=0.0)
    x = torch.randn(40, 5, 3)
    q(x)  # k-means initialisation
    before = copy.deepcopy(q).eval()  # the codewords this step's lookup uses
    out = q(x)
    torch.testing.assert_close(out.quantized.detach(), before.decode(out.codes), rtol=0, atol=1e-6)
    for s in range(4):
        active = int((out.stage_count > s).sum())
        assert float(q.codebooks[s].last_count.sum()) == active


# ---------------------------------------------------------------------- mask
def test_mask_keeps_padding_out_of_statistics_and_loss():
    torch.manual_seed(5)
    q = MultiStageQuantizer(3, stages=2, entries=8, ema_decay=0.0, reseed_below=0.0)
    x = torch.randn(4, 12, 3)
    mask = torch.zeros(4, 12, dtype=torch.bool)
    mask[:, :7] = True
    garbage = x.clone()
    garbage[~mask] = 1e3
    torch.manual_seed(6)
    out = q(garbage, mask=mask)
    ref = MultiStageQuantizer(3, stages=2, entries=8, ema_decay=0.0, reseed_below=0.0)
    torch.manual_seed(6)
    ref_out = ref(x[:, :7])
    for a, b in zip(q.codebooks, ref.codebooks):
        torch.testing.assert_close(a.codewords, b.codewords)
        assert float(a.last_count.sum()) == 28
    torch.testing.assert_close(out.loss, ref_out.loss)
    torch.testing.assert_close(q.energy_left, ref.energy_left)


# ---------------------------------------------------------------------- axis
def test_axis_one_equals_channels_last():
    x = torch.randn(3, 6, 9)
    torch.manual_seed(7)
    a = MultiStageQuantizer(6, stages=2, entries=8, axis=1)
    out_a = a(x)
    torch.manual_seed(7)
    b = MultiStageQuantizer(6, stages=2, entries=8)
    out_b = b(x.transpose(1, 2))
    torch.testing.assert_close(out_a.quantized, out_b.quantized.transpose(1, 2))
    assert torch.equal(out_a.codes, out_b.codes)
    a.eval()
    codes = a.encode(x)
    assert codes.shape == (3, 9, 2)
    torch.testing.assert_close(a.decode(codes), a(x).quantized)


# ------------------------------------------------------ state and determinism
def test_state_dict_keys():
    q = MultiStageQuantizer(4, stages=2, entries=8)
    keys = set(q.state_dict())
    for s in range(2):
        for name in ("codewords", "ema_sum", "ema_count", "last_count", "ema_drift", "initialised", "step", "reseeds"):
            assert f"codebooks.{s}.{name}" in keys
    assert {"energy_left", "stage_error", "stats_steps"} <= keys
    halved = q.half().state_dict()
    assert all(v.dtype != torch.float16 for v in halved.values()), "statistics must stay float32 under .half()"


def test_state_dict_round_trip_and_bit_exact_resume():
    def run(q, steps, seed_state=None):
        for _ in range(steps):
            q(torch.randn(64, 5, 4))

    torch.manual_seed(8)
    full = MultiStageQuantizer(4, stages=3, entries=16, stage_dropout=0.5)
    run(full, 6)
    final = _buffers(full)

    torch.manual_seed(8)
    part = MultiStageQuantizer(4, stages=3, entries=16, stage_dropout=0.5)
    run(part, 3)
    saved, rng = copy.deepcopy(part.state_dict()), torch.get_rng_state()
    resumed = MultiStageQuantizer(4, stages=3, entries=16, stage_dropout=0.5)
    resumed.load_state_dict(saved)
    torch.set_rng_state(rng)
    run(resumed, 3)
    assert _same(_buffers(resumed), final)


def test_reproducible_under_manual_seed():
    a, b = _trained(9, stage_dropout=0.3), _trained(9, stage_dropout=0.3)
    assert _same(_buffers(a), _buffers(b))


def test_eval_never_changes_buffers():
    q = _trained(10)
    q.eval()
    before = _buffers(q)
    q(torch.randn(50, 6))
    q.encode(torch.randn(50, 6), beam=3)
    assert _same(before, _buffers(q))


def test_pickle_and_deepcopy():
    q = _trained(11).eval()
    x = torch.randn(10, 6)
    for clone in (pickle.loads(pickle.dumps(q)), copy.deepcopy(q)):
        assert torch.equal(clone.encode(x), q.encode(x))


# --------------------------------------------------------- encode and decode
def test_decode_fewer_stages_and_skips():
    q = _trained(12).eval()
    x = torch.randn(25, 6)
    codes = q.encode(x)
    two = q.decode(codes[:, :2])
    torch.testing.assert_close(two, q(x, stages=2).quantized)
    skipped = codes.clone()
    skipped[:, 2] = -1
    torch.testing.assert_close(q.decode(skipped), two)
    errs = [float(((q.decode(codes[:, :k]) - x) ** 2).mean()) for k in (1, 2, 3)]
    assert errs[0] > errs[1] > errs[2]


def test_beam_encode_lowers_error():
    q = _trained(13, stages=4).eval()
    x = torch.randn(400, 6)
    e1 = float(((q.decode(q.encode(x)) - x) ** 2).mean())
    e8 = float(((q.decode(q.encode(x, beam=8)) - x) ** 2).mean())
    assert e8 < e1


def test_projection_when_code_dim_smaller():
    torch.manual_seed(14)
    q = MultiStageQuantizer(10, stages=2, entries=8, code_dim=3)
    names = {n for n, _ in q.named_parameters()}
    assert {"project_in.weight", "project_out.weight"} <= names
    out = q(torch.randn(7, 10))
    assert out.quantized.shape == (7, 10) and q.codebooks[0].codewords.shape == (8, 3)


def test_cosine_and_autocast_forward():
    torch.manual_seed(15)
    q = MultiStageQuantizer(8, stages=2, entries=8, metric="cosine")
    x = torch.randn(4, 20, 8)
    assert q(x).quantized.shape == x.shape
    q2 = MultiStageQuantizer(8, stages=2, entries=8, code_dim=4)
    with torch.autocast("cpu", dtype=torch.bfloat16):
        out = q2(x)
    assert out.quantized.dtype == x.dtype
    assert torch.isfinite(out.loss)


def test_bitrate_and_repr():
    q = MultiStageQuantizer(128, stages=8, entries=1024)
    assert q.bits_per_vector() == 80.0 and q.bits_per_vector(stages=2) == 20.0
    assert q.bitrate(75.0, stages=2) == 1500.0
    text = repr(q)
    assert "dim=128, stages=8, entries=1024" in text


# ------------------------------------------------------------------ bad input
@pytest.mark.parametrize(
    "make, arg",
    [
        (lambda: torch.randn(5, 7), "`x`"),
        (lambda: torch.tensor(1.0), "`x`"),
        (lambda: torch.ones(5, 6, dtype=torch.int64), "`x`"),
        (lambda: torch.full((5, 6), float("nan")), "`x`"),
        (lambda: torch.tensor([[float("inf")] * 6]), "`x`"),
    ],
)
def test_bad_input_rejected_without_state_change(make, arg):
    q = _trained(16).train()
    before = _buffers(q)
    with pytest.raises(RvqlayerError, match=arg):
        q(make())
    assert _same(before, _buffers(q))


def test_bad_mask_and_stages():
    q = _trained(17)
    before = _buffers(q)
    x = torch.randn(4, 5, 6)
    with pytest.raises(RvqlayerError, match="`mask`"):
        q(x, mask=torch.ones(4, 6, dtype=torch.bool))
    with pytest.raises(RvqlayerError, match="`mask`"):
        q(x, mask=torch.ones(4, 5))
    with pytest.raises(RvqlayerError, match="`stages`"):
        q(x, stages=4)
    with pytest.raises(RvqlayerError, match="`beam`"):
        q.encode(x, beam=0)
    assert _same(before, _buffers(q))


@pytest.mark.parametrize(
    "codes, needle",
    [
        (torch.tensor([[16, 0, 0]]), "in \\[0, 15\\]"),
        (torch.tensor([[-2, 0, 0]]), "in \\[0, 15\\]"),
        (torch.zeros(2, 4, dtype=torch.int64), "shape"),
        (torch.zeros(2, 3), "integer"),
        (torch.tensor(3), "shape"),
    ],
)
def test_bad_codes(codes, needle):
    q = _trained(18).eval()
    with pytest.raises(RvqlayerError, match="`codes`.*" + needle):
        q.decode(codes)


@pytest.mark.parametrize(
    "kw, arg",
    [
        (dict(stages=0), "stages"),
        (dict(entries=0), "entries"),
        (dict(code_dim=9), "code_dim"),
        (dict(update="adam"), "update"),
        (dict(ema_decay=1.0), "ema_decay"),
        (dict(beta=-1.0), "beta"),
        (dict(init="zeros"), "init"),
        (dict(reseed_below=2.0), "reseed_below"),
        (dict(stage_dropout=1.5), "stage_dropout"),
        (dict(metric="dot"), "metric"),
        (dict(chunk=0), "chunk"),
        (dict(stages=2.5), "stages"),
    ],
)
def test_bad_options_name_the_argument(kw, arg):
    with pytest.raises(RvqlayerError, match=f"`{arg}`"):
        MultiStageQuantizer(8, **kw)


def test_unknown_option_rejected():
    with pytest.raises(TypeError):
        MultiStageQuantizer(8, stagez=3)


# ------------------------------------------------------------------ property
@settings(max_examples=25, deadline=None)
@given(
    lead=st.lists(st.integers(1, 4), min_size=1, max_size=3),
    dim=st.integers(1, 5),
    stages=st.integers(1, 3),
    use=st.integers(1, 3),
    feature_first=st.booleans(),
    seed=st.integers(0, 1000),
)
def test_shapes_and_round_trip(lead, dim, stages, use, feature_first, seed):
    use = min(use, stages)
    torch.manual_seed(seed)
    axis = 1 if feature_first and len(lead) >= 1 else -1
    q = MultiStageQuantizer(dim, stages=stages, entries=4, axis=axis, stage_dropout=0.5)
    shape = list(lead)
    shape.insert(axis if axis >= 0 else len(shape), dim)
    x = torch.randn(*shape)
    out = q(x)
    vec_shape = tuple(torch.movedim(x, axis, -1).shape[:-1])
    assert out.quantized.shape == x.shape
    assert out.codes.shape == vec_shape + (stages,)
    assert out.stage_count.shape == vec_shape
    assert int(out.codes.max()) < 4 and int(out.codes.min()) >= -1
    q.eval()
    codes = q.encode(x, stages=use)
    assert codes.shape == vec_shape + (use,) and int(codes.min()) >= 0
    torch.testing.assert_close(q.decode(codes), q(x, stages=use).quantized, rtol=0, atol=1e-5)


# --------------------------------------------------------------- configuration
def test_config_rebuilds_an_identical_layer():
    options = dict(
        dim=12,
        stages=3,
        entries=32,
        code_dim=6,
        update="gradient",
        ema_decay=0.9,
        beta=0.5,
        init="random",
        init_iters=4,
        init_restarts=2,
        init_points=1000,
        init_batches=3,
        reseed_below=0.1,
        stage_dropout=0.3,
        metric="cosine",
        axis=1,
        chunk=128,
        eps=1e-4,
        train_beam=4,
        estimator="rotation",
    )
    q = MultiStageQuantizer(**options)
    assert q.config() == options
    defaults = MultiStageQuantizer(12).config()
    assert all(defaults[k] != v for k, v in options.items() if k != "dim"), "every option must differ from its default"
    twin = MultiStageQuantizer(**q.config())
    assert twin.config() == q.config()
    assert repr(twin) == repr(q)
    assert twin.state_dict().keys() == q.state_dict().keys()
    twin.load_state_dict(q.state_dict())
    x = torch.randn(2, 12, 5)
    torch.testing.assert_close(twin.eval().decode(twin.encode(x)), q.eval().decode(q.encode(x)))


# ------------------------------------------------------ init over several batches
def _cluster_batch(centre: float, n: int = 50) -> torch.Tensor:
    g = torch.Generator().manual_seed(int(centre) + 100)
    return centre + 0.1 * torch.randn(n, 2, generator=g)


def test_init_waits_for_init_batches_and_learns_nothing_before():
    torch.manual_seed(0)
    q = MultiStageQuantizer(2, stages=2, entries=3, init_batches=3)
    start = {k: v.clone() for k, v in q.state_dict().items()}
    for i, centre in enumerate((0.0, 20.0)):
        x = _cluster_batch(centre)
        out = q(x)
        # Before initialisation: the codes of the construction-time codewords, nothing learned.
        torch.testing.assert_close(out.codes, q.eval().encode(x))
        q.train()
        assert not any(bool(cb.initialised) for cb in q.codebooks)
        assert q.init_rows.shape == (50 * (i + 1), 2)
        for key, value in q.state_dict().items():
            if key not in ("init_rows", "init_seen"):
                assert torch.equal(value, start[key]), key
    q(_cluster_batch(40.0))
    assert all(bool(cb.initialised) for cb in q.codebooks)
    assert q.init_rows.shape == (0, 2) and q.init_seen.tolist() == [3, 150]
    # The fit saw all three batches: one codeword per cluster (the first batch alone has one cluster).
    first = q.codebooks[0].codewords[:, 0].sort().values
    torch.testing.assert_close(first, torch.tensor([0.0, 20.0, 40.0]), atol=0.1, rtol=0)


def test_init_fits_early_once_init_points_are_collected():
    torch.manual_seed(1)
    q = MultiStageQuantizer(2, stages=1, entries=3, init_batches=5, init_points=80)
    q(_cluster_batch(0.0))
    assert not bool(q.codebooks[0].initialised)
    q(_cluster_batch(20.0))  # 100 vectors seen, 80 kept: fitted at the second batch
    assert bool(q.codebooks[0].initialised)
    assert q.init_seen.tolist() == [2, 100]
    # counts start on the scale of one batch (50 vectors), as the EMA counts are
    assert float(q.codebooks[0].ema_count.sum()) == pytest.approx(50.0, rel=0.05)


def test_resume_during_init_collection_is_bit_exact():
    torch.manual_seed(2)
    a = MultiStageQuantizer(2, stages=2, entries=4, init_batches=3)
    a(_cluster_batch(0.0))
    a(_cluster_batch(20.0))
    torch.manual_seed(99)
    b = MultiStageQuantizer(2, stages=2, entries=4, init_batches=3)
    b.load_state_dict(a.state_dict())
    for q in (a, b):
        torch.manual_seed(3)
        q(_cluster_batch(40.0))
        q(_cluster_batch(10.0))
    for key, value in a.state_dict().items():
        assert torch.equal(value, b.state_dict()[key]), key


def test_fully_masked_batches_do_not_count_as_init_data():
    torch.manual_seed(4)
    q = MultiStageQuantizer(2, stages=1, entries=3)
    x = _cluster_batch(0.0)
    out = q(x, mask=torch.zeros(50, dtype=torch.bool))
    assert int(out.codes.min()) >= 0 and not bool(q.codebooks[0].initialised)
    assert int(q.codebooks[0].step) == 0
    q(x)
    assert bool(q.codebooks[0].initialised)


@pytest.mark.parametrize("update", ["ema", "gradient"])
def test_loss_and_gradient_match_the_autograd_formula(update):
    # The commitment loss's gradient is accumulated in forward (one [n, d] tensor kept);
    # it must equal autograd through beta * sum_s mean_w ||r_s - sg(q_s)||^2 + the straight-through output.
    torch.manual_seed(21)
    q = MultiStageQuantizer(5, stages=3, entries=8, update=update, stage_dropout=0.5, init="random", beta=0.3)
    x = torch.randn(6, 7, 5)
    mask = torch.rand(6, 7) > 0.2
    before = copy.deepcopy(q)
    xa = x.clone().requires_grad_(True)
    out = q(xa, mask=mask)
    (out.loss + (out.quantized * torch.linspace(-1, 1, 5)).sum()).backward()

    xb = x.clone().requires_grad_(True)
    rows, codes = xb.reshape(-1, 5), out.codes.reshape(-1, 3)
    real = mask.reshape(-1)
    r, total, ref = rows, torch.zeros(rows.shape), torch.zeros(())
    for s, cb in enumerate(before.codebooks):
        used = codes[:, s] >= 0
        w = (used & real).float()
        qs = cb.codewords[codes[:, s].clamp_min(0)] * used.unsqueeze(1)
        denom = (w.sum() * 5).clamp_min(1.0)
        ref = ref + 0.3 * (((r - qs.detach()) ** 2).sum(-1) * w).sum() / denom
        if update == "gradient":
            ref = ref + (((r.detach() - qs) ** 2).sum(-1) * w).sum() / denom
        total, r = total + qs.detach(), r - qs.detach()
    ste = rows + (total - rows).detach()
    (ref + (ste * torch.linspace(-1, 1, 5)).sum()).backward()
    torch.testing.assert_close(out.loss, ref)
    torch.testing.assert_close(xa.grad, xb.grad)
    torch.testing.assert_close(out.quantized.reshape(-1, 5), total)
    if update == "gradient":
        # q's codeword gradient: only the codebook term reaches the codewords.
        for cb, cb_ref in zip(q.codebooks, before.codebooks):
            torch.testing.assert_close(cb.codewords.grad, cb_ref.codewords.grad)


@pytest.mark.parametrize("bad", [float("nan"), float("inf"), -float("inf")])
def test_one_non_finite_value_anywhere_is_rejected(bad):
    q = MultiStageQuantizer(6, stages=2, entries=8)
    for where in (0, 17, 59):
        x = torch.randn(10, 6)
        x.view(-1)[where] = bad
        with pytest.raises(RvqlayerError, match="finite"):
            q(x)
        with pytest.raises(RvqlayerError, match="finite"):
            q.encode(x)


def test_backward_twice_with_retained_graph_gives_twice_the_gradient():
    torch.manual_seed(22)
    q = MultiStageQuantizer(6, stages=3, entries=8, init="random")
    x = torch.randn(40, 6, requires_grad=True)
    out = q(x)
    total = out.loss + out.quantized.sum()
    total.backward(retain_graph=True)
    once = x.grad.clone()
    total.backward()
    torch.testing.assert_close(x.grad, 2 * once)
