"""The held-out codes as bytes: the stream file a run writes and what each stage count actually costs.

Both columns are measured on real streams from :mod:`rvqlayer.stream`
(header, packet framing and end packet included): a fixed-length stream and
an entropy-coded one, coded with the quantizer's own usage tables
(``UsageTables.from_quantizer``). Beside them, the health report's usage
entropy of the same codes (``q.health(codes=...).entropy_bits``): what ideal
per-stage coding of these codes would need, without any framing.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import torch

from rvqlayer import MultiStageQuantizer, stream
from rvqlayer.files import atomic_write

STREAM_FILE = "codes.rvqs"
# Recipes with no frame rate (one vector per image or item): the header's nominal rate, and one packet of
# as many vectors as a packet may hold (a packet per "second" of 1 vector would cost 11 bytes a vector).
NOMINAL_RATE = 1.0


@dataclass(frozen=True)
class StreamCost:
    """What the codes of the first ``stages`` stages cost, in the table's rate unit.

    ``fixed``: a fixed-length stream; ``coded``: the entropy-coded stream
    (both their actual bytes, header included); ``entropy``: the health
    report's usage-entropy estimate of the same codes.
    """

    stages: int
    fixed: float
    coded: float
    entropy: float


def _flat(codes: torch.Tensor) -> torch.Tensor:
    """``codes`` ``[..., stages]`` as ``[vectors, stages]`` (the stream's frames, in order)."""
    return codes.reshape(-1, codes.shape[-1])


def _packet_frames(frame_rate: float | None, vectors: int, stages: int) -> int | None:
    if frame_rate is not None:
        return None  # the stream's default: one second of frames per packet
    return max(1, min(vectors, stream.MAX_PACKET_FRAMES, stream.MAX_PACKET_CODES // stages))


def encode_stream(
    quantizer: MultiStageQuantizer,
    codes: torch.Tensor,
    frame_rate: float | None,
    tables: stream.UsageTables | None,
) -> bytes:
    """The stream of ``codes`` ``[..., s]`` (entropy-coded with ``tables``; fixed length if None)."""
    flat = _flat(codes)
    return stream.write_stream(
        flat,
        entries=quantizer.entries,
        frame_rate=NOMINAL_RATE if frame_rate is None else frame_rate,
        tables=tables,
        packet_frames=_packet_frames(frame_rate, flat.shape[0], flat.shape[1]),
    )


def stream_costs(
    quantizer: MultiStageQuantizer,
    codes: torch.Tensor,
    rate_of_bits: Callable[[float], float],
    frame_rate: float | None,
) -> list[StreamCost]:
    """One :class:`StreamCost` per stage count 1..stages of ``codes`` int64 ``[..., stages]``.

    ``rate_of_bits(bits_per_vector)`` is the table's rate column; a stream of
    ``n`` bytes for ``vectors`` vectors costs ``rate_of_bits(8 n / vectors)``.
    """
    tables = stream.UsageTables.from_quantizer(quantizer)
    vectors = max(1, _flat(codes).shape[0])
    costs = []
    for k in range(1, codes.shape[-1] + 1):
        part = codes[..., :k]
        fixed = len(encode_stream(quantizer, part, frame_rate, None))
        coded = len(encode_stream(quantizer, part, frame_rate, tables))
        entropy = quantizer.health(codes=part).entropy_bits
        costs.append(
            StreamCost(
                k,
                float(rate_of_bits(8.0 * fixed / vectors)),
                float(rate_of_bits(8.0 * coded / vectors)),
                float(rate_of_bits(entropy)),
            )
        )
    return costs


def write_codes(out: Path, quantizer: MultiStageQuantizer, codes: torch.Tensor, frame_rate: float | None) -> Path:
    """``codes`` ``[..., stages]`` as the entropy-coded stream ``out/codes.rvqs``; returns the path.

    Read it back with ``stream.read_stream(blob, tables=UsageTables.from_quantizer(q))``
    (``[vectors, stages]``, the rows of ``codes`` in order).
    """
    blob = encode_stream(quantizer, codes, frame_rate, stream.UsageTables.from_quantizer(quantizer))
    target = out / STREAM_FILE
    with atomic_write(target, "wb") as f:
        f.write(blob)
    return target
