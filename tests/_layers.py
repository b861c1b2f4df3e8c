"""Small layers and state snapshots shared by the layer tests."""

from __future__ import annotations

import torch

from rvqlayer import MultiStageQuantizer


def trained(seed: int = 0, **options) -> MultiStageQuantizer:
    """A 6-number layer (3 stages of 16 entries unless ``options`` say otherwise) after 3 training steps."""
    torch.manual_seed(seed)
    opts = dict(stages=3, entries=16)
    opts.update(options)
    q = MultiStageQuantizer(6, **opts)
    for _ in range(3):
        q(torch.randn(128, 6))
    return q


def snapshot(q: torch.nn.Module) -> dict[str, torch.Tensor]:
    """A copy of every tensor of ``q``'s state."""
    return {k: v.detach().clone() for k, v in q.state_dict().items()}


def same_state(a: dict[str, torch.Tensor], b: dict[str, torch.Tensor]) -> bool:
    """True when both states hold the same keys and bit-identical tensors."""
    return a.keys() == b.keys() and all(torch.equal(a[k], b[k]) for k in a)
