#!/usr/bin/env python3
"""Rate against distortion of the trained layer on a unit Gaussian, next to theory.

For each (dim, stages, entries) setting a ``MultiStageQuantizer`` is trained in
training mode on fresh batches of i.i.d. unit-Gaussian vectors, then measured
in eval mode on a held-out sample. The table gives, per setting:

- bits/dim: ``stages * log2(entries) / dim``
- SNR: ``10 log10(1 / MSE)`` in dB (the source has unit variance), greedy
  encoding and, for several stages, beam search (beam 4)
- Shannon: the bound ``6.0206 dB`` per bit (D(R) = 2^(-2R); Cover & Thomas,
  "Elements of Information Theory", 2nd ed. 2006, Thm 10.3.2); no quantizer
  of any kind can exceed it
- Lloyd-Max: for one dimension, the best scalar quantizer with
  ``entries ** stages`` levels (J. Max, "Quantizing for minimum distortion",
  IRE Trans. Inf. Theory IT-6(1), 1960, table), where that table has a value
- gap: Shannon minus measured (greedy), in dB

    python benchmarks/rate_distortion.py              # about a minute on 2 CPU cores
    python benchmarks/rate_distortion.py --quick      # a few seconds, fewer steps
    python benchmarks/rate_distortion.py --png rd.png # also plot SNR against rate
"""

from __future__ import annotations

import argparse
import math
import sys
import time

import torch

from rvqlayer import MultiStageQuantizer

# Lloyd-Max MSE of a unit Gaussian with N levels (Max 1960, table; Lloyd, IEEE Trans. Inf. Theory IT-28(2), 1982).
LLOYD_MAX_MSE = {2: 0.3634, 4: 0.1175, 8: 0.03454, 16: 0.009497, 32: 0.002499}
DB_PER_BIT = 20.0 * math.log10(2.0)  # 6.0206 dB: D(R) = 2^(-2R), Cover & Thomas 2006, Thm 10.3.2

DEFAULT_SETTINGS = (
    "1x1x2,1x1x4,1x1x8,1x1x16,1x2x4,2x1x16,2x2x16,2x1x256,4x1x16,4x2x16,4x4x16,8x1x256,8x2x256,8x4x16,8x8x16"
)


def _parse_settings(text: str) -> list[tuple[int, int, int]]:
    out = []
    for item in text.split(","):
        parts = item.strip().lower().split("x")
        if len(parts) != 3 or not all(p.isdigit() and int(p) > 0 for p in parts):
            raise SystemExit(f"expected `--settings` items like DIMxSTAGESxENTRIES (e.g. 8x2x256), got {item!r}")
        out.append((int(parts[0]), int(parts[1]), int(parts[2])))
    return out


def _snr_db(mse: float) -> float:
    return -10.0 * math.log10(mse)


def measure(
    dim: int, stages: int, entries: int, *, steps: int, batch: int, held_out: int, ema_decay: float, seed: int
) -> dict[str, float]:
    """Train one setting and return its rate and held-out SNRs (dB)."""
    torch.manual_seed(seed)
    q = MultiStageQuantizer(dim, stages=stages, entries=entries, ema_decay=ema_decay)
    q.train()
    for _ in range(steps):
        q(torch.randn(batch, dim))
    q.eval()
    x = torch.randn(held_out, dim, generator=torch.Generator().manual_seed(seed + 1))
    mse = float((q.decode(q.encode(x)) - x).pow(2).mean())
    row = {"bits": q.bits_per_vector() / dim, "snr": _snr_db(mse)}
    if stages > 1:
        mse_beam = float((q.decode(q.encode(x, beam=4)) - x).pow(2).mean())
        row["snr_beam"] = _snr_db(mse_beam)
    levels = entries**stages
    if dim == 1 and levels in LLOYD_MAX_MSE:
        row["lloyd_max"] = _snr_db(LLOYD_MAX_MSE[levels])
    row["shannon"] = DB_PER_BIT * row["bits"]
    row["gap"] = row["shannon"] - row["snr"]
    return row


def _fmt(value: float | None) -> str:
    return "-" if value is None else f"{value:.2f}"


def _plot(rows: list[tuple[tuple[int, int, int], dict[str, float]]], path: str) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6.4, 4.4))
    top = max(r["bits"] for _, r in rows)
    ax.plot([0, top], [0, DB_PER_BIT * top], "k-", label="Shannon bound (6.02 dB/bit)")
    dims = sorted({s[0] for s, _ in rows})
    for dim in dims:
        pts = sorted((r["bits"], r["snr"]) for s, r in rows if s[0] == dim)
        ax.plot([p[0] for p in pts], [p[1] for p in pts], "o", label=f"layer, dim {dim}")
    lm = sorted((r["bits"], r["lloyd_max"]) for _, r in rows if "lloyd_max" in r)
    if lm:
        ax.plot([p[0] for p in lm], [p[1] for p in lm], "kx", label="Lloyd-Max (Max 1960)")
    ax.set_xlabel("bits per dimension")
    ax.set_ylabel("SNR (dB), held-out unit Gaussian")
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--settings", default=DEFAULT_SETTINGS, help="comma list of DIMxSTAGESxENTRIES")
    parser.add_argument("--steps", type=int, default=1000, help="training batches per setting")
    parser.add_argument("--batch", type=int, default=2048, help="vectors per training batch")
    parser.add_argument("--held-out", type=int, default=1 << 17, help="held-out vectors per setting")
    parser.add_argument("--ema-decay", type=float, default=0.99, help="EMA decay of the layer")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--threads", type=int, default=1, help="torch intra-op threads (1 is fastest for small steps)")
    parser.add_argument("--quick", action="store_true", help="200 steps per setting")
    parser.add_argument("--png", default=None, help="write a plot of SNR against rate to this path")
    args = parser.parse_args(argv)
    settings = _parse_settings(args.settings)
    steps = 200 if args.quick else args.steps
    torch.set_num_threads(args.threads)

    print(
        f"unit Gaussian; {steps} training batches of {args.batch}, ema_decay={args.ema_decay}, "
        f"held-out {args.held_out} vectors, seed {args.seed}, {args.threads} thread(s)"
    )
    header = f"{'dim':>3} {'stages':>6} {'entries':>7} {'bits/dim':>8} {'SNR dB':>7} {'beam4 dB':>8} "
    header += f"{'Shannon dB':>10} {'Lloyd-Max dB':>12} {'gap dB':>6} {'time s':>6}"
    print(header)
    rows = []
    for dim, stages, entries in settings:
        start = time.perf_counter()
        r = measure(
            dim,
            stages,
            entries,
            steps=steps,
            batch=args.batch,
            held_out=args.held_out,
            ema_decay=args.ema_decay,
            seed=args.seed,
        )
        took = time.perf_counter() - start
        rows.append(((dim, stages, entries), r))
        print(
            f"{dim:>3} {stages:>6} {entries:>7} {r['bits']:>8.2f} {r['snr']:>7.2f} {_fmt(r.get('snr_beam')):>8} "
            f"{r['shannon']:>10.2f} {_fmt(r.get('lloyd_max')):>12} {r['gap']:>6.2f} {took:>6.1f}",
            flush=True,
        )
    if args.png:
        _plot(rows, args.png)
        print(f"wrote {args.png}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
