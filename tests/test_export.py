"""Saving and loading a quantizer with rvqlayer.export (safetensors + JSON metadata)."""

from __future__ import annotations

import json
import os
import random
import time

import pytest
import torch

from rvqlayer import MultiStageQuantizer, RvqlayerError
from rvqlayer._container import checksum
from rvqlayer.export import load_codebooks, quantizer_config, save_codebooks


def _trained(**options) -> MultiStageQuantizer:
    torch.manual_seed(0)
    q = MultiStageQuantizer(6, stages=3, entries=16, **options)
    for _ in range(5):
        q(torch.randn(256, 6))
    return q.eval()


@pytest.mark.parametrize("options", [{}, {"code_dim": 3}, {"update": "gradient", "metric": "cosine"}])
def test_round_trip_decodes_and_encodes_the_same(tmp_path, options):
    q = _trained(**options)
    path = save_codebooks(q, tmp_path / "q.safetensors")
    back = load_codebooks(path)
    assert not back.training
    x = torch.randn(40, 6)
    codes = q.encode(x)
    assert torch.equal(back.encode(x), codes)
    assert torch.equal(back.decode(codes), q.decode(codes))
    assert torch.equal(back.decode(codes[:, :1]), q.decode(codes[:, :1]))
    assert quantizer_config(back) == quantizer_config(q)
    for name, t in q.state_dict().items():
        assert torch.equal(back.state_dict()[name], t), name


def test_load_keeps_the_callers_random_stream(tmp_path):
    path = save_codebooks(_trained(), tmp_path / "q.safetensors")
    torch.manual_seed(5)
    expected = torch.rand(3)
    torch.manual_seed(5)
    load_codebooks(path)
    assert torch.equal(torch.rand(3), expected)


def test_save_leaves_no_temporary_file_and_normal_permissions(tmp_path):
    save_codebooks(_trained(), tmp_path / "q.safetensors")
    assert [p.name for p in tmp_path.iterdir()] == ["q.safetensors"]
    mask = os.umask(0)
    os.umask(mask)
    assert (tmp_path / "q.safetensors").stat().st_mode & 0o777 == 0o666 & ~mask


def test_metadata_is_plain_json(tmp_path):
    from safetensors import safe_open

    path = save_codebooks(_trained(code_dim=3), tmp_path / "q.safetensors")
    with safe_open(str(path), framework="pt") as f:
        meta = f.metadata()
    config = json.loads(meta["config"])
    assert meta["format"] == "rvqlayer-codebooks"
    assert config["dim"] == 6 and config["code_dim"] == 3 and config["stages"] == 3


def test_missing_file(tmp_path):
    with pytest.raises(RvqlayerError, match="no such file"):
        load_codebooks(tmp_path / "absent.safetensors")


@pytest.mark.parametrize("content", [b"", b"not a safetensors file at all", b"\xff" * 64])
def test_garbage_file_gives_a_clear_error(tmp_path, content):
    path = tmp_path / "bad.safetensors"
    path.write_bytes(content)
    with pytest.raises(RvqlayerError, match="not a valid safetensors file"):
        load_codebooks(path)


def test_truncated_file_gives_a_clear_error(tmp_path):
    path = save_codebooks(_trained(), tmp_path / "q.safetensors")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(RvqlayerError, match="expected `path.*truncated"):
        load_codebooks(path)


def test_foreign_safetensors_file_is_rejected(tmp_path):
    from safetensors.torch import save_file

    path = tmp_path / "other.safetensors"
    save_file({"weight": torch.zeros(2, 2)}, str(path))
    with pytest.raises(RvqlayerError, match="format None"):
        load_codebooks(path)


def test_tensor_of_the_wrong_shape_is_rejected(tmp_path):
    from safetensors.torch import save_file

    q = _trained()
    path = save_codebooks(q, tmp_path / "q.safetensors")
    from safetensors import safe_open

    with safe_open(str(path), framework="pt") as f:
        meta = f.metadata()
        tensors = {k: f.get_tensor(k) for k in f.keys()}
    tensors["codebooks.0.codewords"] = torch.zeros(15, 6)
    named = (
        (n, "I64" if t.dtype == torch.int64 else "BOOL" if t.dtype == torch.bool else "F32", tuple(t.shape), t)
        for n, t in tensors.items()
    )
    meta["checksum"] = checksum(
        meta["config"], ((n, d, s, t.reshape(-1).view(torch.uint8).numpy()) for n, d, s, t in named)
    )
    save_file(tensors, str(path), metadata=meta)
    with pytest.raises(RvqlayerError, match="codewords"):
        load_codebooks(path)


def test_save_rejects_other_modules(tmp_path):
    with pytest.raises(RvqlayerError, match="MultiStageQuantizer"):
        save_codebooks(torch.nn.Linear(2, 2), tmp_path / "x.safetensors")


def _container(tensors: dict, metadata: dict) -> bytes:
    """A safetensors container by hand: ``tensors`` maps name -> (dtype, shape, raw bytes)."""
    header, offset, body = {}, 0, b""
    for name, (dtype, shape, raw) in tensors.items():
        header[name] = {"dtype": dtype, "shape": list(shape), "data_offsets": [offset, offset + len(raw)]}
        offset += len(raw)
        body += raw
    header["__metadata__"] = metadata
    text = json.dumps(header).encode()
    text += b" " * (-len(text) % 8)
    return len(text).to_bytes(8, "little") + text + body


def _crafted(config: dict) -> bytes:
    """A ~4 KB file declaring ``config``, with a valid checksum, holding a few small tensors."""
    tensors = {"codebooks.0.codewords": ("F32", (16, 64), bytes(4096))}
    text = json.dumps(config)
    digest = checksum(text, ((n, d, s, r) for n, (d, s, r) in tensors.items()))
    meta = {"format": "rvqlayer-codebooks", "version": "2", "config": text, "checksum": digest}
    return _container(tensors, meta)


@pytest.mark.parametrize(
    "config, field",
    [
        ({"dim": 2**26, "stages": 1, "entries": 16}, "option dim"),
        ({"dim": 64, "stages": 1, "entries": 2**28}, "option entries"),
        ({"dim": 64, "stages": 200000, "entries": 16}, "option stages"),
        ({"dim": 64, "stages": 1, "entries": 2**24}, "option entries"),
        ({"dim": 65536, "stages": 1024, "entries": 2**20}, "bytes of codewords"),
        ({"dim": 64, "stages": 8, "entries": 1024}, "bytes of codewords"),
        ({"dim": 64, "code_dim": 128, "stages": 1, "entries": 16}, "option code_dim"),
        ({"dim": "64", "stages": 1, "entries": 16}, "option dim"),
    ],
)
def test_crafted_options_fail_fast_before_allocating(tmp_path, config, field):
    # issue 8 section 2: files of about 4 KB declaring huge sizes took gigabytes and tens of seconds.
    path = tmp_path / "crafted.safetensors"
    path.write_bytes(_crafted(config))
    assert path.stat().st_size < 8192
    start = time.perf_counter()
    with pytest.raises(RvqlayerError, match=field):
        load_codebooks(path)
    assert time.perf_counter() - start < 2.0  # generous; the check itself takes milliseconds


def test_header_declaring_more_data_than_the_file_holds(tmp_path):
    raw = _crafted({"dim": 64, "stages": 1, "entries": 16})
    header_len = int.from_bytes(raw[:8], "little")
    header = json.loads(raw[8 : 8 + header_len])
    header["codebooks.0.codewords"]["shape"] = [2**20, 2**20]
    header["codebooks.0.codewords"]["data_offsets"] = [0, 2**42]
    text = json.dumps(header).encode()
    path = tmp_path / "crafted.safetensors"
    path.write_bytes(len(text).to_bytes(8, "little") + text + raw[8 + header_len :])
    with pytest.raises(RvqlayerError, match="data_offsets"):
        load_codebooks(path)


def test_declared_header_length_beyond_the_file(tmp_path):
    path = tmp_path / "crafted.safetensors"
    path.write_bytes((2**60).to_bytes(8, "little") + b"{}")
    with pytest.raises(RvqlayerError, match="header length"):
        load_codebooks(path)


def test_every_bit_flip_is_detected_or_harmless(tmp_path):
    # issue 8 section 3: of 300 single-bit flips, 179 loaded silently with changed values.
    q = _trained(code_dim=3)
    path = save_codebooks(q, tmp_path / "q.safetensors")
    data = path.read_bytes()
    reference = q.state_dict()
    rng = random.Random(0)
    positions = rng.sample(range(len(data) * 8), 300)
    detected = harmless = 0
    for bit in positions:
        flipped = bytearray(data)
        flipped[bit // 8] ^= 1 << (bit % 8)
        path.write_bytes(bytes(flipped))
        try:
            back = load_codebooks(path)
        except RvqlayerError:
            detected += 1
            continue
        state = back.state_dict()
        assert back.config() == q.config(), f"bit {bit} changed the options silently"
        for name, t in reference.items():
            assert torch.equal(state[name], t), f"bit {bit} changed {name} silently"
        harmless += 1
    assert detected + harmless == len(positions)
    assert detected >= 290  # only a flip in the header's space padding can be harmless


def test_version_1_files_still_load(tmp_path):
    from safetensors.torch import save_file

    q = _trained()
    tensors = {name: t.contiguous() for name, t in q.state_dict().items()}
    meta = {"format": "rvqlayer-codebooks", "version": "1", "config": json.dumps(q.config())}
    save_file(tensors, str(tmp_path / "old.safetensors"), metadata=meta)
    back = load_codebooks(tmp_path / "old.safetensors")
    x = torch.randn(20, 6)
    assert torch.equal(back.encode(x), q.encode(x))


def test_unknown_version_is_named(tmp_path):
    path = save_codebooks(_trained(), tmp_path / "q.safetensors")
    data = path.read_bytes().replace(b'"version":"2"', b'"version":"9"')
    path.write_bytes(data)
    with pytest.raises(RvqlayerError, match="version '9'"):
        load_codebooks(path)


def test_checksum_is_stored_and_covers_the_options(tmp_path):
    path = save_codebooks(_trained(), tmp_path / "q.safetensors")
    data = path.read_bytes()
    assert b'"checksum":"sha256:' in data
    path.write_bytes(data.replace(b'\\"beta\\": 0.25', b'\\"beta\\": 0.35'))
    assert path.read_bytes() != data
    with pytest.raises(RvqlayerError, match="checksum"):
        load_codebooks(path)
