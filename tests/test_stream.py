"""rvqlayer.stream: fixed-length packing, entropy coding with static tables, the stream format."""

from __future__ import annotations

import struct
import zlib

import numpy as np
import pytest
import torch
from _torchless import TORCH_BLOCKER
from hypothesis import given, settings
from hypothesis import strategies as st

from rvqlayer import MultiStageQuantizer, RvqlayerError
from rvqlayer import stream as S


@st.composite
def _codes(draw):
    entries = draw(st.integers(2, 65536))
    stages = draw(st.integers(1, 32))
    lead = draw(st.lists(st.integers(0, 7), min_size=1, max_size=3))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    skew = draw(st.sampled_from(["uniform", "peaked", "one"]))
    shape = (*lead, stages)
    if skew == "uniform":
        codes = rng.integers(0, entries, shape)
    elif skew == "peaked":
        codes = np.minimum(rng.geometric(0.3, shape) - 1, entries - 1)
    else:
        codes = np.full(shape, entries - 1)
    if draw(st.booleans()):
        codes = np.where(rng.random(shape) < 0.2, -1, codes)
    return codes, entries, draw(st.integers(1, 9))


@settings(max_examples=150, deadline=None)
@given(_codes())
def test_fixed_and_entropy_round_trips_are_exact(case):
    codes, entries, packet = case
    flat = codes.reshape(-1, codes.shape[-1])
    blob = S.write_stream(codes, entries=entries, frame_rate=50.0, packet_frames=packet)
    assert np.array_equal(S.read_stream(blob), flat)
    tables = S.UsageTables.from_codes(codes, entries)
    coded = S.write_stream(codes, entries=entries, frame_rate=50.0, tables=tables, packet_frames=packet)
    assert np.array_equal(S.read_stream(coded, tables=tables), flat)
    context = tables.with_repeats(codes.reshape(-1, codes.shape[-1]))
    coded = S.write_stream(codes, entries=entries, frame_rate=50.0, tables=context, packet_frames=packet)
    assert S.read_header(coded).mode == S.REPEATS
    assert np.array_equal(S.read_stream(coded, tables=context), flat)


def test_empty_input_round_trips():
    for tables in (None, S.UsageTables.from_counts(np.ones((3, 16)))):
        blob = S.write_stream(np.zeros((0, 3), dtype=np.int64), entries=16, frame_rate=75.0, tables=tables)
        assert len(blob) == S.HEADER_BYTES + S.PACKET_HEADER_BYTES
        assert S.read_stream(blob, tables=tables).shape == (0, 3)


@pytest.mark.parametrize("entries", [2, 3, 5, 255, 256, 257, 1000, 1024, 4097, 65536, 2**20])
def test_fixed_packing_is_exactly_ceil_log2_bits(entries):
    rng = np.random.default_rng(entries)
    values = rng.integers(0, entries, 1003)
    bits = S.code_bits(entries)
    assert bits == int(np.ceil(np.log2(entries)))
    packed = S.pack_codes(values, bits)
    assert len(packed) == -(-1003 * bits // 8)
    assert np.array_equal(S.unpack_codes(packed, bits, 1003), values)


def test_packing_is_msb_first_against_a_bit_string():
    values = np.array([5, 0, 7, 2, 1, 6, 3, 4, 5])
    expected = "".join(format(int(v), "03b") for v in values)
    expected += "0" * (-len(expected) % 8)
    packed = S.pack_codes(values, 3)
    assert "".join(format(b, "08b") for b in packed) == expected


def test_entropy_coded_size_is_close_to_the_cross_entropy():
    rng = np.random.default_rng(0)
    p = np.array([0.5, 0.2, 0.1, 0.1, 0.05, 0.05])
    codes = rng.choice(6, size=(20000, 2), p=p)
    tables = S.UsageTables.from_counts(np.stack([p, p[::-1]]))
    blob = S.write_stream(codes, entries=6, frame_rate=100.0, tables=tables, packet_frames=20000)
    ideal = tables.bits(codes) / 8
    overhead = S.HEADER_BYTES + 2 * S.PACKET_HEADER_BYTES
    assert ideal < len(blob) - overhead < 1.01 * ideal + 8


def test_tables_from_a_quantizer_use_its_counts_and_fingerprint():
    torch.manual_seed(0)
    q = MultiStageQuantizer(4, stages=3, entries=8, init="random")
    q.codebooks[1].usage_count.copy_(torch.arange(8.0))
    tables = S.UsageTables.from_quantizer(q)
    assert tables.frequencies.shape == (3, 8)
    assert tables.frequencies[1, 0] == 1 and np.all(np.diff(tables.frequencies[1]) > 0)
    assert tables.fingerprint == S.codebook_fingerprint(q)
    other = MultiStageQuantizer(4, stages=3, entries=8, init="random")
    assert S.codebook_fingerprint(other) != tables.fingerprint
    codes = q.encode(torch.randn(100, 4))
    blob = S.write_stream(codes, entries=8, frame_rate=75.0, tables=tables)
    assert np.array_equal(S.read_stream(blob, tables=tables), codes.numpy())
    assert np.array_equal(S.read_stream(blob, tables=S.UsageTables.from_quantizer(q)), codes.numpy())


def test_tables_are_the_same_integers_from_the_same_counts():
    counts = np.random.default_rng(1).random((4, 300)) * 1e3
    a, b = S.UsageTables.from_counts(counts), S.UsageTables.from_counts(counts.copy())
    assert np.array_equal(a.frequencies, b.frequencies) and a.checksum() == b.checksum()
    assert (a.frequencies >= 1).all() and (a.frequencies.sum(1) <= 2**22).all()


def _blob(mode="fixed"):
    rng = np.random.default_rng(3)
    codes = rng.integers(0, 64, (300, 4))
    codes[5, 2:] = -1
    tables = S.UsageTables.from_codes(codes, 64, repeats=mode == "repeats") if mode != "fixed" else None
    if mode == "repeats":
        codes[100:140] = codes[99]  # runs of repeats
    return S.write_stream(codes, entries=64, frame_rate=75.0, tables=tables, packet_frames=50), tables, codes


def test_other_tables_or_missing_tables_are_named():
    blob, tables, codes = _blob("tables")
    with pytest.raises(RvqlayerError, match="`tables`.*None"):
        S.read_stream(blob)
    other = S.UsageTables.from_counts(np.ones((4, 64)))
    with pytest.raises(RvqlayerError, match="`tables`.*other tables"):
        S.read_stream(blob, tables=other)
    fixed, _, _ = _blob()
    with pytest.raises(RvqlayerError, match="fixed-length"):
        S.read_stream(fixed, tables=tables)


def test_fingerprint_of_other_codebooks_is_rejected():
    codes = np.zeros((10, 2), dtype=np.int64)
    blob = S.write_stream(codes, entries=4, frame_rate=75.0, fingerprint=b"a" * 16)
    assert np.array_equal(S.read_stream(blob, fingerprint=b"a" * 16), codes)
    with pytest.raises(RvqlayerError, match="fingerprint"):
        S.read_stream(blob, fingerprint=b"b" * 16)


def _reheader(blob: bytes, **fields) -> bytes:
    names = ["magic", "version", "mode", "reserved", "stages", "entries", "frame_rate", "checksum"]
    values = dict(zip(names, struct.unpack_from("<4sHBBII d16s", blob)))
    values.update(fields)
    head = struct.pack("<4sHBBII d16s", *(values[n] for n in names))
    return head + struct.pack("<I", zlib.crc32(head)) + blob[44:]


@pytest.mark.parametrize(
    "fields, match",
    [
        ({"magic": b"XXXX"}, "magic"),
        ({"version": 2}, "version"),
        ({"mode": 7}, "mode"),
        ({"stages": 0}, "stages"),
        ({"entries": 2**30}, "entries"),
        ({"frame_rate": float("nan")}, "frame_rate"),
    ],
)
def test_bad_header_fields_are_named(fields, match):
    blob, _, _ = _blob()
    with pytest.raises(RvqlayerError, match=match):
        S.read_stream(_reheader(blob, **fields))


def test_every_truncation_is_an_error():
    for mode in ("fixed", "tables", "repeats"):
        blob, tables, _ = _blob(mode)
        for cut in range(len(blob)):
            with pytest.raises(RvqlayerError, match="stream"):
                S.read_stream(blob[:cut], tables=tables)
        with pytest.raises(RvqlayerError, match="trailing"):
            S.read_stream(blob + b"\0", tables=tables)


def test_every_bit_flip_is_an_error_or_harmless():
    for mode in ("fixed", "tables", "repeats"):
        blob, tables, codes = _blob(mode)
        rng = np.random.default_rng(4)
        for bit in rng.choice(len(blob) * 8, 400, replace=False):
            damaged = bytearray(blob)
            damaged[bit // 8] ^= 1 << (bit % 8)
            try:
                back = S.read_stream(bytes(damaged), tables=tables)
            except RvqlayerError:
                continue
            assert np.array_equal(back, codes), f"bit {bit} changed the codes silently"


def test_packets_can_be_read_one_at_a_time_and_resumed():
    blob, _, codes = _blob()
    header = S.read_header(blob)
    assert (header.stages, header.entries, header.frame_rate, header.mode) == (4, 64, 75.0, S.FIXED)
    offset, parts = S.HEADER_BYTES, []
    while True:
        part, offset = S.read_packet(blob, offset, header)
        if part is None:
            break
        parts.append(part)
    assert [len(p) for p in parts] == [50] * 6
    assert np.array_equal(np.concatenate(parts), codes)


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"codes": np.array([[0, 64]])}, "codes"),
        ({"codes": np.array([[-2, 0]])}, "codes"),
        ({"codes": np.zeros((2, 2))}, "codes"),
        ({"codes": np.int64(3)}, "codes"),
        ({"entries": 0}, "entries"),
        ({"frame_rate": 0.0}, "frame_rate"),
        ({"packet_frames": 0}, "packet_frames"),
        ({"tables": S.UsageTables.from_counts(np.ones((1, 64)))}, "tables"),
    ],
)
def test_bad_arguments_are_named(kwargs, match):
    args = {"codes": np.zeros((3, 2), dtype=np.int64), "entries": 64, "frame_rate": 75.0, **kwargs}
    codes = args.pop("codes")
    with pytest.raises(RvqlayerError, match=match):
        S.write_stream(codes, **args)


def test_stream_works_where_torch_cannot_be_imported():
    import subprocess
    import sys

    code = TORCH_BLOCKER + (
        "import numpy as np\n"
        "from rvqlayer import stream\n"
        "codes = np.arange(40).reshape(10, 4) % 7\n"
        "tables = stream.UsageTables.from_codes(codes, 7)\n"
        "blob = stream.write_stream(codes, entries=7, frame_rate=75.0, tables=tables)\n"
        "assert (stream.read_stream(blob, tables=tables) == codes).all()\n"
        "assert 'torch' not in sys.modules\n"
        "try:\n"
        "    import torch\n"
        "except ImportError:\n"
        "    print('blocked')\n"
    )
    out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True)
    assert out.stdout.strip() == "blocked"


def test_repeat_context_codes_runs_in_fewer_bytes_and_fits_shares():
    rng = np.random.default_rng(5)
    fresh = rng.integers(0, 256, (4000, 2))
    keep = rng.random((4000, 2)) < 0.6  # a code repeats the previous frame's with probability 0.6
    codes = fresh.copy()
    for t in range(1, 4000):
        codes[t] = np.where(keep[t], codes[t - 1], fresh[t])
    static = S.UsageTables.from_codes(codes, 256)
    context = static.with_repeats(codes)
    shares = context.repeats[:, 1] / context.repeats.sum(1)
    expected = (codes[1:] == codes[:-1]).mean(0)
    np.testing.assert_allclose(shares, expected, atol=1e-4)
    plain = S.write_stream(codes, entries=256, frame_rate=75.0, tables=static)
    better = S.write_stream(codes, entries=256, frame_rate=75.0, tables=context)
    assert len(better) < 0.7 * len(plain)
    assert context.checksum() != static.checksum()
    with pytest.raises(RvqlayerError, match="other tables"):
        S.read_stream(better, tables=static)


def test_a_crafted_packet_cannot_ask_for_a_huge_allocation():
    blob = bytearray(S.write_stream(np.zeros((1, 1024), dtype=np.int64), entries=2, frame_rate=1.0))
    body = b""
    fields = struct.pack("<HBII", 65535, 0, len(body), 0)[:7]
    packet = fields + struct.pack("<I", zlib.crc32(body, zlib.crc32(fields))) + body
    crafted = bytes(blob[: S.HEADER_BYTES]) + packet + bytes(11)
    with pytest.raises(RvqlayerError, match="packet frames"):
        S.read_stream(crafted)
    with pytest.raises(RvqlayerError, match="packet_frames"):
        S.write_stream(np.zeros((2, 1024), dtype=np.int64), entries=2, frame_rate=1.0, packet_frames=65535)


@pytest.mark.parametrize("entries, stages, frames, packet", [(1000, 3, 101, 10), (2, 1, 17, 5), (65536, 8, 40, 40)])
def test_fixed_packets_hold_exactly_the_packed_codes(entries, stages, frames, packet):
    codes = np.random.default_rng(entries).integers(0, entries, (frames, stages))
    blob = S.write_stream(codes, entries=entries, frame_rate=75.0, packet_frames=packet)
    offset, start = S.HEADER_BYTES, 0
    bits = S.code_bits(entries)
    while True:
        n, flags, length, _ = struct.unpack_from("<HBII", blob, offset)
        if n == 0:
            break
        body = blob[offset + 11 : offset + 11 + length]
        assert flags == 0 and body == S.pack_codes(codes[start : start + n].reshape(-1), bits)
        offset, start = offset + 11 + length, start + n
    assert start == frames and offset + 11 == len(blob)
