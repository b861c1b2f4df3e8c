"""Two gloo processes on CPU against one process that sees all the data."""

import os

import pytest
import torch
import torch.distributed as dist
import torch.multiprocessing as mp

from rvqlayer import MultiStageQuantizer

WORLD, STEPS, HALF = 2, 4, 96


def _make(reseed_below: float) -> MultiStageQuantizer:
    torch.manual_seed(0)
    return MultiStageQuantizer(3, stages=2, entries=8, reseed_below=reseed_below)


def _batches():
    g = torch.Generator().manual_seed(1)
    return [torch.randn(WORLD * HALF, 3, generator=g) for _ in range(STEPS)]


def _train(q, batches, part=None):
    for b in batches:
        q(b if part is None else b[part * HALF : (part + 1) * HALF])
        if int(q.codebooks[1].step) == 2:
            q.codebooks[1].ema_count[:3] = 0  # force dead codes so that reseeding runs
    return {k: v.clone() for k, v in q.state_dict().items()}


SETTINGS = (0.0, 0.5)  # reseeding off, and on (with forced dead codes)


def _worker(rank, init_file, out_dir):
    dist.init_process_group("gloo", init_method=f"file://{init_file}", rank=rank, world_size=WORLD)
    try:
        for reseed_below in SETTINGS:
            torch.manual_seed(100 + rank)  # the ranks' own generators differ: the results must not
            state = _train(_make(reseed_below), _batches(), part=rank)
            torch.save(state, os.path.join(out_dir, f"rank{rank}_{reseed_below}.pt"))
    finally:
        dist.destroy_process_group()


@pytest.fixture(scope="module")
def rank_states(tmp_path_factory):
    out = tmp_path_factory.mktemp("ddp")
    mp.spawn(_worker, args=(str(out / "init"), str(out)), nprocs=WORLD, join=True)
    return {r: [torch.load(out / f"rank{k}_{r}.pt", weights_only=True) for k in range(WORLD)] for r in SETTINGS}


@pytest.mark.parametrize("reseed_below", SETTINGS)
def test_ranks_end_each_step_identical(rank_states, reseed_below):
    states = rank_states[reseed_below]
    for key in states[0]:
        assert torch.equal(states[0][key], states[1][key]), key
    if reseed_below:
        assert int(states[0]["codebooks.1.reseeds"]) >= 3


def test_two_ranks_match_one_process_on_all_data(rank_states):
    torch.manual_seed(100)
    single = _train(_make(0.0), _batches())
    for key, value in single.items():
        torch.testing.assert_close(rank_states[0.0][0][key].to(value.dtype), value, rtol=1e-4, atol=1e-5, msg=key)
