"""rvqlayer.runtime: numpy-only encode and decode of an exported quantizer, against the torch layer."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
import torch
from _torchless import TORCH_BLOCKER

from rvqlayer import MultiStageQuantizer, RvqlayerError
from rvqlayer.export import save_codebooks
from rvqlayer.runtime import load_runtime


def _layer(trained: bool, **options) -> MultiStageQuantizer:
    torch.manual_seed(0)
    if trained:
        q = MultiStageQuantizer(8, stages=4, entries=32, **options)
        for _ in range(4):
            q(torch.randn(16, 20, 8) if options.get("axis") != 1 else torch.randn(16, 8, 20))
        return q.eval()
    q = MultiStageQuantizer(8, stages=4, entries=32, init="random", **options).eval()
    if q.code_dim < q.dim:  # random projections
        torch.nn.init.normal_(q.project_in.weight)
        torch.nn.init.normal_(q.project_out.weight)
    return q


@pytest.mark.parametrize("trained", [False, True])
@pytest.mark.parametrize(
    "options", [{}, {"code_dim": 3}, {"metric": "cosine"}, {"axis": 1, "code_dim": 5}, {"update": "gradient"}]
)
def test_runtime_codes_equal_the_layer_and_decode_matches(tmp_path, trained, options):
    q = _layer(trained, **options)
    rt = load_runtime(save_codebooks(q, tmp_path / "q.safetensors"))
    x = torch.randn(6, 8, 40) if options.get("axis") == 1 else torch.randn(6, 40, 8)
    for stages in (None, 1, 3):
        codes = q.encode(x, stages=stages)
        mine = rt.encode(x.numpy(), stages=stages)
        assert mine.dtype == np.int64 and mine.shape == tuple(codes.shape)
        assert np.array_equal(mine, codes.numpy())
        out = rt.decode(mine)
        assert out.dtype == np.float32
        np.testing.assert_allclose(out, q.decode(codes).numpy(), atol=1e-5, rtol=0)
    skipped = q.encode(x).clone()
    skipped[..., 2:] = -1
    np.testing.assert_allclose(rt.decode(skipped.numpy()), q.decode(skipped).numpy(), atol=1e-5, rtol=0)


def test_runtime_rejects_bad_input(tmp_path):
    rt = load_runtime(save_codebooks(_layer(False), tmp_path / "q.safetensors"))
    for bad, match in [
        (np.zeros((3, 7), dtype=np.float32), "x"),
        (np.zeros((3, 8), dtype=np.int64), "floating"),
        (np.full((3, 8), np.nan, dtype=np.float32), "finite"),
    ]:
        with pytest.raises(RvqlayerError, match=match):
            rt.encode(bad)
    with pytest.raises(RvqlayerError, match="stages"):
        rt.encode(np.zeros((3, 8), dtype=np.float32), stages=5)
    for bad in (np.array([[32]]), np.array([[-2]]), np.zeros((2, 5), dtype=np.int64), np.zeros((2, 2))):
        with pytest.raises(RvqlayerError, match="codes"):
            rt.decode(bad)


def test_runtime_rejects_a_damaged_file(tmp_path):
    path = save_codebooks(_layer(True), tmp_path / "q.safetensors")
    data = bytearray(path.read_bytes())
    data[-5] ^= 0x10
    path.write_bytes(bytes(data))
    with pytest.raises(RvqlayerError, match="checksum"):
        load_runtime(path)


def test_runtime_runs_where_torch_cannot_be_imported(tmp_path):
    q = _layer(True, code_dim=3)
    path = save_codebooks(q, tmp_path / "q.safetensors")
    x = torch.randn(50, 8)
    np.save(tmp_path / "x.npy", x.numpy())
    code = TORCH_BLOCKER + (
        "import numpy as np\n"
        "from rvqlayer import runtime, stream\n"
        f"rt = runtime.load_runtime({str(path)!r})\n"
        f"codes = rt.encode(np.load({str(tmp_path / 'x.npy')!r}))\n"
        "blob = stream.write_stream(codes, entries=rt.entries, frame_rate=75.0)\n"
        f"np.save({str(tmp_path / 'codes.npy')!r}, stream.read_stream(blob))\n"
        f"np.save({str(tmp_path / 'y.npy')!r}, rt.decode(codes))\n"
        "assert 'torch' not in sys.modules\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True)
    codes = q.encode(x)
    assert np.array_equal(np.load(tmp_path / "codes.npy"), codes.numpy())
    np.testing.assert_allclose(np.load(tmp_path / "y.npy"), q.decode(codes).numpy(), atol=1e-5, rtol=0)


@pytest.mark.parametrize("field, value", [("chunk", 0), ("chunk", "x"), ("metric", "l1"), ("axis", 1.5)])
def test_runtime_rejects_crafted_options(tmp_path, field, value):
    import json

    from safetensors.torch import save_file

    from rvqlayer._container import checksum

    q = _layer(False)
    tensors = {name: t.contiguous() for name, t in q.state_dict().items()}
    config = json.dumps({**q.config(), field: value})
    names = {torch.float32: "F32", torch.int64: "I64", torch.bool: "BOOL"}
    digest = checksum(
        config,
        ((n, names[t.dtype], tuple(t.shape), t.reshape(-1).view(torch.uint8).numpy()) for n, t in tensors.items()),
    )
    meta = {"format": "rvqlayer-codebooks", "version": "2", "config": config, "checksum": digest}
    save_file(tensors, str(tmp_path / "q.safetensors"), metadata=meta)
    with pytest.raises(RvqlayerError, match=field):
        load_runtime(tmp_path / "q.safetensors")
