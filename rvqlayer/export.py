"""Save a trained quantizer to one safetensors file and load it back.

The file holds every tensor of the quantizer's ``state_dict`` (codewords,
projections, moving averages, counters) and, in the safetensors metadata, a
JSON description of the constructor options. Loading runs no code from the
file: safetensors parses only a JSON header and raw tensor bytes. The
safetensors package is imported inside the functions, so the core library
still imports with torch, numpy and einops only.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import torch

from ._checks import RvqlayerError, fail
from .files import atomic_path
from .quantizer import MultiStageQuantizer

FILE_FORMAT = "rvqlayer-codebooks"
FILE_VERSION = "1"


def quantizer_config(quantizer: MultiStageQuantizer) -> dict[str, Any]:
    """Constructor options that rebuild ``quantizer``: :meth:`MultiStageQuantizer.config`."""
    return quantizer.config()


def _safetensors() -> Any:
    try:
        import safetensors.torch as st
    except ImportError as exc:  # pragma: no cover - the extra is installed in the project's venv
        raise ImportError("saving and loading codebooks needs safetensors: pip install 'rvqlayer[recipes]'") from exc
    return st


def save_codebooks(quantizer: MultiStageQuantizer, path: str | os.PathLike[str]) -> Path:
    """Write ``quantizer`` (all its state and its options) to ``path`` (safetensors).

    The file is written under a temporary name in the same folder and
    renamed into place, so a reader never sees a half-written file.

    >>> import tempfile, torch
    >>> q = MultiStageQuantizer(4, stages=2, entries=8, init="random").eval()
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     back = load_codebooks(save_codebooks(q, f"{tmp}/q.safetensors"))
    >>> codes = q.encode(torch.randn(5, 4))
    >>> torch.equal(back.decode(codes), q.decode(codes))
    True
    """
    if not isinstance(quantizer, MultiStageQuantizer):
        raise fail("quantizer", "a MultiStageQuantizer", type(quantizer).__name__)
    st = _safetensors()
    target = Path(path)
    tensors = {name: t.detach().cpu().contiguous().clone() for name, t in quantizer.state_dict().items()}
    metadata = {"format": FILE_FORMAT, "version": FILE_VERSION, "config": json.dumps(quantizer.config())}
    with atomic_path(target) as tmp:
        st.save_file(tensors, str(tmp), metadata=metadata)
    return target


def _read(path: Path) -> tuple[dict[str, torch.Tensor], dict[str, str]]:
    from safetensors import safe_open

    with safe_open(str(path), framework="pt", device="cpu") as f:
        metadata = f.metadata() or {}
        tensors = {name: f.get_tensor(name) for name in f.keys()}
    return tensors, metadata


def load_codebooks(path: str | os.PathLike[str]) -> MultiStageQuantizer:
    """Rebuild the quantizer saved by :func:`save_codebooks`, in eval mode.

    Raises :class:`~rvqlayer.RvqlayerError` when ``path`` is missing or is not
    a file written by :func:`save_codebooks`.
    """
    _safetensors()
    source = Path(path)
    if not source.is_file():
        raise fail("path", "an existing codebook file", f"{str(source)!r} (no such file)")
    what = "a codebook file written by save_codebooks"
    try:
        tensors, metadata = _read(source)
    except Exception as exc:  # safetensors reports bad headers and short files in several ways
        raise fail(
            "path", what, f"{str(source)!r}, which is not a valid safetensors file ({type(exc).__name__})"
        ) from None
    if metadata.get("format") != FILE_FORMAT:
        raise fail("path", what, f"{str(source)!r} with format {metadata.get('format')!r}")
    if metadata.get("version") != FILE_VERSION:
        raise fail("path", f"{what} (version {FILE_VERSION})", f"version {metadata.get('version')!r}")
    try:
        config = json.loads(metadata.get("config", ""))
    except json.JSONDecodeError:
        raise fail("path", what, f"{str(source)!r} with an unreadable config") from None
    if not isinstance(config, dict) or "dim" not in config:
        raise fail("path", what, f"{str(source)!r} with config {config!r}")
    options = dict(config)
    dim = options.pop("dim")
    try:
        with torch.random.fork_rng(devices=[]):  # building draws codewords; keep the caller's random stream
            quantizer = MultiStageQuantizer(dim, **options)
    except (RvqlayerError, TypeError) as exc:
        raise fail("path", what, f"{str(source)!r} with unusable options: {exc}") from None
    expected = quantizer.state_dict()
    if set(tensors) != set(expected):
        missing = sorted(set(expected) - set(tensors))[:3]
        extra = sorted(set(tensors) - set(expected))[:3]
        raise fail("path", what, f"{str(source)!r} with missing tensors {missing} and unexpected {extra}")
    for name, t in tensors.items():
        if t.shape != expected[name].shape or t.dtype != expected[name].dtype:
            raise fail(
                f"path[{name!r}]",
                f"a {expected[name].dtype} tensor of shape {tuple(expected[name].shape)}",
                f"{t.dtype} of shape {tuple(t.shape)}",
            )
        if t.is_floating_point() and not bool(torch.isfinite(t).all()):
            raise fail(f"path[{name!r}]", "finite values", "NaN or Inf")
    quantizer.load_state_dict(tensors)
    return quantizer.eval()
