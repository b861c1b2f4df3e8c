#!/usr/bin/env python3
"""Rate against distortion of the layer on a unit Gaussian, per stage count and encoding method, next to theory.

For each setting ``DIMxSTAGESxENTRIES`` (default: 8 dimensions with 4 stages
of 256 entries, and 1 dimension with 5 stages of 2 entries) and each stage
count k = 1..stages, the held-out SNR ``10 log10(1 / MSE)`` (dB; the source
has unit variance) of:

- ``ema``: the layer trained in training mode on fresh batches (EMA updates),
  greedy encoding of the first k stages;
- ``kmeans``: offline codebooks, scikit-learn ``KMeans`` fitted stage by stage
  to the greedy residuals of a fixed training sample (the reference the EMA
  layer should match);
- ``beam4``, ``beam16``: the EMA codebooks with beam-search encoding;
- ``refine``: a k-stage copy of the EMA layer after ``q.refine(train)``
  (joint least-squares codewords, codes fixed, re-encoded greedily);
- ``refine+beam16``: ``q.refine(train, beam=16)``, encoded with beam 16.

Beside them: Shannon's bound, ``6.0206 dB`` per bit (D(R) = 2^(-2R); Cover &
Thomas, "Elements of Information Theory", 2nd ed. 2006, Thm 10.3.2; no
quantizer of any kind can exceed it) and, in one dimension, Lloyd-Max: the
best fixed-rate scalar quantizer with ``entries ** k`` levels (J. Max,
"Quantizing for minimum distortion", IRE Trans. Inf. Theory IT-6(1), 1960,
table; S. P. Lloyd, IEEE Trans. Inf. Theory IT-28(2), 1982). The gap of each
method is Shannon minus its SNR.

    python benchmarks/rate_distortion.py              # about 15 minutes on one CPU thread
    python benchmarks/rate_distortion.py --quick      # about a minute: smaller samples, fewer steps
    python benchmarks/rate_distortion.py --png rd.png --markdown benchmarks/results/rate_distortion.md
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

import torch

from rvqlayer import MultiStageQuantizer
from rvqlayer.files import atomic_path, atomic_write

# Lloyd-Max MSE of a unit Gaussian with N levels (Max 1960, table; Lloyd, IEEE Trans. Inf. Theory IT-28(2), 1982).
LLOYD_MAX_MSE = {2: 0.3634, 4: 0.1175, 8: 0.03454, 16: 0.009497, 32: 0.002499}
DB_PER_BIT = 20.0 * math.log10(2.0)  # 6.0206 dB: D(R) = 2^(-2R), Cover & Thomas 2006, Thm 10.3.2

DEFAULT_SETTINGS = "8x4x256,1x5x2"
METHODS = ("ema", "kmeans", "beam4", "beam16", "refine", "refine+beam16")


def _parse_settings(text: str) -> list[tuple[int, int, int]]:
    out = []
    for item in text.split(","):
        parts = item.strip().lower().split("x")
        if len(parts) != 3 or not all(p.isdigit() and int(p) > 0 for p in parts):
            raise SystemExit(f"expected `--settings` items like DIMxSTAGESxENTRIES (e.g. 8x4x256), got {item!r}")
        out.append((int(parts[0]), int(parts[1]), int(parts[2])))
    return out


def _parse_methods(text: str) -> list[str]:
    chosen = [m.strip() for m in text.split(",") if m.strip()]
    bad = [m for m in chosen if m not in METHODS]
    if bad or not chosen:
        raise SystemExit(f"expected `--methods` to be a comma list of {', '.join(METHODS)}, got {text!r}")
    return chosen


def _snr_db(mse: float) -> float:
    return -10.0 * math.log10(mse)


def _mse(q: MultiStageQuantizer, x: torch.Tensor, stages: int, beam: int) -> float:
    return float((q.decode(q.encode(x, stages=stages, beam=beam)) - x).double().pow(2).mean())


def _first_stages(q: MultiStageQuantizer, k: int) -> MultiStageQuantizer:
    """A k-stage layer holding a copy of the first k codebooks of ``q`` (eval mode)."""
    options = q.config()
    options["stages"] = k
    small = MultiStageQuantizer(**options)
    for s in range(k):
        small.codebooks[s].load_state_dict(q.codebooks[s].state_dict())
    return small.eval()


def _kmeans_layer(dim: int, stages: int, entries: int, train: torch.Tensor, seed: int) -> MultiStageQuantizer:
    """Codebooks from scikit-learn KMeans, stage by stage on the greedy residuals of ``train``."""
    from sklearn.cluster import KMeans

    q = MultiStageQuantizer(dim, stages=stages, entries=entries, init="random").eval()
    residual = train.double().numpy()
    for s in range(stages):
        fit = KMeans(n_clusters=entries, init="k-means++", n_init=1, random_state=seed + s).fit(residual)
        centres = fit.cluster_centers_
        q.codebooks[s].codewords.copy_(torch.from_numpy(centres).float())
        residual = residual - centres[fit.labels_]
    return q


def measure(
    dim: int,
    stages: int,
    entries: int,
    *,
    methods: list[str],
    steps: int,
    batch: int,
    train_size: int,
    held_out: int,
    rounds: int,
    ema_decay: float,
    seed: int,
    stage_counts: list[int] | None = None,
) -> list[dict[str, float]]:
    """One row per stage count: bits per dimension, Shannon, Lloyd-Max and each method's SNR (dB)."""
    torch.manual_seed(seed)
    q = MultiStageQuantizer(dim, stages=stages, entries=entries, ema_decay=ema_decay)
    q.train()
    for _ in range(steps):
        q(torch.randn(batch, dim))
    q.eval()
    train = torch.randn(train_size, dim, generator=torch.Generator().manual_seed(seed + 1))
    test = torch.randn(max(1, held_out // dim), dim, generator=torch.Generator().manual_seed(seed + 2))
    kmeans = _kmeans_layer(dim, stages, entries, train, seed) if "kmeans" in methods else None
    rows = []
    for k in stage_counts or range(1, stages + 1):
        if k > stages:
            continue
        bits = q.bits_per_vector(stages=k) / dim
        row: dict[str, float] = {"stages": k, "bits": bits, "shannon": DB_PER_BIT * bits}
        levels = entries**k
        if dim == 1 and levels in LLOYD_MAX_MSE:
            row["lloyd_max"] = _snr_db(LLOYD_MAX_MSE[levels])
        timings = {}
        for method in methods:
            start = time.perf_counter()
            if method == "ema":
                mse = _mse(q, test, k, 1)
            elif method == "kmeans":
                assert kmeans is not None
                mse = _mse(kmeans, test, k, 1)
            elif method in ("beam4", "beam16"):
                mse = _mse(q, test, k, int(method[4:]))
            else:
                beam = 16 if method == "refine+beam16" else 1
                small = _first_stages(q, k)
                small.refine(train, rounds=rounds, beam=beam)
                mse = _mse(small, test, k, beam)
            row[method] = _snr_db(mse)
            timings[method] = time.perf_counter() - start
        row["seconds"] = sum(timings.values())
        rows.append(row)
    return rows


def _fmt(value: float | None, digits: int = 2) -> str:
    return "-" if value is None else f"{value:.{digits}f}"


def _table(setting: tuple[int, int, int], rows: list[dict[str, float]], methods: list[str], gaps: bool) -> list[str]:
    """Markdown lines: SNR (dB) per method, or the gap to Shannon (dB) when ``gaps``."""
    head = ["stages", "bits/dim", "Shannon"] + (["Lloyd-Max"] if setting[0] == 1 else []) + methods
    lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    for r in rows:
        cells = [str(int(r["stages"])), _fmt(r["bits"]), _fmt(r["shannon"])]
        if setting[0] == 1:
            lm = r.get("lloyd_max")
            cells.append(_fmt(None if lm is None else (r["shannon"] - lm if gaps else lm)))
        cells += [_fmt(r["shannon"] - r[m] if gaps else r[m]) for m in methods]
        lines.append("| " + " | ".join(cells) + " |")
    return lines


def _plot(results: list[tuple[tuple[int, int, int], list[dict[str, float]]]], methods: list[str], path: str) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, len(results), figsize=(6.0 * len(results), 4.4), squeeze=False)
    for ax, (setting, rows) in zip(axes[0], results):
        bits = [r["bits"] for r in rows]
        top = max(bits)
        ax.plot([0, top], [0, DB_PER_BIT * top], "k-", label="Shannon bound (6.02 dB/bit)")
        for method in methods:
            ax.plot(bits, [r[method] for r in rows], "o-", ms=4, lw=1, label=method)
        lm = [(r["bits"], r["lloyd_max"]) for r in rows if "lloyd_max" in r]
        if lm:
            ax.plot([p[0] for p in lm], [p[1] for p in lm], "kx", ms=8, label="Lloyd-Max (Max 1960)")
        dim, stages, entries = setting
        ax.set_title(f"dim {dim}, {stages} stages x {entries} entries")
        ax.set_xlabel("bits per dimension")
        ax.set_ylabel("SNR (dB), held-out unit Gaussian")
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize=7)
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=110, format="png")
    plt.close(fig)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--settings", default=DEFAULT_SETTINGS, help="comma list of DIMxSTAGESxENTRIES")
    parser.add_argument("--methods", default=",".join(METHODS), help="comma list of " + ", ".join(METHODS))
    parser.add_argument("--steps", type=int, default=1000, help="EMA training batches per setting")
    parser.add_argument("--batch", type=int, default=2048, help="vectors per training batch")
    parser.add_argument("--train-size", type=int, default=1 << 17, help="fixed sample for k-means and refinement")
    parser.add_argument("--held-out", type=int, default=1 << 19, help="held-out numbers (vectors x dim) per setting")
    parser.add_argument("--rounds", type=int, default=4, help="refinement rounds")
    parser.add_argument("--ema-decay", type=float, default=0.99, help="EMA decay of the layer")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--stage-counts", default=None, help="comma list of stage counts to measure (default all)")
    parser.add_argument("--threads", type=int, default=1, help="torch intra-op threads")
    parser.add_argument(
        "--quick", action="store_true", help="200 steps, 2^14 training vectors, 2^17 held-out numbers, 2 rounds"
    )
    parser.add_argument("--png", default=None, help="write a plot of SNR against rate to this path")
    parser.add_argument("--markdown", default=None, help="write the tables as Markdown to this path")
    args = parser.parse_args(argv)
    settings = _parse_settings(args.settings)
    methods = _parse_methods(args.methods)
    if args.quick:
        args.steps, args.train_size, args.held_out, args.rounds = 200, 1 << 14, 1 << 17, 2
    torch.set_num_threads(args.threads)

    about = (
        f"unit Gaussian; EMA layer: {args.steps} training batches of {args.batch}, ema_decay={args.ema_decay}; "
        f"k-means and refinement on {args.train_size} fixed vectors ({args.rounds} refinement rounds); "
        f"SNR on {args.held_out} held-out numbers (vectors x dim); seed {args.seed}; {args.threads} thread(s)"
    )
    print(about, flush=True)
    results = []
    command = "python benchmarks/rate_distortion.py " + " ".join(sys.argv[1:] if argv is None else argv)
    md = ["# Rate against distortion: the layer beside the Shannon bound", "", f"`{command.strip()}`", "", about, ""]
    for setting in settings:
        start = time.perf_counter()
        rows = measure(
            *setting,
            methods=methods,
            steps=args.steps,
            batch=args.batch,
            train_size=args.train_size,
            held_out=args.held_out,
            rounds=args.rounds,
            ema_decay=args.ema_decay,
            seed=args.seed,
            stage_counts=[int(k) for k in args.stage_counts.split(",")] if args.stage_counts else None,
        )
        took = time.perf_counter() - start
        results.append((setting, rows))
        dim, stages, entries = setting
        title = f"dim {dim}, {stages} stages of {entries} entries ({took:.0f} s)"
        snr, gap = _table(setting, rows, methods, False), _table(setting, rows, methods, True)
        print(f"\n{title}: SNR dB\n" + "\n".join(snr) + "\n\ngap to Shannon dB\n" + "\n".join(gap), flush=True)
        md += [f"## {title}", "", "SNR (dB):", "", *snr, "", "Gap to the Shannon bound (dB; smaller is better):", ""]
        md += [*gap, ""]
    if args.png:
        _plot(results, methods, args.png)
        print(f"wrote {args.png}")
    if args.markdown:
        Path(args.markdown).parent.mkdir(parents=True, exist_ok=True)
        with atomic_write(args.markdown, "w", encoding="utf-8") as f:
            f.write("\n".join(md))
        print(f"wrote {args.markdown}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
