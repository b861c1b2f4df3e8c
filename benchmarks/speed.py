#!/usr/bin/env python3
"""Speed and memory of ``MultiStageQuantizer`` against the hardware limit and a naive reference.

For each configuration (``dim``, ``stages``, ``entries``, ``batch``; float32),
in one run and interleaved (every repetition times each method once, in
turn), the median of ``--repeats`` wall-clock repetitions after ``--warmup``
untimed ones, of:

- ``limit``: per stage, the raw ``[batch, dim] @ [dim, entries]`` matrix
  product into a preallocated output: the work no exact nearest-code search
  can skip;
- ``naive encode``: per stage ``torch.cdist`` + ``argmin`` + gather (written here);
- ``encode``: rvqlayer's eval-mode ``encode`` (greedy);
- ``naive train``: the same search plus EMA statistics through a one-hot
  matrix product, a dead-code check with reseeding, the commitment loss and
  the straight-through output, then backward of ``sum(quantized * probe) + loss``
  (``probe``: a fixed random ``[dim]`` vector; a linear loss, so its own
  backward costs one gradient tensor);
- ``train``: rvqlayer's training step: ``forward`` (EMA update, reseeding
  check) and backward of the same loss through the straight-through output.

Peak extra memory (MiB) of one ``encode`` and of one training step is
measured in a fresh child process per configuration and mode: on CPU the
peak resident set size (``VmHWM`` in ``/proc/self/status``, reset through
``/proc/self/clear_refs`` just before the call; elsewhere the growth of
``resource.getrusage().ru_maxrss``) minus the resident size just before,
with the input already allocated; on a GPU ``torch.cuda.max_memory_allocated``
minus the allocation before. The child warms up on a tiny batch only, so
memory freed by a full-size warm-up cannot hide in the allocator. For scale,
``step MiB`` is the same training step with the layer replaced by
``x.clone()``: what the loss and its backward cost without any quantizer.

Headline: dim 128, 8 stages, 1024 entries, batch 16384. Sweeps vary one of
entries (256..4096), stages (1..32), batch (1k..256k) and dim (8..128, no
projection: ``code_dim == dim``), the rest at the headline.

    python benchmarks/speed.py                 # full run: tens of minutes on 2 busy cores
    python benchmarks/speed.py --quick         # tiny sizes, seconds (the smoke test runs this)
    python benchmarks/speed.py --only headline --threads 1
    python benchmarks/speed.py --compare old/speed.json new/speed.json

Writes ``speed.md``, ``speed.json`` and ``speed.png`` into ``--out``
(default ``benchmarks/results``). Timings depend on the machine and its load;
compare ratios taken in the same run, and never use them as test thresholds.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import time
from pathlib import Path

import torch
import torch.nn.functional as F

from rvqlayer import MultiStageQuantizer
from rvqlayer.files import atomic_path, atomic_write

METHODS = ("limit", "naive_encode", "encode", "naive_train", "train")
HEADLINE = {"dim": 128, "stages": 8, "entries": 1024, "batch": 16384}
SWEEPS = {
    "entries": [256, 512, 1024, 2048, 4096],
    "stages": [1, 2, 4, 8, 16, 32],
    "batch": [1024, 4096, 16384, 65536, 262144],
    "dim": [8, 16, 32, 64, 128],
}
QUICK_HEADLINE = {"dim": 16, "stages": 2, "entries": 32, "batch": 512}
QUICK_SWEEPS = {"entries": [16, 32], "stages": [1, 2], "batch": [256, 512], "dim": [8, 16]}


# --------------------------------------------------------------------- methods
def _layer(cfg: dict[str, int], device: str) -> MultiStageQuantizer:
    torch.manual_seed(0)
    return MultiStageQuantizer(cfg["dim"], stages=cfg["stages"], entries=cfg["entries"], init="random").to(device)


def _limit(x: torch.Tensor, books_t: list[torch.Tensor], out: torch.Tensor) -> None:
    for c_t in books_t:
        torch.mm(x, c_t, out=out)


def _naive_encode(x: torch.Tensor, books: list[torch.Tensor]) -> torch.Tensor:
    residual = x
    codes = []
    for c in books:
        idx = torch.cdist(residual, c).argmin(1)
        codes.append(idx)
        residual = residual - c[idx]
    return torch.stack(codes, 1)


class _NaiveState:
    """Codewords and EMA statistics for the naive training step (decay 0.99, as the layer's default)."""

    def __init__(self, books: list[torch.Tensor]) -> None:
        self.books = [c.clone() for c in books]
        self.counts = [torch.ones(c.shape[0], device=c.device) for c in books]
        self.sums = [c.clone() for c in books]


def _probe(dim: int, device: str) -> torch.Tensor:
    return torch.randn(dim, generator=torch.Generator().manual_seed(2)).to(device)


def _naive_train(
    x: torch.Tensor, state: _NaiveState, probe: torch.Tensor, decay: float = 0.99, beta: float = 0.25
) -> None:
    residual = x
    total = torch.zeros_like(x)
    loss = x.new_zeros(())
    for s, c in enumerate(state.books):
        k = c.shape[0]
        with torch.no_grad():
            idx = torch.cdist(residual, c).argmin(1)
        q = c[idx]
        loss = loss + beta * F.mse_loss(residual, q)
        with torch.no_grad():
            onehot = F.one_hot(idx, k).to(x.dtype)
            counts, sums = state.counts[s], state.sums[s]
            counts.mul_(decay).add_(onehot.sum(0), alpha=1 - decay)
            sums.mul_(decay).add_(onehot.T @ residual, alpha=1 - decay)
            c.copy_(sums / (counts + 1e-5).unsqueeze(1))
            dead = counts < 0.03 * counts.sum() / k
            if bool(dead.any()):
                picks = residual[torch.randint(residual.shape[0], (int(dead.sum()),), device=x.device)]
                c[dead] = picks
                counts[dead] = counts.sum() / k
                sums[dead] = picks * counts[dead].unsqueeze(1)
        total = total + q
        residual = residual - q
    out = x + (total - x).detach()
    ((out * probe).sum() + loss).backward()


def _train(q: MultiStageQuantizer, x: torch.Tensor, probe: torch.Tensor) -> None:
    out = q(x)
    ((out.quantized * probe).sum() + out.loss).backward()


def _identity_step(x: torch.Tensor, probe: torch.Tensor) -> None:
    """The training step's loss and backward with the layer replaced by a copy of its input."""
    ((x.clone() * probe).sum()).backward()


def _sync(device: str) -> None:
    if device == "cuda":
        torch.cuda.synchronize()


def _time_row(cfg: dict[str, int], device: str, repeats: int, warmup: int) -> dict[str, list[float]]:
    """Interleaved wall-clock times (s) of every method for one configuration."""
    g = torch.Generator(device="cpu").manual_seed(1)
    x = torch.randn(cfg["batch"], cfg["dim"], generator=g).to(device)
    q_eval = _layer(cfg, device).eval()
    q_train = _layer(cfg, device).train()
    books = [cb.codewords.detach().clone() for cb in q_eval.codebooks]
    books_t = [c.T.contiguous() for c in books]
    out = torch.empty(cfg["batch"], cfg["entries"], device=device)
    naive = _NaiveState(books)
    x_grad = x.clone().requires_grad_(True)
    x_naive = x.clone().requires_grad_(True)
    probe = _probe(cfg["dim"], device)

    def train() -> None:
        x_grad.grad = None
        _train(q_train, x_grad, probe)

    def naive_train() -> None:
        x_naive.grad = None
        _naive_train(x_naive, naive, probe)

    calls = {
        "limit": lambda: _limit(x, books_t, out),
        "naive_encode": lambda: _naive_encode(x, books),
        "encode": lambda: q_eval.encode(x),
        "naive_train": naive_train,
        "train": train,
    }
    times: dict[str, list[float]] = {m: [] for m in METHODS}
    for rep in range(warmup + repeats):
        order = METHODS[rep % len(METHODS) :] + METHODS[: rep % len(METHODS)]  # rotate: no fixed neighbour
        for m in order:
            _sync(device)
            start = time.perf_counter()
            if m in ("limit", "naive_encode", "encode"):
                with torch.no_grad():
                    calls[m]()
            else:
                calls[m]()
            _sync(device)
            if rep >= warmup:
                times[m].append(time.perf_counter() - start)
    return times


# ---------------------------------------------------------------------- memory
def _status_kib() -> dict[str, int] | None:
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
    """In a fresh process: peak extra memory (MiB) of one call of ``args.mode``; prints one JSON line."""
    torch.set_num_threads(args.threads)
    cfg = {"dim": args.dim, "stages": args.stages, "entries": args.entries, "batch": args.batch}
    device = args.device
    q = _layer(cfg, device)
    q.train(args.mode == "train")
    grad = args.mode in ("train", "identity")
    probe = _probe(cfg["dim"], device)

    def call(x: torch.Tensor) -> None:
        if args.mode == "identity":
            _identity_step(x, probe)
        elif grad:
            _train(q, x, probe)
        else:
            with torch.no_grad():
                q.encode(x)

    call(torch.randn(64, cfg["dim"], device=device).requires_grad_(grad))  # load libraries, one-time buffers
    x = torch.randn(cfg["batch"], cfg["dim"], device=device).requires_grad_(grad)
    if device == "cuda":
        torch.cuda.synchronize()
        torch.cuda.reset_peak_memory_stats()
        before = torch.cuda.memory_allocated()
        call(x)
        torch.cuda.synchronize()
        extra, how = (torch.cuda.max_memory_allocated() - before) / 2**20, "cuda max_memory_allocated"
    elif _status_kib() is not None and _reset_peak():
        before = _status_kib()["VmRSS"]
        call(x)
        extra, how = (_status_kib()["VmHWM"] - before) / 1024.0, "VmHWM"
    else:
        import resource  # Unix only

        before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        call(x)
        extra, how = (resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - before) / 1024.0, "ru_maxrss"
    print(json.dumps({"extra_mib": extra, "how": how}))


def _measure_memory(cfg: dict[str, int], device: str, mode: str, threads: int) -> dict[str, object]:
    opts = {**{f"--{k}": v for k, v in cfg.items()}, "--device": device, "--mode": mode, "--threads": threads}
    cmd = [sys.executable, __file__, "--memory-child", *(str(v) for pair in opts.items() for v in pair)]
    done = subprocess.run(cmd, capture_output=True, text=True, check=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


# --------------------------------------------------------------------- running
def _configs(headline: dict[str, int], sweeps: dict[str, list[int]], only: str) -> list[tuple[str, dict[str, int]]]:
    """``(sweep, config)`` pairs, the headline first; a sweep's headline point is the headline row."""
    rows = [("headline", dict(headline))]
    if only == "headline":
        return rows
    for name, values in sweeps.items():
        if only not in ("all", name):
            continue
        for v in values:
            cfg = {**headline, name: v}
            if cfg != headline:
                rows.append((name, cfg))
    return rows


def _library_commit() -> str:
    import rvqlayer

    where = Path(rvqlayer.__file__).resolve().parent
    try:
        done = subprocess.run(
            ["git", "-C", str(where), "describe", "--always", "--dirty"], capture_output=True, text=True, timeout=10
        )
        return done.stdout.strip() or "unknown"
    except (OSError, subprocess.SubprocessError):
        return "unknown"


def _summarise(times: dict[str, list[float]], cfg: dict[str, int]) -> dict[str, object]:
    med = {m: statistics.median(v) for m, v in times.items()}
    return {
        "median_s": med,
        "vectors_per_s": {m: cfg["batch"] / t for m, t in med.items()},
        "encode_over_limit": med["encode"] / med["limit"],
        "train_over_limit": med["train"] / med["limit"],
        "naive_over_encode": med["naive_encode"] / med["encode"],
        "naive_over_train": med["naive_train"] / med["train"],
        "times_s": times,
    }


def run(args: argparse.Namespace) -> dict[str, object]:
    headline, sweeps = (QUICK_HEADLINE, QUICK_SWEEPS) if args.quick else (HEADLINE, SWEEPS)
    devices = ["cpu"] + (["cuda"] if torch.cuda.is_available() and not args.cpu_only else [])
    memory_rows = args.memory if args.memory != "auto" else ("headline" if args.quick else "all")
    rows = []
    for device in devices:
        for sweep, cfg in _configs(headline, sweeps, args.only):
            times = _time_row(cfg, device, args.repeats, args.warmup)
            row: dict[str, object] = {"sweep": sweep, "device": device, **cfg, **_summarise(times, cfg)}
            row["input_mib"] = cfg["batch"] * cfg["dim"] * 4 / 2**20
            row["memory_mib"] = {"encode": None, "train": None, "identity_step": None}
            if memory_rows == "all" or (memory_rows == "headline" and sweep == "headline"):
                for mode in ("encode", "train", "identity"):
                    got = _measure_memory(cfg, device, mode, args.threads)
                    row["memory_mib"]["identity_step" if mode == "identity" else mode] = got["extra_mib"]  # type: ignore[index]
                    row["memory_how"] = got["how"]
            rows.append(row)
            print(_md_row(row), flush=True)
    return {
        "meta": {
            "torch": torch.__version__,
            "threads": args.threads,
            "cpu_count": os.cpu_count(),
            "platform": platform.platform(),
            "processor": platform.processor(),
            "rvqlayer_commit": _library_commit(),
            "repeats": args.repeats,
            "warmup": args.warmup,
            "date": time.strftime("%Y-%m-%d %H:%M:%S"),
            "load_average": os.getloadavg() if hasattr(os, "getloadavg") else None,
            "dtype": "float32",
        },
        "rows": rows,
    }


# --------------------------------------------------------------------- outputs
_HEADER = (
    "| sweep | device | dim | stages | entries | batch | limit ms | encode ms | train ms | "
    "encode/limit | train/limit | naive/encode | naive/train | encode vec/s | train vec/s | "
    "encode MiB | train MiB | step MiB | input MiB |"
)


def _fmt(v: object, spec: str) -> str:
    return "-" if v is None else format(v, spec)


def _md_row(r: dict) -> str:
    med, vps, mem = r["median_s"], r["vectors_per_s"], r["memory_mib"]
    cells = [
        r["sweep"], r["device"], r["dim"], r["stages"], r["entries"], r["batch"],
        f"{med['limit'] * 1e3:.1f}", f"{med['encode'] * 1e3:.1f}", f"{med['train'] * 1e3:.1f}",
        f"{r['encode_over_limit']:.2f}", f"{r['train_over_limit']:.2f}",
        f"{r['naive_over_encode']:.2f}", f"{r['naive_over_train']:.2f}",
        f"{vps['encode']:,.0f}", f"{vps['train']:,.0f}",
        _fmt(mem["encode"], ".0f"), _fmt(mem["train"], ".0f"), _fmt(mem["identity_step"], ".0f"),
        f"{r['input_mib']:.0f}",
    ]  # fmt: skip
    return "| " + " | ".join(str(c) for c in cells) + " |"


def write_markdown(result: dict, path: Path) -> None:
    meta = result["meta"]
    lines = [
        "# Speed against the limit",
        "",
        f"rvqlayer {meta['rvqlayer_commit']}, torch {meta['torch']}, {meta['threads']} thread(s) of "
        f"{meta['cpu_count']} CPUs, {meta['platform']}, {meta['date']}, load average {meta['load_average']}.",
        f"Median of {meta['repeats']} interleaved repetitions after {meta['warmup']} warm-up; float32.",
        "",
        "encode/limit, train/limit: time over the raw per-stage matrix products (lower is better, 1 is the limit).",
        "naive/encode, naive/train: the naive reference's time over rvqlayer's (higher is better).",
        "MiB: peak extra memory of one call in a fresh process, input already allocated ('-': not measured);",
        "step MiB: the training step's loss and backward with the layer replaced by `x.clone()`.",
        "",
        _HEADER,
        "|" + "---|" * (_HEADER.count("|") - 1),
    ]
    lines += [_md_row(r) for r in result["rows"]]
    with atomic_write(path, "w") as fh:
        fh.write("\n".join(lines) + "\n")


def write_png(result: dict, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    head = next(r for r in result["rows"] if r["sweep"] == "headline")
    fig, axes = plt.subplots(1, 2, figsize=(10, 4))
    for ax, key in zip(axes, ("batch", "entries")):
        pts = sorted(
            (r for r in result["rows"] if r["device"] == "cpu" and r["sweep"] in ("headline", key)),
            key=lambda r: r[key],
        )
        xs = [r[key] for r in pts]
        for m, style in (
            ("limit", "k-"),
            ("encode", "o-"),
            ("train", "s-"),
            ("naive_encode", "o:"),
            ("naive_train", "s:"),
        ):
            ax.plot(xs, [r["median_s"][m] for r in pts], style, label=m.replace("_", " "))
        ax.set_xscale("log", base=2)
        ax.set_yscale("log")
        ax.set_xlabel(key)
        ax.set_ylabel("seconds (median)")
        others = {k: head[k] for k in ("dim", "stages", "entries", "batch") if k != key}
        ax.set_title(", ".join(f"{k} {v}" for k, v in others.items()), fontsize=9)
        ax.grid(True, which="both", alpha=0.3)
    axes[0].legend(fontsize=8)
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format="png", dpi=100)
    plt.close(fig)


def compare(old_path: str, new_path: str) -> None:
    """Print the ratio columns of two runs side by side (rows matched by configuration)."""
    old, new = (json.loads(Path(p).read_text()) for p in (old_path, new_path))
    key = ("device", "dim", "stages", "entries", "batch")
    before = {tuple(r[k] for k in key): r for r in old["rows"]}
    print(f"old: {old['meta']['rvqlayer_commit']}   new: {new['meta']['rvqlayer_commit']}")
    print(
        f"{'sweep':>9} {'config':>24} {'enc/limit':>17} {'train/limit':>17} {'naive/enc':>15} "
        f"{'naive/train':>15} {'enc MiB':>13} {'train MiB':>13}"
    )
    for r in new["rows"]:
        o = before.get(tuple(r[k] for k in key))
        if o is None:
            continue

        def pair(a: object, b: object, spec: str = ".2f") -> str:
            return f"{_fmt(a, spec):>7}->{_fmt(b, spec):<7}"

        cfg = f"{r['dim']}x{r['stages']}x{r['entries']}@{r['batch']}"
        print(
            f"{r['sweep']:>9} {cfg:>24} {pair(o['encode_over_limit'], r['encode_over_limit'])} "
            f"{pair(o['train_over_limit'], r['train_over_limit'])} "
            f"{pair(o['naive_over_encode'], r['naive_over_encode'])} "
            f"{pair(o['naive_over_train'], r['naive_over_train'])} "
            f"{pair(o['memory_mib']['encode'], r['memory_mib']['encode'], '.0f')} "
            f"{pair(o['memory_mib']['train'], r['memory_mib']['train'], '.0f')}"
        )


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--quick", action="store_true", help="tiny sizes (dim 16, 2 stages, 32 entries, batch 512)")
    parser.add_argument("--only", default="all", choices=("all", "headline", *SWEEPS), help="headline or one sweep")
    parser.add_argument("--repeats", type=int, default=7, help="timed repetitions (median)")
    parser.add_argument("--warmup", type=int, default=1, help="untimed repetitions first")
    parser.add_argument("--threads", type=int, default=torch.get_num_threads(), help="torch intra-op threads")
    parser.add_argument("--memory", default="auto", choices=("auto", "all", "headline", "none"))
    parser.add_argument("--cpu-only", action="store_true", help="skip the GPU even when one is present")
    parser.add_argument("--out", default=str(Path(__file__).resolve().parent / "results"), help="output folder")
    parser.add_argument("--compare", nargs=2, metavar=("OLD_JSON", "NEW_JSON"), help="print two runs side by side")
    # The memory child's options (internal).
    parser.add_argument("--memory-child", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--mode", choices=("encode", "train", "identity"), help=argparse.SUPPRESS)
    parser.add_argument("--device", default="cpu", help=argparse.SUPPRESS)
    for k in HEADLINE:
        parser.add_argument(f"--{k}", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.compare:
        compare(*args.compare)
        return 0
    if args.memory_child:
        _memory_child(args)
        return 0
    if args.repeats < 1 or args.warmup < 0 or args.threads < 1:
        parser.error("--repeats and --threads must be >= 1, --warmup >= 0")
    torch.set_num_threads(args.threads)
    print(_HEADER, flush=True)
    result = run(args)
    out = Path(args.out)
    with atomic_write(out / "speed.json", "w") as fh:
        json.dump(result, fh, indent=1)
    write_markdown(result, out / "speed.md")
    write_png(result, out / "speed.png")
    print(f"wrote {out / 'speed.md'}, {out / 'speed.json'}, {out / 'speed.png'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
