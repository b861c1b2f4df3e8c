"""A tiny codec trained by a plain PyTorch loop on several processes.

    torchrun --standalone --nproc_per_node 2 examples/torchrun_codec.py --steps 30
    python examples/torchrun_codec.py --steps 30          # one process, same code

Each process (rank) draws its own batches of synthetic tones (sums of two
sine waves with random pitch, cut into frames of 32 samples), encodes each
frame with a linear layer, quantizes it with a MultiStageQuantizer (4 stages
of 64 entries) and decodes it. DistributedDataParallel averages the encoder
and decoder gradients; the quantizer keeps its codebooks identical on every
rank by itself (so ``broadcast_buffers=False``). At the end rank 0 prints the
loss and checks that every rank holds the same codebooks.
"""

from __future__ import annotations

import argparse
import datetime
import math
import os

import torch
import torch.distributed as dist
from torch import nn
from torch.nn.parallel import DistributedDataParallel

from rvqlayer import MultiStageQuantizer

FRAME, RATE = 32, 8000.0  # samples per frame, samples per second


class TinyCodec(nn.Module):
    """Frame ``[batch, 32]`` -> 16 numbers -> 4 x 64-entry quantizer -> frame."""

    def __init__(self) -> None:
        super().__init__()
        self.encoder = nn.Linear(FRAME, 16)
        self.quantizer = MultiStageQuantizer(16, stages=4, entries=64)
        self.decoder = nn.Linear(16, FRAME)

    def forward(self, frames: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        out = self.quantizer(self.encoder(frames))
        return self.decoder(out.quantized), out.loss


def tone_frames(count: int, generator: torch.Generator) -> torch.Tensor:
    """``count`` frames ``[count, 32]`` of two-tone signals (pitches 100-1000 Hz, random phase and level)."""
    t = torch.arange(FRAME) / RATE
    pitch = 100.0 + 900.0 * torch.rand(count, 2, 1, generator=generator)
    phase = 2 * math.pi * torch.rand(count, 2, 1, generator=generator)
    level = 0.2 + 0.8 * torch.rand(count, 2, 1, generator=generator)
    return (level * torch.sin(2 * math.pi * pitch * t + phase)).sum(1)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--steps", type=int, default=30)
    parser.add_argument("--batch", type=int, default=256, help="frames per rank and step")
    parser.add_argument("--timeout", type=float, default=120.0, help="seconds a collective may wait for a rank")
    args = parser.parse_args()

    torch.set_num_threads(1)
    several = "WORLD_SIZE" in os.environ  # set by torchrun
    if several:
        dist.init_process_group("gloo", timeout=datetime.timedelta(seconds=args.timeout))
    rank = dist.get_rank() if several else 0

    torch.manual_seed(0)  # the same starting weights on every rank (DDP also broadcasts them)
    codec = TinyCodec()
    model = DistributedDataParallel(codec, broadcast_buffers=False) if several else codec
    opt = torch.optim.Adam(model.parameters(), lr=3e-3)
    data = torch.Generator().manual_seed(1000 + rank)  # each rank sees its own frames
    for _ in range(args.steps):
        frames = tone_frames(args.batch, data)
        decoded, quantizer_loss = model(frames)
        loss = (decoded - frames).pow(2).mean() + quantizer_loss
        opt.zero_grad()
        loss.backward()
        opt.step()

    codewords = torch.stack([cb.codewords for cb in codec.quantizer.codebooks])
    if several:
        every = [torch.empty_like(codewords) for _ in range(dist.get_world_size())]
        dist.all_gather(every, codewords)
        same = all(torch.equal(every[0], c) for c in every)
    else:
        same = True
    if rank == 0:
        ranks = dist.get_world_size() if several else 1
        print(f"ranks {ranks}, steps {args.steps}, last loss {float(loss.detach()):.4f}")
        print("codebooks identical on every rank" if same else "codebooks DIFFER between ranks")
    if several:
        dist.destroy_process_group()
    if not same:
        raise SystemExit(1)


if __name__ == "__main__":
    main()
