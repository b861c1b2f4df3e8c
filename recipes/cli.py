"""``rvqlayer-recipe NAME``: train a bundled recipe on CPU and print its rate-quality table.

Everything the command is given is checked before anything is written: a bad
option, data file, output folder or checkpoint gives one line on stderr and
exit status 2. Ctrl-C during training writes a checkpoint, prints the command
that continues the run, and exits with status 130.
"""

from __future__ import annotations

import argparse
import os
import shlex
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NoReturn

from ._errors import RecipeInputError, input_error
from ._settings import RECIPE_SPECIFIC, SETTINGS, Setting, check_stored, combine
from .registry import RECIPES, Prepared, Recipe, RecipeSpec

PROG = "rvqlayer-recipe"
EXIT_BAD_INPUT = 2
EXIT_INTERRUPTED = 130  # 128 + SIGINT, what shells report for Ctrl-C
_MAX_THREADS = 4096
_MAX_PROCESSES = 1024
_HELP = {
    "stages": ("N", "codebooks (stages), 1-64"),
    "entries": ("K", "codewords per stage, 2-16384"),
    "code_dim": ("D", "lookup size, 1 to the quantizer's input size (default: see below)"),
    "steps": ("N", "training steps in total"),
    "batch_size": ("B", "examples per step"),
    "seed": ("S", "seed of data and model (default 0)"),
    "data": (
        "PATH",
        "embeddings: feature file .npy or .pt, [N, dim] or [N, T, dim]; speech: a folder of WAV/FLAC files",
    ),
    "frame_rate": ("HZ", "vectors per second, to report kbps"),
    "refine": ("ROUNDS", "rounds of joint codebook refinement after training, 0-20 (default 0)"),
}


class _UsageError(Exception):
    pass


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> NoReturn:
        raise _UsageError(message)


def _argument_type(setting: Setting):
    def parse(text: str) -> Any:
        try:
            return setting.parse(text)
        except RecipeInputError as err:
            raise argparse.ArgumentTypeError(str(err)) from None

    parse.__name__ = setting.key
    return parse


def _check_threads(flag: str, value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= _MAX_THREADS:
        raise input_error(flag, f"an int in [1, {_MAX_THREADS}]", repr(value))
    return value


def _check_processes(flag: str, value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= _MAX_PROCESSES:
        raise input_error(flag, f"an int in [1, {_MAX_PROCESSES}]", repr(value))
    return value


def _is_rank_zero() -> bool:
    """False in the processes Lightning's DDP launcher starts for ranks other than zero."""
    return os.environ.get("LOCAL_RANK", "0") == "0" and os.environ.get("NODE_RANK", "0") == "0"


def build_parser() -> argparse.ArgumentParser:
    recipes = "\n".join(f"  {spec.name:<11} {spec.summary}" for spec in RECIPES.values())
    parser = _Parser(
        prog=PROG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Train a bundled rvqlayer recipe on CPU and print its rate-quality table "
        "(one row per number of stages used).\n\nrecipes:\n" + recipes,
        epilog="defaults:\n" + "\n".join("  " + spec.describe() for spec in RECIPES.values()) + "\n\n"
        "Options left out take the recipe's defaults (or, with --resume, the checkpoint's).\n"
        "Bad input exits with status 2 before anything is written; Ctrl-C during training\n"
        "saves a checkpoint and exits with status 130.",
    )
    parser.add_argument("name", choices=list(RECIPES), metavar="NAME", help=" | ".join(RECIPES))
    for key, setting in SETTINGS.items():
        metavar, text = _HELP[key]
        takers = [s.name for s in RECIPES.values() if key in s.options]
        if key in RECIPE_SPECIFIC:
            text = f"{' | '.join(takers)} only: {text}"
        kind = Path if key == "data" else _argument_type(setting)
        parser.add_argument(setting.flag, dest=key, metavar=metavar, type=kind, help=text)
    parser.add_argument("--out", metavar="DIR", type=Path, help="output folder (default: runs/NAME)")
    parser.add_argument("--resume", action="store_true", help="continue from the last checkpoint in --out")
    parser.add_argument("--quick", action="store_true", help="a short run (under a minute); what the tests use")
    parser.add_argument(
        "--devices",
        metavar="N",
        type=_argument_type(Setting("devices", _check_processes, int)),
        help="processes on this machine (Lightning DDP, gloo on CPU; default 1); --batch-size is split among all",
    )
    parser.add_argument(
        "--num-nodes",
        metavar="M",
        type=_argument_type(Setting("num_nodes", _check_processes, int)),
        help="machines, passed to Lightning (default 1; needs a cluster environment such as SLURM or torchrun)",
    )
    parser.add_argument(
        "--threads",
        metavar="N",
        type=_argument_type(Setting("threads", _check_threads, int)),
        help=f"torch intra-op threads (default: this machine's {os.cpu_count() or 1}; 1 with --quick)",
    )
    return parser


@dataclass
class _Run:
    """Everything a checked command line leads to; nothing written yet."""

    spec: RecipeSpec
    recipe: Recipe
    settings: dict[str, Any]
    prepared: Prepared
    module: Any
    resume: dict[str, Any] | None
    out: Path
    threads: int


def main(argv: list[str] | None = None) -> int:
    """Run the command; returns the exit status (0 done, 2 bad input, 130 interrupted)."""
    started = time.perf_counter()
    if not _is_rank_zero():  # rank zero alone speaks and writes
        sys.stdout = open(os.devnull, "w")  # noqa: SIM115 - for the life of this worker process
    try:
        args = build_parser().parse_args(argv)
    except _UsageError as exc:
        print(f"{PROG}: error: {exc} (see {PROG} --help)", file=sys.stderr)
        return EXIT_BAD_INPUT
    except SystemExit as exc:  # --help
        return int(exc.code or 0)
    try:
        run = _validate(args)
        from ._out_dir import make_output_dir

        make_output_dir(run.out)
    except RecipeInputError as exc:
        print(f"{PROG}: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print(f"{PROG}: interrupted before anything was written", file=sys.stderr)
        return EXIT_INTERRUPTED

    import torch

    from ._checkpoint import CHECKPOINT
    from ._outputs import summary
    from ._training import OtherRankDone, TrainingInterrupted

    again = f"{PROG} {run.spec.name} --resume --out {shlex.quote(str(run.out))}"
    threads_before = torch.get_num_threads()
    torch.set_num_threads(run.threads)
    try:
        if run.resume is None and (run.out / CHECKPOINT).exists():
            print(f"note: {run.out / CHECKPOINT} exists; starting afresh and replacing it (--resume continues it)")
        table, files = run.recipe.run(run.module, run.settings, run.prepared, run.out, run.resume)
    except OtherRankDone:
        return 0
    except TrainingInterrupted as stop:
        if not _is_rank_zero():
            return EXIT_INTERRUPTED
        print(f"{PROG}: interrupted at step {stop.step}; checkpoint written; continue with: {again}", file=sys.stderr)
        return EXIT_INTERRUPTED
    except KeyboardInterrupt:
        kept = "the last checkpoint is kept" if (run.out / CHECKPOINT).exists() else "no checkpoint yet"
        print(f"{PROG}: interrupted; {kept}; continue with: {again}", file=sys.stderr)
        return EXIT_INTERRUPTED
    finally:
        torch.set_num_threads(threads_before)
    settings = run.settings
    print()
    print(f"rate-quality table ({run.spec.name}, {settings['steps']} steps, seed {settings['seed']}):")
    print(table.format())
    for problem in table.worse_with_more_stages():
        print(f"note: quality got worse with more stages: {problem}")
    print()
    print(summary(run.out, files))
    print(f"done in {time.perf_counter() - started:.1f} s")
    return 0


def _validate(args: argparse.Namespace) -> _Run:
    """Check everything given on the command line (and the checkpoint, with --resume); writes nothing."""
    spec = RECIPES[args.name]
    for key in RECIPE_SPECIFIC:
        if getattr(args, key) is not None and key not in spec.options:
            takers = " or ".join(repr(s.name) for s in RECIPES.values() if key in s.options)
            flag = SETTINGS[key].flag
            raise input_error(flag, f"given only with the {takers} recipe", f"{flag} with {args.name!r}")
    out = args.out if args.out is not None else Path("runs") / args.name
    from ._out_dir import check_output_dir

    check_output_dir(out)
    recipe = spec.load()
    from ._checkpoint import CHECKPOINT, check_resumable, read_checkpoint
    from ._training import monitor_callbacks

    resume, stored = None, None
    if args.resume:
        resume = read_checkpoint(out / CHECKPOINT)
        stored = check_stored(resume["recipe"], spec, repr(str(out / CHECKPOINT)))
    given = {key: getattr(args, key) for key in SETTINGS}
    if given["data"] is not None:
        given["data"] = str(given["data"])
    settings = combine(given, stored, spec, args.quick)
    processes = (args.devices or 1) * (args.num_nodes or 1)
    if settings["batch_size"] % processes:
        raise input_error(
            "--batch-size", f"a multiple of the {processes} processes (--devices x --num-nodes)", settings["batch_size"]
        )
    if processes > 1:  # how the run is spread, not what it computes: stored, never read back on --resume
        settings["devices"], settings["num_nodes"] = args.devices or 1, args.num_nodes or 1
    prepared = recipe.prepare(settings)
    if settings["data"]:
        settings["data"] = str(Path(settings["data"]).resolve())
    if prepared.shape is not None:
        settings["data_shape"] = list(prepared.shape)
    if (
        prepared.shape is not None
        and stored is not None
        and stored.get("data_shape") not in (None, list(prepared.shape))
    ):
        raise input_error(
            "--data",
            f"features of shape {stored['data_shape']} as in the checkpoint",
            f"shape {settings.get('data_shape')}",
        )
    limit = prepared.input_size
    if settings["code_dim"] is not None and not 1 <= settings["code_dim"] <= limit:
        raise input_error("--code-dim", f"an int in [1, {limit}] (the quantizer's input size)", settings["code_dim"])
    module = recipe.build(settings, prepared)
    if resume is not None:
        check_resumable(resume, module, out / CHECKPOINT, monitor_callbacks())
    threads = args.threads or (1 if settings["quick"] else (os.cpu_count() or 1))
    return _Run(spec, recipe, settings, prepared, module, resume, out, threads)


if __name__ == "__main__":
    sys.exit(main())
