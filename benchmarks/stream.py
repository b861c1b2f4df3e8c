#!/usr/bin/env python3
"""Bitstream sizes and coding speed of ``rvqlayer.stream``.

1. Speed (synthetic codes, one thread): fixed-length packing and unpacking,
   entropy encoding and decoding with static tables, in million codes per
   second (best of ``--repeats``).
2. Sizes on the ``tones`` recipe (``--checkpoint runs/tones/checkpoints/last.ckpt``,
   written by ``rvqlayer-recipe tones``): the codes of held-out clips written
   as a fixed-length stream and as an entropy-coded stream with the layer's
   own tables (``UsageTables.from_quantizer``), beside the ideal cost of the
   codes under those tables (cross-entropy, no header), zlib level 9 on the
   raw int16 codes, and one context model measured as an ideal cost: the same
   stage's code in the previous frame ("repeat": ``p(c | prev) = r [c == prev]
   + (1 - r) p_static(c)``, ``r`` per stage fitted on other held-out clips).

    python benchmarks/stream.py                      # speed only
    python benchmarks/stream.py --checkpoint runs/tones/checkpoints/last.ckpt

Timings depend on the machine and on what else runs on it; they are never
used as test thresholds.
"""

from __future__ import annotations

import argparse
import sys
import time
import zlib
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from rvqlayer import stream  # noqa: E402


def _best(fn, repeats: int) -> float:
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - start)
    return best


def speed(frames: int, stages: int, entries: int, repeats: int) -> None:
    rng = np.random.default_rng(0)
    p = rng.dirichlet(np.full(entries, 0.3))
    codes = rng.choice(entries, size=(frames, stages), p=p)
    n = codes.size
    bits = stream.code_bits(entries)
    flat = codes.reshape(-1)
    packed = stream.pack_codes(flat, bits)
    tables = stream.UsageTables.from_counts(np.tile(p, (stages, 1)))
    blob = stream.write_stream(codes, entries=entries, frame_rate=75.0, tables=tables, packet_frames=65535)
    fixed = stream.write_stream(codes, entries=entries, frame_rate=75.0, packet_frames=65535)
    rows = [
        ("pack_codes", _best(lambda: stream.pack_codes(flat, bits), repeats)),
        ("unpack_codes", _best(lambda: stream.unpack_codes(packed, bits, n), repeats)),
        ("write_stream fixed", _best(lambda: stream.write_stream(codes, entries=entries, frame_rate=75.0), repeats)),
        ("read_stream fixed", _best(lambda: stream.read_stream(fixed), repeats)),
        (
            "write_stream tables",
            _best(
                lambda: stream.write_stream(
                    codes, entries=entries, frame_rate=75.0, tables=tables, packet_frames=65535
                ),
                repeats,
            ),
        ),
        ("read_stream tables", _best(lambda: stream.read_stream(blob, tables=tables), repeats)),
    ]
    print(f"speed: {frames} frames x {stages} stages, {entries} entries ({n:,} codes), best of {repeats}")
    for name, seconds in rows:
        print(f"  {name:<22} {n / seconds / 1e6:8.1f} M codes/s")


def _repeat_bits(codes: np.ndarray, logp: np.ndarray, r: float) -> float:
    """Ideal bits of ``codes`` ``[clips, frames]`` (one stage) under the repeat context model."""
    prev, cur = codes[:, :-1].reshape(-1), codes[:, 1:].reshape(-1)
    p = (1 - r) * np.exp2(logp[cur]) + r * (cur == prev)
    first = -logp[codes[:, 0]].sum()
    return float(first - np.log2(p).sum())


def tones(checkpoint: Path, clips: int, seconds: float) -> None:
    import torch

    from recipes import tones as recipe
    from recipes._synth import RATE, SPLIT_HELD_OUT, render_batch

    state = torch.load(checkpoint, map_location="cpu", weights_only=True)
    config = state["recipe"]
    codec = recipe.ToneCodec(config["stages"], config["entries"], config["code_dim"])
    codec.load_state_dict({k[len("codec.") :]: v for k, v in state["state_dict"].items() if k.startswith("codec.")})
    codec.eval()
    q = codec.quantizer
    samples = int(seconds * RATE) // recipe.HOP * recipe.HOP
    with torch.no_grad():
        held = codec.encode(torch.from_numpy(render_batch(config["seed"], SPLIT_HELD_OUT, 0, clips, samples))[:, None])
        fit = codec.encode(torch.from_numpy(render_batch(config["seed"], SPLIT_HELD_OUT, 500, clips, samples))[:, None])
    held, fit = held.numpy(), fit.numpy()  # [clips, frames, stages]
    tables = stream.UsageTables.from_quantizer(q)
    logp = np.log2(tables.frequencies) - np.log2(tables.frequencies.sum(1, keepdims=True))
    rate = recipe.FRAME_RATE
    seconds_total = held.shape[0] * held.shape[1] / rate
    print(
        f"tones: {held.shape[0]} held-out clips x {held.shape[1]} frames ({seconds_total:g} s), "
        f"{q.stages} stages x {q.entries} entries, {rate:g} frames/s; kbps = bytes * 8 / seconds / 1000"
    )
    print("stages  fixed kbps  tables kbps  ideal kbps  repeat-ctx kbps  zlib kbps  tables/fixed  ctx saving")
    for k in range(1, q.stages + 1):
        codes = held[..., :k]
        fixed = len(stream.write_stream(codes, entries=q.entries, frame_rate=rate))
        coded = len(stream.write_stream(codes, entries=q.entries, frame_rate=rate, tables=tables))
        ideal = tables.bits(codes) / 8
        ctx = 0.0
        for s in range(k):
            best = min((_repeat_bits(fit[..., s], logp[s], x), x) for x in np.linspace(0, 0.99, 100))[1]
            ctx += _repeat_bits(held[..., s], logp[s], best) / 8
        zipped = len(zlib.compress(codes.astype("<i2").tobytes(), 9))

        def kbps(n: float) -> float:
            return n * 8 / seconds_total / 1000

        print(
            f"{k:6d}  {kbps(fixed):10.3f}  {kbps(coded):11.3f}  {kbps(ideal):10.3f}  {kbps(ctx):15.3f}  "
            f"{kbps(zipped):9.3f}  {coded / fixed:12.3f}  {1 - ctx / ideal:10.1%}"
        )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--checkpoint", type=Path, help="a tones checkpoint (runs/tones/checkpoints/last.ckpt)")
    parser.add_argument("--clips", type=int, default=8)
    parser.add_argument("--seconds", type=float, default=4.0)
    parser.add_argument("--frames", type=int, default=250_000)
    parser.add_argument("--stages", type=int, default=8)
    parser.add_argument("--entries", type=int, default=1024)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    speed(args.frames, args.stages, args.entries, args.repeats)
    if args.checkpoint:
        tones(args.checkpoint, args.clips, args.seconds)


if __name__ == "__main__":
    main()
