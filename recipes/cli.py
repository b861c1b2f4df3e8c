"""``rvqlayer-recipe NAME``: train a bundled recipe on CPU and print its rate-quality table.

Everything the command is given is checked before anything is written: a bad
option, data file or output folder gives one line on stderr and exit status 2.
"""

from __future__ import annotations

import argparse
import importlib
import math
import sys
import time
from pathlib import Path
from typing import Any, NoReturn

from rvqlayer._checks import RvqlayerError, fail

from ._defaults import describe

PROG = "rvqlayer-recipe"
RECIPES = ("tones", "digits", "embeddings", "speech")
_SUMMARIES = {
    "tones": "a small audio codec on synthetic 16 kHz tones, noise bursts and pauses",
    "digits": "scikit-learn's bundled 8x8 handwritten digits through a small autoencoder",
    "embeddings": "a quantizer fitted directly to pre-computed feature vectors (.npy or .pt)",
    "speech": "the main job: a small speech codec at 16 kHz judged by PESQ and STOI (synthetic or --data DIR)",
}
_TAKES_DATA = ("embeddings", "speech")
# Settings that fix the model's shape or its data stream: a resumed run must keep them.
_FIXED_ON_RESUME = ("stages", "entries", "code_dim", "seed", "data")


class _UsageError(Exception):
    pass


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> NoReturn:
        raise _UsageError(message)


def _int_in(name: str, low: int, high: int):
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(str(fail(name, "an int", repr(text)))) from None
        if not low <= value <= high:
            raise argparse.ArgumentTypeError(str(fail(name, f"an int in [{low}, {high}]", value)))
        return value

    return parse


def _positive_float(name: str):
    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(str(fail(name, "a number", repr(text)))) from None
        if not (math.isfinite(value) and value > 0):
            raise argparse.ArgumentTypeError(str(fail(name, "a finite number > 0", value)))
        return value

    return parse


def build_parser() -> argparse.ArgumentParser:
    recipes = "\n".join(f"  {n:<11} {s}" for n, s in _SUMMARIES.items())
    parser = _Parser(
        prog=PROG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Train a bundled rvqlayer recipe on CPU and print its rate-quality table "
        "(one row per number of stages used).\n\nrecipes:\n" + recipes,
        epilog="defaults:\n" + "\n".join("  " + describe(n) for n in RECIPES) + "\n\n"
        "Options left out take the recipe's defaults (or, with --resume, the checkpoint's).\n"
        "Bad input exits with status 2 before anything is written.",
    )
    parser.add_argument("name", choices=RECIPES, metavar="NAME", help=" | ".join(RECIPES))
    parser.add_argument("--stages", metavar="N", type=_int_in("--stages", 1, 64), help="codebooks (stages), 1-64")
    parser.add_argument(
        "--entries", metavar="K", type=_int_in("--entries", 2, 16384), help="codewords per stage, 2-16384"
    )
    parser.add_argument(
        "--code-dim",
        metavar="D",
        type=_int_in("--code-dim", 1, 1 << 20),
        help="lookup size, 1 to the quantizer's input size (default: no projection)",
    )
    parser.add_argument("--steps", metavar="N", type=_int_in("--steps", 1, 10_000_000), help="training steps in total")
    parser.add_argument("--batch-size", metavar="B", type=_int_in("--batch-size", 1, 65536), help="examples per step")
    parser.add_argument(
        "--seed", metavar="S", type=_int_in("--seed", 0, 2**32 - 1), help="seed of data and model (default 0)"
    )
    parser.add_argument("--out", metavar="DIR", type=Path, help="output folder (default: runs/NAME)")
    parser.add_argument("--resume", action="store_true", help="continue from the last checkpoint in --out")
    parser.add_argument("--quick", action="store_true", help="a short run (under a minute); what the tests use")
    parser.add_argument(
        "--data",
        metavar="PATH",
        type=Path,
        help="embeddings: feature file .npy or .pt, [N, dim] or [N, T, dim]; speech: a folder of WAV/FLAC files",
    )
    parser.add_argument(
        "--frame-rate",
        metavar="HZ",
        type=_positive_float("--frame-rate"),
        help="embeddings: vectors per second, to report kbps",
    )
    return parser


def _settings(args: argparse.Namespace, recipe: Any, stored: dict[str, Any] | None) -> dict[str, Any]:
    """The run's settings: command line, then the checkpoint's (on resume), then the recipe defaults."""
    given = {
        "stages": args.stages,
        "entries": args.entries,
        "code_dim": args.code_dim,
        "steps": args.steps,
        "batch_size": args.batch_size,
        "seed": args.seed,
        "data": str(args.data) if args.data else None,
        "frame_rate": args.frame_rate,
    }
    if stored is not None:
        if stored.get("recipe") != args.name:
            raise fail("--resume", f"a checkpoint of the {args.name!r} recipe", f"one of {stored.get('recipe')!r}")
        for key in _FIXED_ON_RESUME:
            mine = str(Path(given[key]).resolve()) if key == "data" and given[key] else given[key]
            if mine is not None and mine != stored.get(key):
                raise fail(
                    f"--{key.replace('_', '-')}", f"{stored.get(key)!r} as in the checkpoint (or left out)", given[key]
                )
        quick = bool(stored.get("quick")) or args.quick
        base = {k: v for k, v in stored.items() if k in given}
    else:
        quick = args.quick
        base = {}
    defaults = dict(recipe.DEFAULTS) | (recipe.QUICK if quick else {})
    config = {"recipe": args.name, "quick": quick, "seed": 0, "data": None, "frame_rate": None} | defaults
    config |= {k: v for k, v in base.items() if v is not None}
    config |= {k: v for k, v in given.items() if v is not None}
    if config["code_dim"] is None:
        config["code_dim"] = 0  # filled in once the input size is known
    return config


def main(argv: list[str] | None = None) -> int:
    """Run the command; returns the exit status (0 done, 2 bad input)."""
    started = time.perf_counter()
    try:
        args = build_parser().parse_args(argv)
    except _UsageError as exc:
        print(f"{PROG}: error: {exc} (see {PROG} --help)", file=sys.stderr)
        return 2
    except SystemExit as exc:  # --help
        return int(exc.code or 0)
    try:
        recipe, config, data, resume, out = _validate(args)
    except RvqlayerError as exc:
        print(f"{PROG}: error: {exc}", file=sys.stderr)
        return 2

    from ._outputs import make_output_dir, summary

    try:
        make_output_dir(out)
    except RvqlayerError as exc:
        print(f"{PROG}: error: {exc}", file=sys.stderr)
        return 2
    from ._training import CHECKPOINT

    if resume is None and (out / CHECKPOINT).exists():
        print(f"note: {out / CHECKPOINT} exists; starting afresh and replacing it (--resume continues it)")
    table, files = recipe.run(config, data, out, resume)
    print()
    print(f"rate-quality table ({args.name}, {config['steps']} steps, seed {config['seed']}):")
    print(table.format())
    for problem in table.worse_with_more_stages():
        print(f"note: quality got worse with more stages: {problem}")
    print()
    print(summary(out, files))
    print(f"done in {time.perf_counter() - started:.1f} s")
    return 0


def _validate(args: argparse.Namespace) -> tuple[Any, dict[str, Any], Any, dict[str, Any] | None, Path]:
    """Check everything given on the command line; writes nothing."""
    if args.data is not None and args.name not in _TAKES_DATA:
        raise fail("--data", f"given only with the {' or '.join(_TAKES_DATA)} recipe", f"--data with {args.name!r}")
    if args.frame_rate is not None and args.name != "embeddings":
        raise fail("--frame-rate", "given only with the embeddings recipe", f"--frame-rate with {args.name!r}")
    out = args.out if args.out is not None else Path("runs") / args.name
    from ._outputs import check_output_dir

    check_output_dir(out)
    recipe = importlib.import_module(f"recipes.{args.name}")
    stored = None
    resume = None
    if args.resume:
        from ._training import CHECKPOINT, read_checkpoint

        resume = read_checkpoint(out / CHECKPOINT)
        stored = resume["recipe"]
        if not isinstance(stored, dict):
            raise fail("--resume", "a checkpoint written by a recipe", "one without its settings")
    config = _settings(args, recipe, stored)
    data = recipe.prepare(config)
    if stored is not None and stored.get("data_shape") not in (None, config.get("data_shape")):
        raise fail(
            "--data",
            f"features of shape {stored['data_shape']} as in the checkpoint",
            f"shape {config.get('data_shape')}",
        )
    limit = recipe.max_code_dim(config, data)
    if config["code_dim"] == 0:
        config["code_dim"] = limit
    if not 1 <= config["code_dim"] <= limit:
        raise fail("--code-dim", f"an int in [1, {limit}] (the quantizer's input size)", config["code_dim"])
    return recipe, config, data, resume, out


if __name__ == "__main__":
    sys.exit(main())
