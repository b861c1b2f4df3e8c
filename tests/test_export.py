"""Saving and loading a quantizer with rvqlayer.export (safetensors + JSON metadata)."""

from __future__ import annotations

import json
import os

import pytest
import torch

from rvqlayer import MultiStageQuantizer, RvqlayerError
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
    with pytest.raises(RvqlayerError, match="expected `path`"):
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
    save_file(tensors, str(path), metadata=meta)
    with pytest.raises(RvqlayerError, match="codewords"):
        load_codebooks(path)


def test_save_rejects_other_modules(tmp_path):
    with pytest.raises(RvqlayerError, match="MultiStageQuantizer"):
        save_codebooks(torch.nn.Linear(2, 2), tmp_path / "x.safetensors")
