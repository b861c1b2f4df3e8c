"""Collective operations that are no-ops outside ``torch.distributed``.

:func:`all_reduce_sum`, :func:`broadcast` and :func:`gather_rows` keep
codebooks identical and run inside the training step; :func:`gather_bytes`
carries the configuration check of the first training step. Health reporting
needs no traffic of its own: it reads statistics already all-reduced in the step.
"""

from __future__ import annotations

import torch
import torch.distributed as dist


def is_distributed() -> bool:
    """True when a process group is initialised with more than one rank."""
    return dist.is_available() and dist.is_initialized() and dist.get_world_size() > 1


def world_size() -> int:
    return dist.get_world_size() if is_distributed() else 1


def rank() -> int:
    """This process's rank (0 outside ``torch.distributed``)."""
    return dist.get_rank() if is_distributed() else 0


def all_reduce_sum(tensor: torch.Tensor) -> torch.Tensor:
    """Sum ``tensor`` over all ranks in place and return it."""
    if is_distributed():
        dist.all_reduce(tensor, op=dist.ReduceOp.SUM)
    return tensor


def broadcast(tensor: torch.Tensor, src: int = 0) -> torch.Tensor:
    """Overwrite ``tensor`` on every rank with rank ``src``'s copy."""
    if is_distributed():
        dist.broadcast(tensor, src=src)
    return tensor


def gather_rows(rows: torch.Tensor) -> torch.Tensor:
    """Concatenate ``rows`` ``[n_r, d]`` of every rank in rank order; ranks may differ in ``n_r``."""
    if not is_distributed():
        return rows
    size = torch.tensor([rows.shape[0]], device=rows.device, dtype=torch.int64)
    sizes = [torch.zeros_like(size) for _ in range(world_size())]
    dist.all_gather(sizes, size)
    longest = int(max(int(s) for s in sizes))
    padded = rows.new_zeros((longest,) + tuple(rows.shape[1:]))
    padded[: rows.shape[0]] = rows
    parts = [torch.empty_like(padded) for _ in sizes]
    dist.all_gather(parts, padded)
    return torch.cat([p[: int(s)] for p, s in zip(parts, sizes)])


def gather_bytes(data: bytes, device: torch.device) -> list[bytes]:
    """Every rank's ``data``, in rank order (two small all-gathers; ``[data]`` outside ``torch.distributed``).

    ``device`` is where the tensors travel (a CUDA device under NCCL).
    """
    if not is_distributed():
        return [data]
    payload = torch.tensor(list(data), dtype=torch.uint8, device=device).unsqueeze(1)
    sizes = torch.tensor([len(data)], dtype=torch.int64, device=device)
    every = [torch.zeros_like(sizes) for _ in range(world_size())]
    dist.all_gather(every, sizes)
    longest = max(int(s) for s in every)
    padded = payload.new_zeros((longest, 1))
    padded[: len(data)] = payload
    parts = [torch.empty_like(padded) for _ in every]
    dist.all_gather(parts, padded)
    return [bytes(p[: int(s), 0].cpu().tolist()) for p, s in zip(parts, every)]
