"""Codes to bytes and back: fixed-length packing, entropy coding, and a versioned stream format.

Pure numpy (no torch import): a decoder that has the stream and the tables
needs neither PyTorch nor the layer. Entropy coding uses ``constriction``'s
range coder with one static categorical model per stage; the models are
built from integer frequency tables (:class:`UsageTables`), so an encoder and
a decoder holding the same tables agree bit for bit on every machine.

The byte layout is documented in the README ("The stream format").

>>> import numpy as np
>>> codes = np.array([[3, 1], [0, -1], [7, 7]])
>>> blob = write_stream(codes, entries=8, frame_rate=75.0)
>>> read_stream(blob).tolist()
[[3, 1], [0, -1], [7, 7]]
"""

from __future__ import annotations

import hashlib
import math
import struct
import zlib
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ._errors import RvqlayerError, fail
from ._limits import MAX_ENTRIES, MAX_STAGES

__all__ = [
    "FIXED",
    "REPEATS",
    "STREAM_VERSION",
    "TABLES",
    "StreamHeader",
    "UsageTables",
    "code_bits",
    "codebook_fingerprint",
    "pack_codes",
    "read_header",
    "read_packet",
    "read_stream",
    "unpack_codes",
    "write_stream",
]

MAGIC = b"RVQC"
STREAM_VERSION = 1
FIXED, TABLES, REPEATS = 0, 1, 2  # coding modes: fixed length, static tables, static tables + repeat context
MAX_PACKET_FRAMES = 65535
MAX_PACKET_CODES = 2**22  # frames * stages per packet: bounds what a reader allocates for one packet
_HEADER = struct.Struct("<4sHBBII d16s")  # magic, version, mode, reserved, stages, entries, frame_rate, checksum
_HEADER_CRC = struct.Struct("<I")
_PACKET = struct.Struct("<HBII")  # frames, flags, payload length, crc32 of the first 7 bytes and the payload
HEADER_BYTES = _HEADER.size + _HEADER_CRC.size  # 44
PACKET_HEADER_BYTES = _PACKET.size  # 11
_SKIPS = 1  # packet flag: a presence bitmap precedes the codes
_TABLE_TOTAL = 2**22  # every frequency table sums to at most this; each entry gets at least 1


def code_bits(entries: int) -> int:
    """Bits per code of fixed-length packing: ``ceil(log2(entries))`` (0 for one entry).

    With ``entries`` not a power of two, ``code_bits(entries) - log2(entries)``
    bits per code are wasted: 0.034 for 1000 entries, 0.77 for 600.

    >>> code_bits(1024), code_bits(1000), code_bits(2)
    (10, 10, 1)
    """
    return (int(entries) - 1).bit_length()


# ----------------------------------------------------------------------------- fixed-length packing
def pack_codes(values: np.ndarray, bits: int) -> bytes:
    """Pack non-negative ints ``values`` ``[n]`` (each ``< 2**bits``) at ``bits`` bits each, MSB first.

    Vectorised over groups of 8 codes (8 codes fill exactly ``bits`` bytes);
    ``bits`` in 0..25. The last byte is padded with zero bits.

    >>> pack_codes(np.array([1, 2, 3]), 2).hex()
    '6c'
    """
    if not 0 <= bits <= 25:
        raise fail("bits", "an int in [0, 25]", bits)
    values = np.asarray(values).reshape(-1)
    n = values.size
    if bits == 0 or n == 0:
        return b""
    groups = -(-n // 8)
    v = np.zeros(groups * 8, dtype=np.uint32)
    v[:n] = values
    v = v.reshape(groups, 8)
    out = np.zeros((groups, bits + 4), dtype=np.uint8)
    for i in range(8):
        start, offset = divmod(i * bits, 8)
        word = (v[:, i] << np.uint32(32 - bits - offset)).astype(">u4")
        out[:, start : start + 4] |= word.view(np.uint8).reshape(groups, 4)
    return out[:, :bits].tobytes()[: -(-n * bits // 8)]


def _pack_rows(values: np.ndarray, bits: int) -> np.ndarray:
    """Each row of ``values`` ``[p, m]`` packed as :func:`pack_codes` would: uint8 ``[p, ceil(m * bits / 8)]``."""
    p, m = values.shape
    wide = -(-m // 8) * 8  # whole groups of 8 codes fill whole bytes, so rows stay byte-aligned
    padded = np.zeros((p, wide), dtype=np.int64)
    padded[:, :m] = values
    packed = np.frombuffer(pack_codes(padded.reshape(-1), bits), dtype=np.uint8).reshape(p, wide * bits // 8)
    return packed[:, : -(-m * bits // 8)]


def _unpack_rows(rows: np.ndarray, bits: int, m: int) -> np.ndarray:
    """The inverse of :func:`_pack_rows`: int64 ``[p, m]`` from uint8 ``rows`` ``[p, ceil(m * bits / 8)]``."""
    p = rows.shape[0]
    wide = -(-m // 8) * 8
    padded = np.zeros((p, wide * bits // 8), dtype=np.uint8)
    padded[:, : rows.shape[1]] = rows
    return unpack_codes(padded.reshape(-1), bits, p * wide).reshape(p, wide)[:, :m]


def unpack_codes(data: bytes | memoryview, bits: int, count: int) -> np.ndarray:
    """The ``count`` ints (int64 ``[count]``) that :func:`pack_codes` packed at ``bits`` bits into ``data``."""
    if not 0 <= bits <= 25:
        raise fail("bits", "an int in [0, 25]", bits)
    if bits == 0 or count == 0:
        return np.zeros(count, dtype=np.int64)
    need = -(-count * bits // 8)
    if len(data) < need:
        raise fail("data", f"at least {need} bytes for {count} codes of {bits} bits", f"{len(data)} bytes")
    groups = -(-count // 8)
    raw = np.zeros((groups, bits + 4), dtype=np.uint8)
    flat = np.zeros(groups * bits, dtype=np.uint8)
    flat[:need] = np.frombuffer(data, dtype=np.uint8, count=need)
    raw[:, :bits] = flat.reshape(groups, bits)
    wide = raw.astype(np.uint32)
    out = np.empty((groups, 8), dtype=np.uint32)
    mask = np.uint32((1 << bits) - 1)
    for i in range(8):
        start, offset = divmod(i * bits, 8)
        word = (wide[:, start] << 24) | (wide[:, start + 1] << 16) | (wide[:, start + 2] << 8) | wide[:, start + 3]
        out[:, i] = (word >> np.uint32(32 - bits - offset)) & mask
    return out.reshape(-1)[:count].astype(np.int64)


# ----------------------------------------------------------------------------- frequency tables
def _coder() -> Any:
    """``constriction.stream`` (range coder and categorical models), imported on first use."""
    import constriction

    return constriction.stream


def codebook_fingerprint(quantizer: Any) -> bytes:
    """16 bytes identifying a layer's codewords and projections (sha256 of their float32 bytes).

    Works on a :class:`~rvqlayer.MultiStageQuantizer` (its tensors are read
    with ``.detach().cpu().numpy()``; torch is not imported here).
    """
    digest = hashlib.sha256(b"rvqlayer-codewords\n")
    state = quantizer.state_dict()
    for name in sorted(state):
        if name.endswith(".codewords") or name.startswith(("project_in.", "project_out.")):
            array = np.ascontiguousarray(state[name].detach().float().cpu().numpy(), dtype="<f4")
            digest.update(name.encode() + b"\n" + array.tobytes())
    return digest.digest()[:16]


@dataclass
class UsageTables:
    """Per-stage static integer frequency tables for entropy coding.

    Attributes:
        frequencies: int64 ``[stages, entries]``; every entry at least 1 and
            each row summing to at most ``2**22``. Integer tables are what
            makes encoder and decoder agree on every machine.
        fingerprint: 16 bytes naming the codebooks the tables belong to
            (zeros when made from codes alone).
        repeats: None, or int64 ``[stages, 2]``: how often a stage's code
            differs from / equals the same stage's code in the previous
            frame (each at least 1, rows summing to at most ``2**16``). With
            it, the stream uses the repeat context (mode 2): for each frame
            whose previous frame has that stage, one binary "same as the
            previous frame" symbol, and the static table only for codes
            that are not repeats.
    """

    frequencies: np.ndarray
    fingerprint: bytes = bytes(16)
    repeats: np.ndarray | None = None
    _models: list[Any] | None = field(default=None, init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        f = np.asarray(self.frequencies)
        if f.ndim != 2 or not (1 <= f.shape[0] <= MAX_STAGES) or not (1 <= f.shape[1] <= MAX_ENTRIES):
            raise fail("frequencies", f"of shape [stages <= {MAX_STAGES}, entries <= {MAX_ENTRIES}]", f.shape)
        if f.dtype.kind not in "iu" or f.min() < 1 or (f.sum(axis=1) > _TABLE_TOTAL).any():
            raise fail("frequencies", f"integers >= 1 with rows summing to at most {_TABLE_TOTAL}", "other values")
        if not isinstance(self.fingerprint, bytes) or len(self.fingerprint) != 16:
            raise fail("fingerprint", "16 bytes", repr(self.fingerprint)[:40])
        self.frequencies = f.astype(np.int64)
        if self.repeats is not None:
            r = np.asarray(self.repeats)
            if r.shape != (f.shape[0], 2) or r.dtype.kind not in "iu" or r.min() < 1 or (r.sum(1) > 2**16).any():
                raise fail(
                    "repeats", f"None or integers >= 1 of shape [{f.shape[0]}, 2], rows <= 2**16", "other values"
                )
            self.repeats = r.astype(np.int64)

    @property
    def stages(self) -> int:
        return int(self.frequencies.shape[0])

    @property
    def entries(self) -> int:
        return int(self.frequencies.shape[1])

    @classmethod
    def from_counts(cls, counts: Any, fingerprint: bytes = bytes(16)) -> UsageTables:
        """Tables from non-negative usage counts ``[stages, entries]`` (any scale, floats allowed).

        ``f = 1 + floor(p * (2**22 - entries))`` with ``p`` the row's share
        (uniform when a row sums to zero or is not finite); computed in float64,
        so the same counts give the same integers everywhere.
        """
        c = np.asarray(counts, dtype=np.float64)
        if c.ndim != 2 or c.shape[0] < 1 or c.shape[1] < 1:
            raise fail("counts", "a 2-D array [stages, entries]", f"shape {c.shape}")
        if c.shape[1] > MAX_ENTRIES:
            raise fail("counts", f"at most {MAX_ENTRIES} entries", c.shape[1])
        c = np.where(np.isfinite(c) & (c > 0), c, 0.0)
        total = c.sum(axis=1, keepdims=True)
        share = np.where(total > 0, c / np.where(total > 0, total, 1.0), 1.0 / c.shape[1])
        freq = 1 + np.floor(share * (_TABLE_TOTAL - c.shape[1])).astype(np.int64)
        return cls(freq, fingerprint)

    @classmethod
    def from_quantizer(cls, quantizer: Any) -> UsageTables:
        """Tables from a layer's moving-average usage counts (``stage_statistics()``: the
        assignments actually made, reseeding not counted)."""
        counts = np.stack([s.usage_counts.numpy() for s in quantizer.stage_statistics()])
        return cls.from_counts(counts, codebook_fingerprint(quantizer))

    @classmethod
    def from_codes(cls, codes: Any, entries: int, fingerprint: bytes = bytes(16), repeats: bool = False) -> UsageTables:
        """Tables from how often each code occurs in ``codes`` ``[..., stages]`` (``-1`` ignored).

        ``repeats=True`` also fits the repeat context (see :meth:`with_repeats`).
        """
        flat = _check_codes(codes, entries)
        counts = np.stack([np.bincount(col[col >= 0], minlength=entries) for col in flat.T])
        tables = cls.from_counts(counts, fingerprint)
        return tables.with_repeats(codes) if repeats else tables

    def with_repeats(self, codes: Any) -> UsageTables:
        """These tables plus the repeat context fitted on ``codes`` ``[..., frames, stages]`` in time order.

        Per stage, the shares of frames whose code equals / differs from the
        previous frame's (pairs across the last axis but one; ``-1`` ignored),
        quantised to integers summing to at most ``2**16``.
        """
        array = np.asarray(codes)
        _check_codes(array, self.entries)
        if array.ndim < 2 or array.shape[-1] > self.stages:
            raise fail("codes", f"of shape [..., frames, stages <= {self.stages}]", f"shape {array.shape}")
        cur, prev = array[..., 1:, :], array[..., :-1, :]
        both = (cur >= 0) & (prev >= 0)
        same = ((cur == prev) & both).reshape(-1, array.shape[-1]).sum(0)
        pairs = both.reshape(-1, array.shape[-1]).sum(0)
        share = np.full(self.stages, 0.5)
        share[: array.shape[-1]] = np.where(pairs > 0, same / np.maximum(pairs, 1), 0.5)
        hit = 1 + np.floor(share * (2**16 - 2)).astype(np.int64)
        return UsageTables(self.frequencies, self.fingerprint, np.stack([2**16 - hit, hit], axis=1))

    def checksum(self) -> bytes:
        """16 bytes of sha256 over the tables' shape, integers and fingerprint."""
        digest = hashlib.sha256(b"rvqlayer-tables\n")
        digest.update(struct.pack("<II", self.stages, self.entries))
        digest.update(self.frequencies.astype("<i8").tobytes())
        digest.update(self.fingerprint)
        if self.repeats is not None:
            digest.update(b"repeats" + self.repeats.astype("<i8").tobytes())
        return digest.digest()[:16]

    def bits(self, codes: Any) -> float:
        """Ideal cost in bits of ``codes`` ``[..., s]`` under these tables (``-1`` free)."""
        flat = _check_codes(codes, self.entries)
        logp = np.log2(self.frequencies) - np.log2(self.frequencies.sum(axis=1, keepdims=True))
        total = 0.0
        for s in range(flat.shape[1]):
            col = flat[:, s]
            total -= float(logp[s, col[col >= 0]].sum())
        return total

    def _repeat_model(self, stage: int) -> Any:
        if self._models is None:
            self._models = [None] * (2 * self.stages)
        if self._models[self.stages + stage] is None:
            r = self.repeats[stage].astype(np.float64)  # type: ignore[index]
            self._models[self.stages + stage] = _coder().model.Categorical(r / r.sum(), perfect=False)
        return self._models[self.stages + stage]

    def _model(self, stage: int) -> Any:
        if self._models is None:
            self._models = [None] * (2 * self.stages)
        if self._models[stage] is None:
            f = self.frequencies[stage].astype(np.float64)
            self._models[stage] = _coder().model.Categorical(f / f.sum(), perfect=False)
        return self._models[stage]


# ----------------------------------------------------------------------------- stream
@dataclass(frozen=True)
class StreamHeader:
    """What a stream's header says (see the README for the byte layout)."""

    version: int
    mode: int
    stages: int
    entries: int
    frame_rate: float
    checksum: bytes


def _check_codes(codes: Any, entries: int) -> np.ndarray:
    """``codes`` ``[..., stages]`` as int64 ``[n, stages]``, checked."""
    if not hasattr(codes, "__array__") and not isinstance(codes, (list, tuple)):
        raise fail("codes", "an integer array [..., stages]", type(codes).__name__)
    array = np.asarray(codes)
    if array.dtype.kind not in "iu" and not (array.dtype.kind == "f" and array.size == 0):
        raise fail("codes", "an integer array", f"dtype {array.dtype}")
    if array.ndim == 0 or not (1 <= array.shape[-1] <= MAX_STAGES):
        raise fail("codes", f"of shape [..., stages] with 1 <= stages <= {MAX_STAGES}", f"shape {array.shape}")
    flat = array.reshape(-1, array.shape[-1]).astype(np.int64)
    if flat.size and (flat.min() < -1 or flat.max() >= entries):
        raise fail(
            "codes",
            f"in [0, {entries - 1}] (or -1 for a skipped stage)",
            f"values in [{int(flat.min())}, {int(flat.max())}]",
        )
    return flat


def write_stream(
    codes: Any,
    *,
    entries: int,
    frame_rate: float,
    tables: UsageTables | None = None,
    fingerprint: bytes | None = None,
    packet_frames: int | None = None,
) -> bytes:
    """The stream (bytes) of ``codes`` ``[..., stages]`` (numpy or CPU torch ints; ``-1`` = skipped).

    Args:
        entries: codewords per stage (the layer's ``entries``).
        frame_rate: frames (code vectors) per second; stored in the header.
        tables: entropy-code with these per-stage tables (their first
            ``stages`` rows); None packs each code in :func:`code_bits` bits.
        fingerprint: in fixed mode, 16 bytes naming the codebooks
            (:func:`codebook_fingerprint`) for the reader to check; zeros if
            None. With ``tables`` the header holds ``tables.checksum()``.
        packet_frames: frames per packet (default: one second of frames).

    The frames are the rows of ``codes`` flattened to ``[n, stages]``.
    """
    if isinstance(entries, bool) or not isinstance(entries, int) or not 1 <= entries <= MAX_ENTRIES:
        raise fail("entries", f"an int in [1, {MAX_ENTRIES}]", repr(entries))
    if isinstance(frame_rate, bool) or not isinstance(frame_rate, (int, float)) or not 0 < frame_rate < math.inf:
        raise fail("frame_rate", "a finite number > 0", repr(frame_rate))
    packet_frames_given = packet_frames is not None
    if packet_frames is None:
        packet_frames = min(max(1, round(frame_rate)), MAX_PACKET_FRAMES)
    if isinstance(packet_frames, bool) or not isinstance(packet_frames, int):
        raise fail("packet_frames", "an int", repr(packet_frames))
    if not 1 <= packet_frames <= MAX_PACKET_FRAMES:
        raise fail("packet_frames", f"an int in [1, {MAX_PACKET_FRAMES}]", packet_frames)
    flat = _check_codes(codes, entries)
    stages = flat.shape[1]
    if packet_frames * stages > MAX_PACKET_CODES:
        if packet_frames_given:
            raise fail("packet_frames", f"at most {MAX_PACKET_CODES // stages} for {stages} stages", packet_frames)
        packet_frames = MAX_PACKET_CODES // stages
    if tables is not None:
        if not isinstance(tables, UsageTables):
            raise fail("tables", "UsageTables or None", type(tables).__name__)
        if tables.entries != entries or tables.stages < stages:
            raise fail(
                "tables",
                f"tables for {entries} entries and at least {stages} stages",
                f"{tables.entries} entries, {tables.stages} stages",
            )
        mode, check = (TABLES if tables.repeats is None else REPEATS), tables.checksum()
    else:
        if fingerprint is not None and (not isinstance(fingerprint, bytes) or len(fingerprint) != 16):
            raise fail("fingerprint", "16 bytes or None", repr(fingerprint)[:40])
        mode, check = FIXED, fingerprint or bytes(16)
    head = _HEADER.pack(MAGIC, STREAM_VERSION, mode, 0, stages, entries, float(frame_rate), check)
    parts = [head, _HEADER_CRC.pack(zlib.crc32(head))]
    bits = code_bits(entries)
    first = 0
    if mode == FIXED and flat.size and (flat >= 0).all():  # no skipped stage: every full packet packed at once
        first = flat.shape[0] // packet_frames * packet_frames
        rows = _pack_rows(flat[:first].reshape(-1, packet_frames * stages), bits)
        fields = _PACKET.pack(packet_frames, 0, rows.shape[1], 0)[:7]
        seed = zlib.crc32(fields)
        for row in rows:
            parts.append(fields + _HEADER_CRC.pack(zlib.crc32(row, seed)))
            parts.append(row.tobytes())
    for start in range(first, flat.shape[0], packet_frames):
        block = flat[start : start + packet_frames]
        present = block >= 0
        flags, payload = 0, []
        if not present.all():
            flags |= _SKIPS
            payload.append(np.packbits(present.reshape(-1)).tobytes())
        if mode == FIXED:
            payload.append(pack_codes(block[present], bits))
        else:
            payload.append(_entropy_encode(block, present, tables, mode == REPEATS))  # type: ignore[arg-type]
        body = b"".join(payload)
        fields = _PACKET.pack(block.shape[0], flags, len(body), 0)[:7]
        parts.append(_PACKET.pack(block.shape[0], flags, len(body), zlib.crc32(body, zlib.crc32(fields))))
        parts.append(body)
    parts.append(_PACKET.pack(0, 0, 0, 0))  # the end packet
    return b"".join(parts)


def _repeat_slots(present: np.ndarray) -> np.ndarray:
    """Bool ``[frames]``: frames of one stage that carry a repeat symbol (this and the previous frame present)."""
    slots = np.zeros_like(present)
    slots[1:] = present[1:] & present[:-1]
    return slots


def _entropy_encode(block: np.ndarray, present: np.ndarray, tables: UsageTables, repeats: bool) -> bytes:
    encoder = _coder().queue.RangeEncoder()
    for s in range(block.shape[1]):
        keep = present[:, s]
        if repeats:
            slots = _repeat_slots(keep)
            same = np.zeros_like(keep)
            same[1:] = block[1:, s] == block[:-1, s]
            same &= slots
            if slots.any():
                encoder.encode(same[slots].astype(np.int32), tables._repeat_model(s))
            keep = keep & ~same
        column = block[keep, s].astype(np.int32)
        if column.size and tables.entries > 1:  # one entry: every code is 0 and costs nothing
            encoder.encode(column, tables._model(s))
    return encoder.get_compressed().astype("<u4").tobytes()


def _entropy_decode(body: memoryview, present: np.ndarray, tables: UsageTables, repeats: bool) -> np.ndarray:
    if len(body) % 4:
        raise fail("stream (packet payload)", "a whole number of 32-bit words", f"{len(body)} bytes")
    words = np.frombuffer(body, dtype="<u4").astype(np.uint32)
    decoder = _coder().queue.RangeDecoder(words)
    out = np.full(present.shape, -1, dtype=np.int64)
    frames = np.arange(present.shape[0])
    for s in range(present.shape[1]):
        keep = present[:, s]
        same = np.zeros_like(keep)
        if repeats:
            slots = _repeat_slots(keep)
            if slots.any():
                same[slots] = decoder.decode(tables._repeat_model(s), int(slots.sum())).astype(bool)
            keep = keep & ~same
        count = int(keep.sum())
        if count:
            out[keep, s] = decoder.decode(tables._model(s), count) if tables.entries > 1 else 0
        if same.any():  # a repeat takes the code of the last frame before it that is not a repeat
            source = np.maximum.accumulate(np.where(same, 0, frames))
            out[:, s] = np.where(same, out[source, s], out[:, s])
    return out


def read_header(blob: bytes | memoryview) -> StreamHeader:
    """Parse and check the 44-byte stream header; errors name the field."""
    view = memoryview(blob)
    if len(view) < HEADER_BYTES:
        raise fail("stream", f"at least {HEADER_BYTES} bytes (the header)", f"{len(view)} bytes (truncated)")
    magic, version, mode, reserved, stages, entries, rate, check = _HEADER.unpack_from(view)
    if magic != MAGIC:
        raise fail("stream (magic)", repr(MAGIC), f"{bytes(magic)!r} (not an rvqlayer stream)")
    if version != STREAM_VERSION:
        raise fail("stream (version)", f"{STREAM_VERSION}", f"{version} (a stream this version cannot read)")
    if _HEADER_CRC.unpack_from(view, _HEADER.size)[0] != zlib.crc32(view[: _HEADER.size]):
        raise fail("stream (header checksum)", "the crc32 of the header", "another value (a damaged header)")
    if mode not in (FIXED, TABLES, REPEATS) or reserved != 0:
        raise fail("stream (mode)", f"{FIXED} (fixed), {TABLES} (tables) or {REPEATS} (repeats)", mode)
    if not 1 <= stages <= MAX_STAGES:
        raise fail("stream (stages)", f"in [1, {MAX_STAGES}]", stages)
    if not 1 <= entries <= MAX_ENTRIES:
        raise fail("stream (entries)", f"in [1, {MAX_ENTRIES}]", entries)
    if not 0 < rate < math.inf:
        raise fail("stream (frame_rate)", "a finite number > 0", rate)
    return StreamHeader(version, mode, stages, entries, rate, bytes(check))


def _check_reader(header: StreamHeader, tables: UsageTables | None, fingerprint: bytes | None) -> None:
    if header.mode in (TABLES, REPEATS):
        if tables is None:
            raise fail("tables", "the UsageTables the stream was entropy-coded with", "None")
        if tables.checksum() != header.checksum:
            raise fail("tables", "the tables the stream was made with (stream checksum)", "other tables")
        if tables.entries != header.entries or tables.stages < header.stages:
            raise fail("tables", f"tables for {header.entries} entries", f"{tables.entries} entries")
    else:
        if tables is not None:
            raise fail("tables", "None for a fixed-length stream (mode 0)", "UsageTables")
        if fingerprint is not None and header.checksum not in (fingerprint, bytes(16)):
            raise fail("fingerprint", "the codebooks the stream was made with", "another fingerprint")


def read_packet(
    blob: bytes | memoryview, offset: int, header: StreamHeader, tables: UsageTables | None = None
) -> tuple[np.ndarray | None, int]:
    """Decode the packet at byte ``offset``: its codes int64 ``[frames, stages]`` and the next offset.

    Returns ``(None, offset_after)`` for the end packet. A reader can stop
    after any packet and resume later from the offset it got.
    """
    view = memoryview(blob)
    if offset + PACKET_HEADER_BYTES > len(view):
        raise fail("stream", f"a packet header at byte {offset}", f"{len(view)} bytes (truncated)")
    frames, flags, length, crc = _PACKET.unpack_from(view, offset)
    start = offset + PACKET_HEADER_BYTES
    if frames == 0:
        if flags or length or crc:
            raise fail(f"stream (packet at byte {offset})", "an end packet of zeros", "other values")
        return None, start
    if frames * header.stages > MAX_PACKET_CODES:
        raise fail(f"stream (packet frames at byte {offset})", f"at most {MAX_PACKET_CODES // header.stages}", frames)
    if flags & ~_SKIPS:
        raise fail(f"stream (packet flags at byte {offset})", "0 or 1", flags)
    if start + length > len(view):
        raise fail(f"stream (packet length at byte {offset})", f"at most {len(view) - start}", f"{length} (truncated)")
    body = view[start : start + length]
    if zlib.crc32(body, zlib.crc32(view[offset : offset + 7])) != crc:
        raise fail(f"stream (packet checksum at byte {offset})", "the crc32 of the packet", "another value (damaged)")
    shape = (frames, header.stages)
    used = 0
    if flags & _SKIPS:
        used = -(-frames * header.stages // 8)
        if used > length:
            raise fail(f"stream (packet at byte {offset})", f"a presence map of {used} bytes", f"{length} bytes")
        present = np.unpackbits(np.frombuffer(body[:used], dtype=np.uint8), count=frames * header.stages)
        present = present.astype(bool).reshape(shape)
    else:
        present = np.ones(shape, dtype=bool)
    rest = body[used:]
    try:
        if header.mode == FIXED:
            bits = code_bits(header.entries)
            count = int(present.sum())
            if len(rest) != -(-count * bits // 8):
                raise fail(f"stream (packet length at byte {offset})", f"{-(-count * bits // 8)} code bytes", len(rest))
            out = np.full(shape, -1, dtype=np.int64)
            out[present] = unpack_codes(rest, bits, count)
        else:
            out = _entropy_decode(rest, present, tables, header.mode == REPEATS)  # type: ignore[arg-type]
    except RvqlayerError:
        raise
    except Exception as exc:  # the coder's own complaint about words it cannot decode
        raise fail(f"stream (packet at byte {offset})", "decodable codes", f"{type(exc).__name__}: {exc}") from None
    if out.size and (out.max() >= header.entries):
        raise fail(f"stream (packet at byte {offset})", f"codes below {header.entries}", int(out.max()))
    return out, start + length


def iter_packets(
    blob: bytes | memoryview, tables: UsageTables | None = None, fingerprint: bytes | None = None
) -> Iterator[np.ndarray]:
    """Each packet's codes int64 ``[frames, stages]`` in order; stops at the end packet."""
    header = read_header(blob)
    _check_reader(header, tables, fingerprint)
    offset = HEADER_BYTES
    while True:
        codes, offset = read_packet(blob, offset, header, tables)
        if codes is None:
            break
        yield codes
    if offset != len(blob):
        raise fail("stream", f"{offset} bytes (ending with the end packet)", f"{len(blob)} bytes (trailing data)")


def _read_fixed_uniform(view: memoryview, header: StreamHeader) -> np.ndarray | None:
    """A fixed-length stream whose packets have no skipped stage and equal sizes, unpacked at once.

    Returns None whenever anything is irregular; :func:`iter_packets` then
    reads packet by packet and names what is wrong.
    """
    bits = code_bits(header.entries)
    offset, packets = HEADER_BYTES, []
    while offset + PACKET_HEADER_BYTES <= len(view):
        frames, flags, length, crc = _PACKET.unpack_from(view, offset)
        start = offset + PACKET_HEADER_BYTES
        if frames == 0:
            if flags or length or crc or start != len(view):
                return None
            break
        count = frames * header.stages
        if flags or count > MAX_PACKET_CODES or length != -(-count * bits // 8) or start + length > len(view):
            return None
        if zlib.crc32(view[start : start + length], zlib.crc32(view[offset : offset + 7])) != crc:
            return None
        packets.append((frames, start, length))
        offset = start + length
    else:
        return None
    if not packets:
        return np.zeros((0, header.stages), dtype=np.int64)
    frames, start, length = packets[0]
    same = len(packets) if packets[-1][0] == frames else len(packets) - 1
    if any(f != frames for f, _, _ in packets[:same]):
        return None
    stride = PACKET_HEADER_BYTES + length
    table = np.frombuffer(view, dtype=np.uint8, count=same * stride, offset=start - PACKET_HEADER_BYTES)
    payload = table.reshape(same, stride)[:, PACKET_HEADER_BYTES:]
    parts = [_unpack_rows(payload, bits, frames * header.stages).reshape(-1, header.stages)]
    if same < len(packets):
        last, at, size = packets[-1]
        parts.append(unpack_codes(view[at : at + size], bits, last * header.stages).reshape(last, header.stages))
    return np.concatenate(parts)


def read_stream(
    blob: bytes | memoryview, tables: UsageTables | None = None, fingerprint: bytes | None = None
) -> np.ndarray:
    """Codes int64 ``[frames, stages]`` of a stream from :func:`write_stream` (``-1`` = skipped).

    ``tables`` must be the ones it was entropy-coded with (None for a
    fixed-length stream); ``fingerprint``, if given, is checked against a
    fixed-length stream's. Raises :class:`~rvqlayer.RvqlayerError` naming the
    field for a truncated or damaged stream, another version or other tables.
    """
    if not isinstance(blob, (bytes, bytearray, memoryview)):
        raise fail("stream", "bytes", type(blob).__name__)
    header = read_header(blob)
    if header.mode == FIXED:
        _check_reader(header, tables, fingerprint)
        fast = _read_fixed_uniform(memoryview(blob), header)
        if fast is not None:
            return fast
    parts = list(iter_packets(blob, tables, fingerprint))
    if not parts:
        return np.zeros((0, header.stages), dtype=np.int64)
    return np.concatenate(parts)
