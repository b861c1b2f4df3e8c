"""Exported graphs: torch.export programs and ONNX files of encode and decode, against the eager layer."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
import torch

from rvqlayer import MultiStageQuantizer, RvqlayerError
from rvqlayer.export import export_graphs, export_onnx


def _layer(trained: bool, **options) -> MultiStageQuantizer:
    torch.manual_seed(0)
    q = MultiStageQuantizer(8, stages=3, entries=32, init="kmeans" if trained else "random", **options)
    if trained:
        for _ in range(4):
            q(torch.randn(8, 8, 30) if options.get("axis") == 1 else torch.randn(240, 8))
    elif q.code_dim < q.dim:
        torch.nn.init.normal_(q.project_in.weight)
    return q.eval()


def _inputs(q: MultiStageQuantizer) -> list[torch.Tensor]:
    torch.manual_seed(1)
    if q.axis == 1:
        return [torch.randn(2, 8, 17), torch.randn(5, 8, 3)]
    return [torch.randn(50, 8), torch.randn(7, 8)]


CASES = [
    (False, None, {}),
    (False, 1, {"code_dim": 4}),
    (True, None, {"code_dim": 5, "axis": 1}),
    (True, 2, {"metric": "cosine"}),
    (True, 3, {"update": "gradient", "axis": 1}),
]


@pytest.mark.parametrize("trained, stages, options", CASES)
def test_torch_export_programs_match_the_layer(trained, stages, options):
    q = _layer(trained, **options)
    encode, decode = export_graphs(q, stages=stages)
    for x in _inputs(q):  # shapes other than the example's: the graphs are dynamic
        codes = q.encode(x, stages=stages)
        assert torch.equal(encode.module()(x), codes)
        torch.testing.assert_close(decode.module()(codes), q.decode(codes), atol=1e-5, rtol=0)


@pytest.mark.parametrize("trained, stages, options", CASES[:3])
def test_onnx_files_match_the_layer(tmp_path, trained, stages, options):
    import onnxruntime

    q = _layer(trained, **options)
    enc_path, dec_path = export_onnx(q, tmp_path / "quantizer", stages=stages)
    assert enc_path.name == "quantizer.encode.onnx" and dec_path.name == "quantizer.decode.onnx"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["quantizer.decode.onnx", "quantizer.encode.onnx"]
    options = onnxruntime.SessionOptions()
    options.intra_op_num_threads = 1
    enc = onnxruntime.InferenceSession(str(enc_path), options)
    dec = onnxruntime.InferenceSession(str(dec_path), options)
    for x in _inputs(q):
        codes = q.encode(x, stages=stages)
        got = enc.run(None, {"x": x.numpy()})[0]
        assert np.array_equal(got, codes.numpy())
        y = dec.run(None, {"codes": codes.numpy()})[0]
        np.testing.assert_allclose(y, q.decode(codes).numpy(), atol=1e-5, rtol=0)


def test_eager_checks_still_run_after_export():
    q = _layer(False)
    export_graphs(q)
    with pytest.raises(RvqlayerError, match="finite"):
        q.encode(torch.full((2, 8), float("nan")))
    with pytest.raises(RvqlayerError, match="codes"):
        q.decode(torch.tensor([[40, 0, 0]]))


def test_negative_axis_decodes_with_too_few_dimensions_give_a_clear_error():
    q = MultiStageQuantizer(8, stages=2, entries=4, axis=-3, init="random")
    with pytest.raises(RvqlayerError, match="at least 3 dimensions"):
        q.decode(torch.zeros(5, 2, dtype=torch.int64))


def test_import_does_not_pull_onnx_or_lightning():
    code = (
        "import sys, rvqlayer, rvqlayer.export, rvqlayer.stream, rvqlayer.runtime\n"
        "bad = [m for m in ('onnx', 'onnxruntime', 'onnxscript', 'lightning', 'pytorch_lightning') if m in sys.modules]\n"
        "assert not bad, bad\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True)
