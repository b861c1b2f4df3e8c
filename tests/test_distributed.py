"""Two gloo processes on CPU against one process that sees all the data."""

import json
import os
import subprocess
import sys
import time
from datetime import timedelta
from pathlib import Path

import pytest
import torch
import torch.distributed as dist
import torch.multiprocessing as mp

from rvqlayer import MultiStageQuantizer, RvqlayerError

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


# ----------------------------------------------- uneven shards, masks, init over batches
SIZES = (96, 40)  # rows per step on rank 0 and rank 1
MASKED = (2, 1)  # at step 2, rank 1's batch is all padding


def _make_uneven() -> MultiStageQuantizer:
    torch.manual_seed(0)
    return MultiStageQuantizer(3, stages=2, entries=8, init_batches=2, reseed_below=0.0)


def _uneven_batches():
    g = torch.Generator().manual_seed(2)
    steps = []
    for step in range(STEPS):
        parts = [torch.randn(n, 3, generator=g) for n in SIZES]
        masks = [torch.ones(n, dtype=torch.bool) for n in SIZES]
        if step == MASKED[0]:
            masks[MASKED[1]][:] = False
        steps.append((parts, masks))
    return steps


def _train_uneven(q, part=None):
    for parts, masks in _uneven_batches():
        if part is None:
            q(torch.cat(parts), mask=torch.cat(masks))
        else:
            q(parts[part], mask=masks[part])
    return {k: v.clone() for k, v in q.state_dict().items()}


def _mismatch_message(rank: int) -> str:
    torch.manual_seed(0)
    q = MultiStageQuantizer(3, stages=2, entries=(8, 16)[rank], ema_decay=(0.99, 0.9)[rank])
    try:
        q(torch.randn(10, 3))
    except RvqlayerError as error:
        return str(error)
    return "no error"


def _scenario_worker(rank, init_file, out_dir):
    dist.init_process_group("gloo", init_method=f"file://{init_file}", rank=rank, world_size=WORLD)
    try:
        torch.manual_seed(100 + rank)
        torch.save(_train_uneven(_make_uneven(), part=rank), os.path.join(out_dir, f"uneven{rank}.pt"))
        with open(os.path.join(out_dir, f"mismatch{rank}.txt"), "w") as f:
            f.write(_mismatch_message(rank))
    finally:
        dist.destroy_process_group()


@pytest.fixture(scope="module")
def scenario_dir(tmp_path_factory):
    out = tmp_path_factory.mktemp("scenarios")
    mp.spawn(_scenario_worker, args=(str(out / "init"), str(out)), nprocs=WORLD, join=True)
    return out


def test_uneven_shards_and_a_fully_masked_rank_match_one_process(scenario_dir):
    states = [torch.load(scenario_dir / f"uneven{r}.pt", weights_only=True) for r in range(WORLD)]
    for key in states[0]:
        assert torch.equal(states[0][key], states[1][key]), key
    assert bool(states[0]["codebooks.0.initialised"]) and states[0]["init_seen"].tolist() == [2, 2 * sum(SIZES)]
    torch.manual_seed(100)
    single = _train_uneven(_make_uneven())
    for key, value in single.items():
        torch.testing.assert_close(states[0][key].to(value.dtype), value, rtol=1e-4, atol=1e-5, msg=key)


def test_ranks_built_differently_fail_naming_the_options(scenario_dir):
    for rank in range(WORLD):
        message = (scenario_dir / f"mismatch{rank}.txt").read_text()
        assert message.startswith("expected `the layer` to be the same on every rank"), message
        assert "option entries: 8 on rank 0, 16 on rank 1" in message
        assert "option ema_decay: 0.99 on rank 0, 0.9 on rank 1" in message
        assert "option beta" not in message


# ------------------------------------------------------------ bounded-time failure
def _raising_worker(rank, init_file, out_dir):
    dist.init_process_group(
        "gloo", init_method=f"file://{init_file}", rank=rank, world_size=WORLD, timeout=timedelta(seconds=3)
    )
    torch.manual_seed(0)
    q = MultiStageQuantizer(3, stages=2, entries=8)
    if rank == 1:
        try:
            raise RuntimeError("a bad batch")  # caught, and this rank stays alive without calling forward
        except RuntimeError:
            time.sleep(6)
        os._exit(0)  # skip the process group's teardown, which may abort after a timed-out collective
    start = time.monotonic()
    try:
        q(torch.randn(10, 3))
        outcome = "returned"
    except RuntimeError as error:
        outcome = f"{type(error).__name__}: {error}"
    with open(os.path.join(out_dir, "raised.txt"), "w") as f:
        f.write(f"{time.monotonic() - start:.2f}\n{outcome}")
    os._exit(0)  # as above: the outcome is recorded, the broken group is not torn down


def test_a_rank_that_stops_calling_forward_fails_the_others_at_the_timeout(tmp_path):
    mp.spawn(_raising_worker, args=(str(tmp_path / "init"), str(tmp_path)), nprocs=WORLD, join=True)
    seconds, outcome = (tmp_path / "raised.txt").read_text().split("\n", 1)
    assert outcome != "returned"
    assert "timed out" in outcome.lower() or "timeout" in outcome.lower(), outcome
    assert 2.5 <= float(seconds) < 15.0


# ------------------------------------------------------------- Lightning, 2 processes
HELPER = Path(__file__).resolve().parent / "_lightning_ddp.py"


@pytest.fixture(scope="module")
def lightning_runs(tmp_path_factory):
    """Run tests/_lightning_ddp.py with 2 devices (DDP) and with 1, side by side."""
    pytest.importorskip("pytorch_lightning")
    out = tmp_path_factory.mktemp("lightning")
    root = str(HELPER.parents[1])
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([root, os.environ.get("PYTHONPATH", "")])}
    runs = [
        subprocess.Popen(
            [sys.executable, str(HELPER), str(out), str(devices)],
            stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT,
            text=True,
            env=env,
            cwd=root,
        )
        for devices in (2, 1)
    ]
    for run in runs:
        output, _ = run.communicate(timeout=300)
        assert run.returncode == 0, output
    return out


def test_lightning_ddp_ranks_identical_and_equal_to_one_process(lightning_runs):
    ranks = [torch.load(lightning_runs / f"rank{r}_of2.pt", weights_only=True) for r in range(WORLD)]
    single = torch.load(lightning_runs / "rank0_of1.pt", weights_only=True)
    assert bool(single["codebooks.2.initialised"]) and int(single["codebooks.0.step"]) == 5  # 6 steps, 1 collecting
    for key, value in single.items():
        assert torch.equal(ranks[0][key], ranks[1][key]), key
        # EMA mode: one process on the concatenated batches, to 1e-5
        torch.testing.assert_close(ranks[0][key], value, rtol=0, atol=1e-5, msg=key)


def test_codebook_monitor_under_ddp_logs_and_warns_on_rank_zero_only(lightning_runs):
    seen = [json.loads((lightning_runs / f"rank{r}_of2.json").read_text()) for r in range(WORLD)]
    alone = json.loads((lightning_runs / "rank0_of1.json").read_text())
    # dead_below=1.0 makes about half the entries count as dead, so each of the 3 stages warns once.
    assert seen[0] == alone == {"warnings": 3, "logger_calls": 3}
    assert seen[1] == {"warnings": 0, "logger_calls": 0}
