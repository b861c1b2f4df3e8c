"""Save a trained quantizer to one safetensors file and load it back.

The file holds every tensor of the quantizer's ``state_dict`` (codewords,
projections, moving averages, counters) and, in the safetensors metadata, a
JSON description of the constructor options with a sha256 checksum of the
options and every tensor (file version 2). Loading runs no code from the
file and allocates nothing before the header, the options and the checksum
have been checked (:mod:`rvqlayer._container` parses the header itself).
Writing uses the safetensors package, imported inside :func:`save_codebooks`,
so the core library still imports with torch, numpy and einops only.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import torch

from ._checks import RvqlayerError, fail
from ._container import FILE_FORMAT, FILE_VERSION, checksum, read_codebook_file
from .files import atomic_path
from .quantizer import MultiStageQuantizer

__all__ = ["FILE_FORMAT", "FILE_VERSION", "load_codebooks", "quantizer_config", "save_codebooks"]

# What a tensor's safetensors dtype name is, and back.
_DTYPE_NAMES = {
    torch.float64: "F64",
    torch.float32: "F32",
    torch.float16: "F16",
    torch.bfloat16: "BF16",
    torch.int64: "I64",
    torch.int32: "I32",
    torch.int16: "I16",
    torch.int8: "I8",
    torch.uint8: "U8",
    torch.bool: "BOOL",
}
_DTYPES = {name: dtype for dtype, name in _DTYPE_NAMES.items()}


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
    config = json.dumps(quantizer.config())
    digest = checksum(config, ((name, _DTYPE_NAMES[t.dtype], tuple(t.shape), _raw(t)) for name, t in tensors.items()))
    metadata = {"format": FILE_FORMAT, "version": FILE_VERSION, "config": config, "checksum": digest}
    with atomic_path(target) as tmp:
        st.save_file(tensors, str(tmp), metadata=metadata)
    return target


def _raw(t: torch.Tensor) -> Any:
    """The bytes of a contiguous CPU tensor, as safetensors writes them (little-endian)."""
    return t.reshape(-1).view(torch.uint8).numpy()


def _tensor(entry: Any) -> torch.Tensor:
    dtype = _DTYPES[entry.dtype]
    if len(entry.data) == 0:
        return torch.empty(entry.shape, dtype=dtype)
    return torch.frombuffer(bytearray(entry.data), dtype=dtype).reshape(entry.shape)


def load_codebooks(path: str | os.PathLike[str]) -> MultiStageQuantizer:
    """Rebuild the quantizer saved by :func:`save_codebooks`, in eval mode.

    Nothing is allocated before the file has passed every check: the
    safetensors header is parsed here (declared shapes and offsets against
    the file's length), the options are bounded (``dim <= 65536``,
    ``stages <= 1024``, ``entries <= 2**20``, the codewords must fit in the
    file), the sha256 checksum of options and tensors is verified, and the
    tensor names, shapes and dtypes are compared with those of a layer built
    on the ``meta`` device (no memory). Version 1 files (no checksum) are
    still read. Raises :class:`~rvqlayer.RvqlayerError` when ``path`` is
    missing, damaged, or not a file written by :func:`save_codebooks`.
    """
    config, entries = read_codebook_file(path)
    source = repr(str(path))
    what = "a codebook file written by save_codebooks"
    options = dict(config)
    dim = options.pop("dim")
    try:
        with torch.device("meta"):
            expected = MultiStageQuantizer(dim, **options).state_dict()
    except (RvqlayerError, TypeError) as exc:
        raise fail("path", what, f"{source} with unusable options: {exc}") from None
    if set(entries) != set(expected):
        missing = sorted(set(expected) - set(entries))[:3]
        extra = sorted(set(entries) - set(expected))[:3]
        raise fail("path", what, f"{source} with missing tensors {missing} and unexpected {extra}")
    for name, entry in entries.items():
        want = expected[name]
        if entry.shape != tuple(want.shape) or entry.dtype != _DTYPE_NAMES.get(want.dtype):
            raise fail(
                f"path[{name!r}]",
                f"a {want.dtype} tensor of shape {tuple(want.shape)}",
                f"{entry.dtype} of shape {list(entry.shape)}",
            )
    tensors = {name: _tensor(entry) for name, entry in entries.items()}
    for name, t in tensors.items():
        if t.is_floating_point() and not bool(torch.isfinite(t).all()):
            raise fail(f"path[{name!r}]", "finite values", "NaN or Inf")
    with torch.random.fork_rng(devices=[]):  # building draws codewords; keep the caller's random stream
        quantizer = MultiStageQuantizer(dim, **options)
    quantizer.load_state_dict(tensors)
    return quantizer.eval()


# ------------------------------------------------------------------ graphs (torch.export, ONNX)
class _EncodeGraph(torch.nn.Module):
    def __init__(self, quantizer: MultiStageQuantizer, stages: int | None) -> None:
        super().__init__()
        self.quantizer = quantizer
        self.stages = stages

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.quantizer.encode(x, stages=self.stages)


class _DecodeGraph(torch.nn.Module):
    def __init__(self, quantizer: MultiStageQuantizer) -> None:
        super().__init__()
        self.quantizer = quantizer

    def forward(self, codes: torch.Tensor) -> torch.Tensor:
        return self.quantizer.decode(codes)


def example_input(quantizer: MultiStageQuantizer) -> torch.Tensor:
    """A small float32 input of the layer's layout: ``dim`` on ``axis``, 4 (then 5, ...) elsewhere.

    ``[n, dim]`` for ``axis=-1``; ``[batch, dim, time]`` for ``axis=1``; in
    general one axis after a non-negative ``axis`` and one before a negative one.
    """
    axis = quantizer.axis
    rank = max(2, axis + 2 if axis >= 0 else 1 - axis)
    shape = [4 + i for i in range(rank)]
    shape[axis] = quantizer.dim
    return torch.randn(shape, generator=torch.Generator().manual_seed(0))


def export_graphs(
    quantizer: MultiStageQuantizer, stages: int | None = None, example: torch.Tensor | None = None
) -> tuple[torch.export.ExportedProgram, torch.export.ExportedProgram]:
    """``torch.export`` programs of the eval-mode ``encode`` (greedy) and ``decode`` of ``quantizer``.

    Args:
        stages: codes per vector (default: all stages).
        example: an input of the layout the graphs take (default
            :func:`example_input`); every axis but the feature axis is dynamic.

    Returns ``(encode_program, decode_program)``: encode maps ``x`` to int64
    codes ``[..., stages]``, decode maps such codes back to float32 vectors.
    The layer's value-reading input checks (NaN/Inf, code range) run in eager
    mode only; a traced graph does not check its input.
    """
    if not isinstance(quantizer, MultiStageQuantizer):
        raise fail("quantizer", "a MultiStageQuantizer", type(quantizer).__name__)
    n_use = quantizer._check_stages(stages)
    x = example_input(quantizer) if example is None else example
    quantizer = quantizer.eval()
    feature = quantizer._axis(x.ndim)
    dynamic = torch.export.Dim.DYNAMIC
    x_dims = {i: dynamic for i in range(x.ndim) if i != feature}
    encoder = _EncodeGraph(quantizer, n_use)
    encode = torch.export.export(encoder, (x,), dynamic_shapes=({**x_dims},))
    codes = quantizer.encode(x, stages=n_use)
    codes_dims = {i: dynamic for i in range(codes.ndim - 1)}
    decode = torch.export.export(_DecodeGraph(quantizer), (codes,), dynamic_shapes=(codes_dims,))
    return encode, decode


def export_onnx(
    quantizer: MultiStageQuantizer,
    prefix: str | os.PathLike[str],
    stages: int | None = None,
    example: torch.Tensor | None = None,
) -> tuple[Path, Path]:
    """Write ``<prefix>.encode.onnx`` and ``<prefix>.decode.onnx`` (needs the ``export`` extra).

    The graphs are those of :func:`export_graphs` (inputs ``x`` and
    ``codes``, outputs ``codes`` and ``y``), converted by torch's ONNX
    exporter; every axis but the feature axis (and the stage axis of the
    codes) is dynamic. Returns the two paths.
    """
    try:
        import onnx  # noqa: F401
        import onnxscript  # noqa: F401
    except ImportError as exc:  # pragma: no cover - the extra is installed in the project's venv
        raise ImportError("ONNX export needs onnx and onnxscript: pip install 'rvqlayer[export]'") from exc
    encode, decode = export_graphs(quantizer, stages, example)
    base = Path(prefix)
    paths = []
    for program, kind, names in ((encode, "encode", (["x"], ["codes"])), (decode, "decode", (["codes"], ["y"]))):
        target = base.with_name(f"{base.name}.{kind}.onnx")
        onnx_program = torch.onnx.export(
            program, input_names=names[0], output_names=names[1], dynamo=True, verbose=False
        )
        with atomic_path(target) as tmp:
            onnx_program.save(str(tmp))
        paths.append(target)
    return paths[0], paths[1]
