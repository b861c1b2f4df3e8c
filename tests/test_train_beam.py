"""train_beam: forward encodes with beam search, and learns from those codes."""

import copy

import pytest
import torch

from rvqlayer import MultiStageQuantizer, RvqlayerError
from rvqlayer.ema import assignment_stats


def _trained(seed=0, **options):
    torch.manual_seed(seed)
    q = MultiStageQuantizer(4, stages=3, entries=16, init_restarts=1, reseed_below=0.0, **options)
    q(torch.randn(600, 4))  # k-means initialisation (greedy)
    return q


def test_eval_forward_gives_the_beam_codes_of_encode():
    q = _trained(train_beam=4).eval()
    x = torch.randn(200, 4)
    out = q(x)
    assert torch.equal(out.codes, q.encode(x, beam=4))
    torch.testing.assert_close(out.quantized, q.decode(out.codes))
    greedy = copy.deepcopy(q)
    greedy.train_beam = 1
    assert not torch.equal(greedy(x).codes, out.codes)  # beam 4 finds other paths for some of 200 vectors


def test_training_statistics_and_loss_use_the_beam_codes():
    q = _trained(train_beam=4, ema_decay=0.9)
    before = copy.deepcopy(q).eval()
    x = torch.randn(300, 4)
    out = q(x)
    expected = before.encode(x, beam=4)
    assert torch.equal(out.codes, expected)
    residual = x.clone()
    loss = torch.zeros(())
    for s, (cb_before, cb_after) in enumerate(zip(before.codebooks, q.codebooks)):
        counts, sums = assignment_stats(residual, expected[:, s], torch.ones(300), 16)
        torch.testing.assert_close(cb_after.last_count, counts)
        torch.testing.assert_close(cb_after.ema_count, 0.9 * cb_before.ema_count + 0.1 * counts)
        torch.testing.assert_close(cb_after.ema_sum, 0.9 * cb_before.ema_sum + 0.1 * sums)
        chosen = cb_before.codewords[expected[:, s]]
        loss = loss + 0.25 * ((residual - chosen) ** 2).mean()
        residual = residual - chosen
    torch.testing.assert_close(out.loss, loss)


def test_stage_dropout_rows_get_the_beam_codes_of_their_stage_count():
    q = _trained(train_beam=3, stage_dropout=1.0)
    before = copy.deepcopy(q).eval()
    x = torch.randn(64, 4)
    out = q(x)
    for k in range(1, 4):
        rows = out.stage_count == k
        if rows.any():
            assert torch.equal(out.codes[rows, :k], before.encode(x[rows], stages=k, beam=3))
            assert bool((out.codes[rows, k:] == -1).all())


def test_first_batch_is_encoded_greedily_and_beam_one_is_greedy():
    torch.manual_seed(0)
    a = MultiStageQuantizer(4, stages=2, entries=8, train_beam=5)
    torch.manual_seed(0)
    b = MultiStageQuantizer(4, stages=2, entries=8)
    x = torch.randn(100, 4)
    torch.manual_seed(1)
    out_a = a(x)
    torch.manual_seed(1)
    out_b = b(x)
    assert torch.equal(out_a.codes, out_b.codes)


def test_train_beam_must_be_a_positive_int():
    with pytest.raises(RvqlayerError, match="`train_beam`"):
        MultiStageQuantizer(4, train_beam=0)
