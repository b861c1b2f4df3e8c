#!/usr/bin/env python3
"""CPU throughput and peak memory of ``MultiStageQuantizer``.

Prints, for one layer size (default: dim 128, 1024 entries, 8 stages):

1. the one-time cost of the k-means initialisation (the first training step);
2. vectors per second for a training step (forward with EMA update), an eval
   forward, greedy ``encode`` and beam-search ``encode(beam=4)``, at several
   batch sizes (best of ``--repeats`` runs, wall clock);
3. the extra peak memory of ``encode`` for several ``chunk`` settings, greedy
   and beam 4: the process's peak resident set size during one ``encode``
   call minus its resident size just before, each setting in a fresh child
   process. On Linux the peak is ``VmHWM`` from ``/proc/self/status``, reset
   through ``/proc/self/clear_refs`` right before the call (so the import of
   torch does not mask it); elsewhere it falls back to
   ``resource.getrusage(RUSAGE_SELF).ru_maxrss``, which can only show growth
   above everything the process held before. Resident memory counts all that
   the call touches, torch's CPU allocations included.

    python benchmarks/speed.py             # about a minute on 2 CPU cores
    python benchmarks/speed.py --quick     # smaller batches, fewer repeats
    python benchmarks/speed.py --threads 2 # compare with two intra-op threads

Timings depend on the machine and on what else runs on it; they are never
used as test thresholds.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time

import torch

from rvqlayer import MultiStageQuantizer


def _build(args: argparse.Namespace, chunk: int | None = None) -> MultiStageQuantizer:
    return MultiStageQuantizer(
        args.dim, stages=args.stages, entries=args.entries, init=args.init, chunk=chunk or args.chunk
    )


def _best_time(fn, repeats: int) -> float:
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - start)
    return best


def _throughput(args: argparse.Namespace) -> None:
    torch.manual_seed(args.seed)
    q = _build(args)
    first = torch.randn(max(args.batches), args.dim)
    start = time.perf_counter()
    q.train()
    q(first)
    print(f"first training step ({first.shape[0]} vectors, init={args.init!r}): {time.perf_counter() - start:.2f} s")
    print()
    print(f"{'batch':>6} {'train step':>12} {'eval forward':>12} {'encode':>12} {'encode beam4':>12}   (vectors/s)")
    for batch in args.batches:
        x = torch.randn(batch, args.dim)
        q.train()
        t_train = _best_time(lambda x=x: q(x), args.repeats)
        q.eval()
        with torch.no_grad():
            t_eval = _best_time(lambda x=x: q(x), args.repeats)
        t_enc = _best_time(lambda x=x: q.encode(x), args.repeats)
        t_beam = _best_time(lambda x=x: q.encode(x, beam=4), args.repeats)
        print(
            f"{batch:>6} {batch / t_train:>12,.0f} {batch / t_eval:>12,.0f} "
            f"{batch / t_enc:>12,.0f} {batch / t_beam:>12,.0f}",
            flush=True,
        )


def _status_kib() -> dict[str, int] | None:
    """``VmRSS`` and ``VmHWM`` (KiB) from ``/proc/self/status``; None where there is no such file."""
    try:
        with open("/proc/self/status") as fh:
            fields = dict(line.split(":", 1) for line in fh if line.startswith(("VmRSS", "VmHWM")))
    except OSError:
        return None
    return {k: int(v.split()[0]) for k, v in fields.items()}


def _reset_peak() -> bool:
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")  # Linux: reset the peak resident set size to the current one
        return True
    except OSError:
        return False


def _memory_child(args: argparse.Namespace) -> None:
    """Run in a fresh process: extra peak resident memory (MiB) of one encode at ``args.chunk``."""
    torch.set_num_threads(args.threads)
    torch.manual_seed(args.seed)
    q = _build(args, args.chunk).eval()
    x = torch.randn(args.memory_batch, args.dim)
    q.encode(x, beam=args.beam)  # warm-up: one-time buffers of the math library are not counted
    if _status_kib() is not None and _reset_peak():
        before = _status_kib()["VmRSS"]
        q.encode(x, beam=args.beam)
        extra, how = _status_kib()["VmHWM"] - before, "VmHWM"
    else:
        import resource  # Unix only

        before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        q.encode(x, beam=args.beam)
        extra, how = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - before, "ru_maxrss"
    print(json.dumps({"extra_mib": extra / 1024.0, "how": how}))  # both in KiB on Linux


def _memory(args: argparse.Namespace) -> None:
    print()
    print(f"extra peak resident memory of one encode of {args.memory_batch} vectors (MiB, fresh process per setting)")
    print(f"{'chunk':>6} {'greedy':>8} {'beam4':>8}")
    how = set()
    for chunk in args.chunks:
        cells = []
        for beam in (1, 4):
            opts = {
                "--chunk": chunk, "--beam": beam, "--dim": args.dim, "--entries": args.entries,
                "--stages": args.stages, "--memory-batch": args.memory_batch, "--threads": args.threads,
                "--init": "random",
            }  # fmt: skip
            cmd = [sys.executable, __file__, "--memory-child", *(str(v) for pair in opts.items() for v in pair)]
            done = subprocess.run(cmd, capture_output=True, text=True, check=True)
            result = json.loads(done.stdout.strip().splitlines()[-1])
            cells.append(result["extra_mib"])
            how.add(result["how"])
        print(f"{chunk:>6} {cells[0]:>8.1f} {cells[1]:>8.1f}", flush=True)
    print("measured with " + ", ".join(sorted(how)))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--dim", type=int, default=128)
    parser.add_argument("--entries", type=int, default=1024)
    parser.add_argument("--stages", type=int, default=8)
    parser.add_argument("--batches", default="256,1024,4096,16384", help="comma list of batch sizes")
    parser.add_argument("--chunks", default="256,1024,4096,16384", help="comma list of chunk settings for memory")
    parser.add_argument("--chunk", type=int, default=4096, help="chunk for the throughput table")
    parser.add_argument("--memory-batch", type=int, default=16384, help="vectors per encode in the memory table")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--init", choices=("kmeans", "random"), default="kmeans")
    parser.add_argument("--threads", type=int, default=1, help="torch intra-op threads")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--quick", action="store_true", help="batches 256,1024; chunks 1024,4096; 1 repeat")
    parser.add_argument("--beam", type=int, default=1, help=argparse.SUPPRESS)
    parser.add_argument("--memory-child", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.quick:
        args.batches, args.chunks, args.repeats, args.memory_batch = "256,1024", "1024,4096", 1, 4096
    args.batches = [int(b) for b in str(args.batches).split(",")]
    args.chunks = [int(c) for c in str(args.chunks).split(",")]
    if args.memory_child:
        _memory_child(args)
        return 0
    torch.set_num_threads(args.threads)
    print(
        f"MultiStageQuantizer(dim={args.dim}, stages={args.stages}, entries={args.entries}), "
        f"float32 on CPU, {args.threads} thread(s), torch {torch.__version__}"
    )
    _throughput(args)
    _memory(args)
    return 0


if __name__ == "__main__":
    sys.exit(main())
