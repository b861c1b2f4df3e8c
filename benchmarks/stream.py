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
   raw int16 codes, and the repeat context (stream mode 2: a binary "same code
   as the previous frame" symbol per stage, then the static table for the
   others), its tables ``UsageTables.from_quantizer(q).with_repeats(codes)``
   fitted on other held-out clips; "ctx saving" is its stream size against
   the static-table stream.

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
    short = stream.write_stream(codes, entries=entries, frame_rate=75.0)
    rows = [
        ("pack_codes", _best(lambda: stream.pack_codes(flat, bits), repeats)),
        ("unpack_codes", _best(lambda: stream.unpack_codes(packed, bits, n), repeats)),
        (
            "write_stream fixed",
            _best(lambda: stream.write_stream(codes, entries=entries, frame_rate=75.0, packet_frames=65535), repeats),
        ),
        ("read_stream fixed", _best(lambda: stream.read_stream(fixed), repeats)),
        (
            "write fixed, 75/packet",
            _best(lambda: stream.write_stream(codes, entries=entries, frame_rate=75.0), repeats),
        ),
        ("read fixed, 75/packet", _best(lambda: stream.read_stream(short), repeats)),
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
    print(
        f"speed: {frames} frames x {stages} stages, {entries} entries ({n:,} codes), best of {repeats}; "
        "one packet of 65535 frames unless said"
    )
    for name, seconds in rows:
        print(f"  {name:<22} {n / seconds / 1e6:8.1f} M codes/s")


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
    rate = recipe.FRAME_RATE
    seconds_total = held.shape[0] * held.shape[1] / rate
    print(
        f"tones: {held.shape[0]} held-out clips x {held.shape[1]} frames ({seconds_total:g} s), "
        f"{q.stages} stages x {q.entries} entries, {rate:g} frames/s; kbps = bytes * 8 / seconds / 1000"
    )
    context = tables.with_repeats(fit)
    print("stages  fixed kbps  tables kbps  ideal kbps  repeat-ctx kbps  zlib kbps  tables/fixed  ctx saving")
    for k in range(1, q.stages + 1):
        codes = held[..., :k]
        fixed = len(stream.write_stream(codes, entries=q.entries, frame_rate=rate))
        coded = len(stream.write_stream(codes, entries=q.entries, frame_rate=rate, tables=tables))
        ideal = tables.bits(codes) / 8
        # one stream per clip, so that no repeat is counted across a clip boundary
        ctx = sum(len(stream.write_stream(c, entries=q.entries, frame_rate=rate, tables=context)) for c in codes)
        ctx -= (len(codes) - 1) * (stream.HEADER_BYTES + stream.PACKET_HEADER_BYTES)  # count one header
        zipped = len(zlib.compress(codes.astype("<i2").tobytes(), 9))

        def kbps(n: float) -> float:
            return n * 8 / seconds_total / 1000

        print(
            f"{k:6d}  {kbps(fixed):10.3f}  {kbps(coded):11.3f}  {kbps(ideal):10.3f}  {kbps(ctx):15.3f}  "
            f"{kbps(zipped):9.3f}  {coded / fixed:12.3f}  {1 - ctx / coded:10.1%}"
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
