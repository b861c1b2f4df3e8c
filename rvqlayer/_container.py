"""The exported quantizer file, read and checked without torch and without trusting it.

The file is a safetensors container: an 8-byte little-endian header length
``N``, ``N`` bytes of JSON (``{name: {"dtype", "shape", "data_offsets"}}`` and
a ``"__metadata__"`` map of strings), then the tensor bytes. This module
parses the header itself, checks every declared size against the file's
length and the options against fixed bounds, and verifies the checksum,
all before a single tensor is allocated. :mod:`rvqlayer.export` (torch) and
:mod:`rvqlayer.runtime` (numpy) build their arrays from what it returns.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ._errors import RvqlayerError, fail
from ._limits import MAX_DIM, MAX_ENTRIES, MAX_STAGES  # the layer's own bounds

FILE_FORMAT = "rvqlayer-codebooks"
FILE_VERSION = "2"
READABLE_VERSIONS = ("1", "2")  # version 1 (no checksum) is still read; only version 2 files are verified

MAX_HEADER_BYTES = 2**24  # the JSON header of a 1024-stage file is about 300 KB

ITEMSIZE = {"F64": 8, "F32": 4, "F16": 2, "BF16": 2, "I64": 8, "I32": 4, "I16": 2, "I8": 1, "U8": 1, "BOOL": 1}


@dataclass(frozen=True)
class TensorBytes:
    """One tensor of the file: safetensors dtype name, shape and raw little-endian bytes."""

    dtype: str
    shape: tuple[int, ...]
    data: memoryview


def _no_duplicates(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in pairs:
        if key in out:
            raise ValueError(f"duplicate key {key!r}")
        out[key] = value
    return out


def _is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def parse_container(data: bytes | memoryview, arg: str = "path") -> tuple[dict[str, str], dict[str, TensorBytes]]:
    """Metadata and tensors of a safetensors container ``data``; nothing is copied.

    Raises :class:`RvqlayerError` naming ``arg`` when the header is not valid
    JSON, declares a dtype, shape or offset that does not fit, or when the
    tensors do not tile the data area exactly.
    """
    view = memoryview(data)
    what = "a safetensors file"
    if len(view) < 8:
        raise fail(arg, what, f"{len(view)} bytes (not a valid safetensors file)")
    size = int.from_bytes(view[:8], "little")
    if size < 2 or size > min(MAX_HEADER_BYTES, len(view) - 8):
        raise fail(
            arg, what, f"a header length of {size} bytes in a file of {len(view)} (not a valid safetensors file)"
        )
    try:
        header = json.loads(bytes(view[8 : 8 + size]).decode("utf-8"), object_pairs_hook=_no_duplicates)
    except (UnicodeDecodeError, ValueError) as exc:
        raise fail(arg, what, f"an unreadable header ({exc}; not a valid safetensors file)") from None
    if not isinstance(header, dict):
        raise fail(arg, what, "a header that is not a JSON object (not a valid safetensors file)")
    metadata = header.pop("__metadata__", {})
    if not isinstance(metadata, dict) or not all(isinstance(v, str) for v in metadata.values()):
        raise fail(f"{arg}[__metadata__]", "a map of strings", type(metadata).__name__)
    body = view[8 + size :]
    tensors: dict[str, TensorBytes] = {}
    spans = []
    for name, entry in header.items():
        where = f"{arg}[{name!r}]"
        if not isinstance(entry, dict) or set(entry) != {"dtype", "shape", "data_offsets"}:
            raise fail(where, "a tensor entry with dtype, shape and data_offsets", repr(entry)[:80])
        dtype, shape, offsets = entry["dtype"], entry["shape"], entry["data_offsets"]
        if dtype not in ITEMSIZE:
            raise fail(f"{where}.dtype", "one of " + ", ".join(ITEMSIZE), repr(dtype)[:40])
        if not isinstance(shape, list) or len(shape) > 8 or not all(_is_int(n) and 0 <= n <= 2**40 for n in shape):
            raise fail(f"{where}.shape", "a list of at most 8 sizes in [0, 2**40]", repr(shape)[:80])
        if not (isinstance(offsets, list) and len(offsets) == 2 and all(_is_int(o) for o in offsets)):
            raise fail(f"{where}.data_offsets", "[begin, end]", repr(offsets)[:80])
        begin, end = offsets
        nbytes = math.prod(shape) * ITEMSIZE[dtype]
        if not (0 <= begin <= end <= len(body)) or end - begin != nbytes:
            raise fail(
                f"{where}.data_offsets",
                f"a span of {nbytes} bytes inside the {len(body)} data bytes",
                f"[{begin}, {end}] (a damaged or truncated file)",
            )
        tensors[name] = TensorBytes(dtype, tuple(shape), body[begin:end])
        spans.append((begin, end))
    spans.sort()
    position = 0
    for begin, end in spans:
        if begin != position:
            raise fail(arg, "tensors that tile the data area", f"a gap or overlap at byte {begin}")
        position = end
    if position != len(body):
        raise fail(arg, f"a data area of {position} bytes", f"{len(body)} bytes (a damaged or truncated file)")
    return metadata, tensors


def checksum(config_text: str, tensors: Iterable[tuple[str, str, tuple[int, ...], Any]]) -> str:
    """``"sha256:<hex>"`` of the options and every tensor (sorted by name: name, dtype, shape, bytes).

    ``tensors`` yields ``(name, dtype, shape, buffer)``; any object with the
    buffer protocol (bytes, memoryview, contiguous numpy array) works.
    """
    digest = hashlib.sha256()
    digest.update(FILE_FORMAT.encode() + b"\n" + config_text.encode("utf-8") + b"\n")
    for name, dtype, shape, buffer in sorted(tensors, key=lambda t: t[0]):
        digest.update(json.dumps([name, dtype, list(shape)]).encode() + b"\n")
        digest.update(buffer)
    return "sha256:" + digest.hexdigest()


def _check_option(config: dict[str, Any], key: str, low: int, high: int, source: str) -> int:
    value = config.get(key)
    if not _is_int(value) or not low <= value <= high:
        raise fail(f"path (option {key})", f"an int in [{low}, {high}]", f"{value!r} in {source}")
    return value


def check_options(config: dict[str, Any], data_bytes: int, source: str) -> None:
    """Check the sizes a file declares against fixed bounds and the bytes it holds.

    ``dim <= 65536``, ``1 <= code_dim <= dim``, ``stages <= 1024``,
    ``entries <= 2**20``, and the codewords alone (``stages * entries *
    code_dim`` float32 numbers) must fit in the file's ``data_bytes``.
    """
    dim = _check_option(config, "dim", 1, MAX_DIM, source)
    code_dim = config.get("code_dim", dim)
    code_dim = _check_option({"code_dim": code_dim}, "code_dim", 1, dim, source)
    stages = _check_option(config, "stages", 1, MAX_STAGES, source)
    entries = _check_option(config, "entries", 1, MAX_ENTRIES, source)
    need = stages * entries * code_dim * 4
    if need > data_bytes:
        raise fail(
            "path",
            f"a file holding the {need} bytes of codewords its options declare",
            f"{data_bytes} data bytes in {source} (a damaged or crafted file)",
        )


def read_codebook_file(path: str | os.PathLike[str]) -> tuple[dict[str, Any], dict[str, TensorBytes]]:
    """Options and tensors of a file written by :func:`rvqlayer.export.save_codebooks`, checked.

    The checks, in order and before any tensor is built: the container
    (header length, JSON, dtypes, shapes and offsets against the file's
    length), the format name and version, the options against the bounds of
    :func:`check_options`, and (version 2) the sha256 checksum of options and
    tensor bytes. Raises :class:`RvqlayerError` naming the field.
    """
    source = Path(path)
    if not source.is_file():
        raise fail("path", "an existing codebook file", f"{str(source)!r} (no such file)")
    data = source.read_bytes()
    where = repr(str(source))
    what = "a codebook file written by save_codebooks"
    try:
        metadata, tensors = parse_container(data)
    except RvqlayerError as exc:
        raise RvqlayerError(f"{exc} in {where}") from None
    if metadata.get("format") != FILE_FORMAT:
        raise fail("path", what, f"{where} with format {metadata.get('format')!r}")
    version = metadata.get("version")
    if version not in READABLE_VERSIONS:
        raise fail("path", f"{what} (version {', '.join(READABLE_VERSIONS)})", f"version {version!r} in {where}")
    text = metadata.get("config", "")
    try:
        config = json.loads(text, object_pairs_hook=_no_duplicates)
    except ValueError:
        raise fail("path", what, f"{where} with an unreadable config") from None
    if not isinstance(config, dict) or "dim" not in config:
        raise fail("path", what, f"{where} with config {str(config)[:80]}")
    if version != "1":
        stored = metadata.get("checksum")
        actual = checksum(text, ((n, t.dtype, t.shape, t.data) for n, t in tensors.items()))
        if stored != actual:
            raise fail("path", f"{what} whose checksum matches its content", f"a damaged file {where} (checksum)")
    check_options(config, sum(len(t.data) for t in tensors.values()), where)
    return config, tensors
