"""MultiStageQuantizer.truncated: a lower-bitrate layer made from the first stages of a trained one."""

from __future__ import annotations

import pytest
import torch

from rvqlayer import MultiStageQuantizer, RvqlayerError
from rvqlayer.export import load_codebooks, save_codebooks


def _trained(**options) -> MultiStageQuantizer:
    torch.manual_seed(0)
    q = MultiStageQuantizer(6, stages=4, entries=16, **options)
    for _ in range(5):
        q(torch.randn(256, 6))
    return q.eval()


@pytest.mark.parametrize("options", [{}, {"code_dim": 3}, {"update": "gradient", "metric": "cosine"}])
@pytest.mark.parametrize("keep", [1, 2, 4])
def test_truncated_layer_holds_the_first_stages(options, keep):
    q = _trained(**options)
    small = q.truncated(stages=keep)
    assert small.config() == {**q.config(), "stages": keep}
    assert not small.training
    x = torch.randn(50, 6)
    assert torch.equal(small.encode(x), q.encode(x)[:, :keep])
    codes = q.encode(x)[:, :keep]
    assert torch.equal(small.decode(codes), q.decode(codes))
    big = q.state_dict()
    for name, t in small.state_dict().items():
        expected = big[name][:keep] if name in ("energy_left", "stage_error", "stats_steps") else big[name]
        assert torch.equal(t, expected), name
        assert t.dtype == expected.dtype
    assert small.health().stages[-1].stage == q.health().stages[keep - 1].stage


def test_truncated_layer_is_independent():
    q = _trained()
    small = q.truncated(stages=2).train()
    before = q.codebooks[0].codewords.clone()
    small(torch.randn(64, 6))
    assert torch.equal(q.codebooks[0].codewords, before)
    assert not torch.equal(small.codebooks[0].codewords, before)


def test_truncated_layer_saves_and_loads(tmp_path):
    small = _trained(code_dim=3).truncated(stages=2)
    back = load_codebooks(save_codebooks(small, tmp_path / "small.safetensors"))
    x = torch.randn(20, 6)
    assert back.stages == 2
    assert torch.equal(back.encode(x), small.encode(x))


def test_truncated_keeps_training_mode_and_rejects_bad_counts():
    q = _trained().train()
    assert q.truncated(stages=3).training
    for bad in (0, 5, 2.0, None):
        with pytest.raises(RvqlayerError, match="stages"):
            q.truncated(stages=bad)
