"""Time of the k-means initialisation (the first training step) of MultiStageQuantizer.

Prints, for each setting ``STAGESxVECTORS`` (dim 128, 1024 entries by default),
the wall-clock and CPU time (all threads of the process) of the first
training step, which runs the k-means initialisation of every stage on its
residuals, and the share of the input
energy left after all stages on the same vectors (lower is better), so that
speed is never bought with a worse fit unnoticed. Timings are not used by
any test. On a machine shared with other work, the wall time grows with the
load while the CPU time of a one-thread run stays close to what an idle core
would take.

    python benchmarks/init_speed.py                  # the two settings of the targets, 2 threads
    python benchmarks/init_speed.py --threads 1
    python benchmarks/init_speed.py --settings 8x16384 --init-points 16384
"""

from __future__ import annotations

import argparse
import time

import torch

from rvqlayer import MultiStageQuantizer


def _one(stages: int, vectors: int, args: argparse.Namespace) -> tuple[float, float, float]:
    torch.manual_seed(args.seed)
    x = torch.randn(vectors, args.dim)
    options = {} if args.init_points is None else {"init_points": args.init_points}
    q = MultiStageQuantizer(args.dim, stages=stages, entries=args.entries, **options).train()
    start, cpu = time.perf_counter(), time.process_time()
    q(x)
    seconds, cpu = time.perf_counter() - start, time.process_time() - cpu
    q.eval()
    left = float((q.decode(q.encode(x)) - x).pow(2).sum() / x.pow(2).sum())
    return seconds, cpu, left


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--settings", default="8x16384,32x8192", help="comma-separated STAGESxVECTORS")
    parser.add_argument("--dim", type=int, default=128)
    parser.add_argument("--entries", type=int, default=1024)
    parser.add_argument("--init-points", type=int, default=None, help="default: the layer's default")
    parser.add_argument("--threads", type=int, default=2, help="torch intra-op threads")
    parser.add_argument("--repeats", type=int, default=1, help="runs per setting; the fastest is printed")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    print(f"dim {args.dim}, {args.entries} entries, {args.threads} thread(s), torch {torch.__version__}")
    print(f"{'stages':>6} {'vectors':>8} {'wall s':>8} {'CPU s':>8} {'energy left':>12}")
    for setting in args.settings.split(","):
        stages, vectors = (int(v) for v in setting.lower().split("x"))
        runs = [_one(stages, vectors, args) for _ in range(args.repeats)]
        wall, cpu = min(r[0] for r in runs), min(r[1] for r in runs)
        print(f"{stages:>6} {vectors:>8} {wall:>8.2f} {cpu:>8.2f} {runs[0][2]:>12.4f}")


if __name__ == "__main__":
    main()
