"""Encode and decode with an exported quantizer using numpy alone (no torch needed).

:func:`load_runtime` reads the file :func:`rvqlayer.export.save_codebooks`
writes, with the same checks as :func:`rvqlayer.export.load_codebooks`
(header, bounds, checksum) and without torch: ``rvqlayer/__init__.py``
imports the torch layer only when torch is installed, so ``from rvqlayer
import runtime`` works on a machine without it. Greedy encoding follows the
layer's own arithmetic (float32, the same distance expansion), so its codes
equal the layer's ``encode`` and its decode matches ``decode`` to float32
rounding.
"""

from __future__ import annotations

import os
from typing import Any

import numpy as np

from ._container import TensorBytes, read_codebook_file
from ._errors import fail

__all__ = ["QuantizerRuntime", "load_runtime"]

_NUMPY = {"F64": "<f8", "F32": "<f4", "F16": "<f2", "I64": "<i8", "I32": "<i4", "I16": "<i2", "I8": "i1", "U8": "u1"}


def _array(name: str, entry: TensorBytes, shape: tuple[int, ...]) -> np.ndarray:
    if entry.shape != shape:
        raise fail(f"path[{name!r}]", f"of shape {list(shape)}", f"shape {list(entry.shape)}")
    if entry.dtype == "BF16":  # bfloat16 is the top half of a float32
        half = np.frombuffer(entry.data, dtype="<u2").astype(np.uint32) << 16
        array = half.view(np.float32)
    elif entry.dtype in _NUMPY and entry.dtype[0] == "F":
        array = np.frombuffer(entry.data, dtype=_NUMPY[entry.dtype]).astype(np.float32)
    else:
        raise fail(f"path[{name!r}]", "a floating-point tensor", entry.dtype)
    array = array.reshape(shape)
    if not np.isfinite(array).all():
        raise fail(f"path[{name!r}]", "finite values", "NaN or Inf")
    return array


class QuantizerRuntime:
    """A trained quantizer's eval-mode encode and decode in numpy (float32).

    Attributes mirror the layer's options: ``dim``, ``code_dim``, ``stages``,
    ``entries``, ``metric``, ``axis``; ``codewords`` is a list of float32
    ``[entries, code_dim]`` arrays, one per stage.
    """

    def __init__(self, config: dict[str, Any], tensors: dict[str, TensorBytes]) -> None:
        self.config = dict(config)
        self.dim = int(config["dim"])
        self.code_dim = int(config.get("code_dim") or self.dim)
        self.stages = int(config["stages"])
        self.entries = int(config["entries"])
        self.metric = config.get("metric", "l2")
        self.axis = config.get("axis", -1)
        if self.metric not in ("l2", "cosine"):
            raise fail("path (option metric)", "'l2' or 'cosine'", repr(self.metric))
        if isinstance(self.axis, bool) or not isinstance(self.axis, int):
            raise fail("path (option axis)", "an int", repr(self.axis))
        self.chunk = config.get("chunk", 4096)
        if isinstance(self.chunk, bool) or not isinstance(self.chunk, int) or not 1 <= self.chunk <= 2**31:
            raise fail("path (option chunk)", "an int in [1, 2**31]", repr(self.chunk))
        missing = [f"codebooks.{s}.codewords" for s in range(self.stages) if f"codebooks.{s}.codewords" not in tensors]
        if missing:
            raise fail("path", "a file with every stage's codewords", f"missing {missing[:3]}")
        self.codewords = [
            _array(f"codebooks.{s}.codewords", tensors[f"codebooks.{s}.codewords"], (self.entries, self.code_dim))
            for s in range(self.stages)
        ]
        self.projections: dict[str, np.ndarray] | None = None
        if self.code_dim < self.dim:
            shapes = {
                "project_in.weight": (self.code_dim, self.dim),
                "project_in.bias": (self.code_dim,),
                "project_out.weight": (self.dim, self.code_dim),
                "project_out.bias": (self.dim,),
            }
            for name in shapes:
                if name not in tensors:
                    raise fail("path", f"a file with the projection {name}", "none")
            self.projections = {name: _array(name, tensors[name], shape) for name, shape in shapes.items()}

    def __repr__(self) -> str:
        return (
            f"QuantizerRuntime(dim={self.dim}, code_dim={self.code_dim}, stages={self.stages}, "
            f"entries={self.entries}, metric={self.metric!r}, axis={self.axis})"
        )

    # ----------------------------------------------------------------- helpers
    def _stages(self, stages: int | None) -> int:
        if stages is None:
            return self.stages
        if isinstance(stages, bool) or not isinstance(stages, (int, np.integer)) or not 1 <= stages <= self.stages:
            raise fail("stages", f"an int in [1, {self.stages}]", repr(stages))
        return int(stages)

    def _nearest(self, z: np.ndarray, codewords: np.ndarray) -> np.ndarray:
        """Nearest code ``[n]`` for ``z`` ``[n, code_dim]``, as :func:`rvqlayer.nearest_code` computes it."""
        out = np.empty(z.shape[0], dtype=np.int64)
        c = codewords
        if self.metric == "cosine":
            c = codewords / np.maximum(np.linalg.norm(codewords, axis=-1, keepdims=True), np.float32(1e-12))
        else:
            c_sq = (codewords * codewords).sum(-1)
        for start in range(0, z.shape[0], self.chunk):
            block = z[start : start + self.chunk]
            if self.metric == "cosine":
                unit = block / np.maximum(np.linalg.norm(block, axis=-1, keepdims=True), np.float32(1e-12))
                out[start : start + self.chunk] = np.argmax(unit @ c.T, axis=-1)
            else:
                out[start : start + self.chunk] = np.argmin(c_sq - np.float32(2.0) * (block @ c.T), axis=-1)
        return out

    # ------------------------------------------------------- encode and decode
    def encode(self, x: Any, stages: int | None = None) -> np.ndarray:
        """Greedy codes int64 ``[..., stages]`` for float ``x`` with ``dim`` features on ``axis``."""
        x = np.asarray(x)
        if x.dtype.kind != "f":
            raise fail("x", "a floating-point array", f"dtype {x.dtype}")
        if x.ndim == 0 or not -x.ndim <= self.axis < x.ndim or x.shape[self.axis] != self.dim:
            raise fail("x", f"of size {self.dim} on axis {self.axis}", f"shape {x.shape}")
        if x.size and not np.isfinite(x).all():
            raise fail("x", "finite (no NaN or Inf)", f"{int((~np.isfinite(x)).sum())} non-finite values")
        n_use = self._stages(stages)
        moved = np.moveaxis(x, self.axis, -1)
        lead = moved.shape[:-1]
        z = moved.reshape(-1, self.dim).astype(np.float32)
        if self.projections is not None:
            z = z @ self.projections["project_in.weight"].T + self.projections["project_in.bias"]
        codes = np.empty((z.shape[0], n_use), dtype=np.int64)
        for s in range(n_use):
            codes[:, s] = self._nearest(z, self.codewords[s])
            z = z - self.codewords[s][codes[:, s]]
        return codes.reshape(*lead, n_use)

    def decode(self, codes: Any) -> np.ndarray:
        """Float32 vectors for ``codes`` ``[..., s]`` (``1 <= s <= stages``; ``-1`` skips a stage).

        Returns ``[..., dim]`` with the feature axis moved to ``axis``.
        """
        codes = np.asarray(codes)
        if codes.dtype.kind not in "iu":
            raise fail("codes", "an integer array", f"dtype {codes.dtype}")
        if codes.ndim == 0 or not 1 <= codes.shape[-1] <= self.stages:
            raise fail("codes", f"of shape [..., s] with 1 <= s <= {self.stages}", f"shape {codes.shape}")
        if codes.size and (codes.min() < -1 or codes.max() >= self.entries):
            raise fail(
                "codes",
                f"in [0, {self.entries - 1}] (or -1 for a skipped stage)",
                f"values in [{int(codes.min())}, {int(codes.max())}]",
            )
        lead = codes.shape[:-1]
        flat = codes.reshape(-1, codes.shape[-1]).astype(np.int64)
        total = np.zeros((flat.shape[0], self.code_dim), dtype=np.float32)
        for s in range(flat.shape[1]):
            c = flat[:, s]
            total += self.codewords[s][np.maximum(c, 0)] * (c >= 0)[:, None]
        if self.projections is not None:
            total = total @ self.projections["project_out.weight"].T + self.projections["project_out.bias"]
        out = total.reshape(*lead, self.dim)
        return np.moveaxis(out, -1, self.axis) if out.ndim > 1 else out


def load_runtime(path: str | os.PathLike[str]) -> QuantizerRuntime:
    """Read a file written by :func:`rvqlayer.export.save_codebooks` into a numpy runtime.

    Raises :class:`~rvqlayer.RvqlayerError` for a missing, damaged or crafted
    file, with the same checks as :func:`rvqlayer.export.load_codebooks`.
    """
    config, tensors = read_codebook_file(path)
    return QuantizerRuntime(config, tensors)
