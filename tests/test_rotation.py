"""The rotation-trick gradient estimator (Fifty et al., "Restructuring vector quantization with the
rotation trick", ICLR 2025): value unchanged, gradient (||q|| / ||e||) R^T g with R e/||e|| = q/||q||."""

import copy

import pytest
import torch

from rvqlayer import MultiStageQuantizer, RvqlayerError
from rvqlayer.rotation import rotation_trick, straight_through


def _explicit_rotation(e, q):
    """The d x d rotation of the paper, built as a matrix (the slow, obvious reference)."""
    u, v = e / e.norm(), q / q.norm()
    w = (u + v) / (u + v).norm()
    eye = torch.eye(e.shape[0], dtype=e.dtype)
    return eye - 2 * torch.outer(w, w) + 2 * torch.outer(v, u)


def test_explicit_rotation_is_orthogonal_and_turns_e_onto_q():
    g = torch.Generator().manual_seed(0)
    e, q = torch.randn(6, generator=g, dtype=torch.float64), torch.randn(6, generator=g, dtype=torch.float64)
    r = _explicit_rotation(e, q)
    torch.testing.assert_close(r.T @ r, torch.eye(6, dtype=torch.float64))
    torch.testing.assert_close(torch.linalg.det(r), torch.tensor(1.0, dtype=torch.float64))
    torch.testing.assert_close(q.norm() / e.norm() * (r @ e), q)


def test_value_is_the_target_and_gradient_matches_the_closed_form():
    g = torch.Generator().manual_seed(1)
    e = torch.randn(5, 7, generator=g, dtype=torch.float64, requires_grad=True)
    q = torch.randn(5, 7, generator=g, dtype=torch.float64)
    upstream = torch.randn(5, 7, generator=g, dtype=torch.float64)
    out = rotation_trick(e, q)
    torch.testing.assert_close(out, q)
    (out * upstream).sum().backward()
    for i in range(5):
        r = _explicit_rotation(e[i].detach(), q[i])
        expected = q[i].norm() / e[i].detach().norm() * (r.T @ upstream[i])
        torch.testing.assert_close(e.grad[i], expected)


def test_gradient_matches_finite_differences_of_the_frozen_map():
    # With R and the scale frozen at e0, the carried vector is the linear map e -> s R e; its
    # finite differences give the Jacobian that autograd must return.
    g = torch.Generator().manual_seed(2)
    e0 = torch.randn(4, generator=g, dtype=torch.float64)
    q = torch.randn(4, generator=g, dtype=torch.float64)
    frozen = q.norm() / e0.norm() * _explicit_rotation(e0, q)
    h = 1e-6
    fd = torch.stack(
        [(frozen @ (e0 + h * d) - frozen @ (e0 - h * d)) / (2 * h) for d in torch.eye(4, dtype=e0.dtype)], 1
    )
    jac = torch.autograd.functional.jacobian(lambda e: rotation_trick(e.unsqueeze(0), q.unsqueeze(0))[0], e0)
    torch.testing.assert_close(jac, fd, atol=1e-8, rtol=1e-6)


def test_equals_straight_through_when_the_input_is_its_codeword():
    g = torch.Generator().manual_seed(3)
    e = torch.randn(8, 5, generator=g, requires_grad=True)
    upstream = torch.randn(8, 5, generator=g)
    (rotation_trick(e, e.detach().clone()) * upstream).sum().backward()
    torch.testing.assert_close(e.grad, upstream, atol=1e-6, rtol=1e-5)


def test_degenerate_rows_fall_back_to_straight_through():
    e = torch.tensor([[0.0, 0.0], [1.0, 2.0], [3.0, 1.0]], requires_grad=True)
    q = torch.tensor([[1.0, 1.0], [-2.0, -4.0], [0.0, 0.0]])
    upstream = torch.tensor([[1.0, 2.0], [3.0, 4.0], [5.0, 6.0]])
    out = rotation_trick(e, q)
    torch.testing.assert_close(out, q)
    (out * upstream).sum().backward()
    torch.testing.assert_close(e.grad, upstream)
    assert torch.isfinite(e.grad).all()


def test_layer_estimators_share_the_value_and_differ_in_the_gradient():
    torch.manual_seed(0)
    st = MultiStageQuantizer(6, stages=2, entries=8, init="random")
    rot = MultiStageQuantizer(6, stages=2, entries=8, init="random", estimator="rotation")
    rot.load_state_dict(st.state_dict())
    st.eval()
    rot.eval()
    x = torch.randn(20, 6)
    xs, xr = x.clone().requires_grad_(), x.clone().requires_grad_()
    out_s, out_r = st(xs), rot(xr)
    torch.testing.assert_close(out_r.quantized, out_s.quantized)
    assert torch.equal(out_r.codes, out_s.codes)
    upstream = torch.randn(20, 6)
    (out_s.quantized * upstream).sum().backward()
    (out_r.quantized * upstream).sum().backward()
    torch.testing.assert_close(xs.grad, upstream)
    assert not torch.allclose(xr.grad, upstream)
    # The rotation acts on the whole vector: z -> sum of codewords.
    expected = rotation_trick(x.clone().requires_grad_(), out_s.quantized.detach())
    torch.testing.assert_close(expected, out_r.quantized)


def test_layer_rotation_equals_straight_through_on_its_own_codewords():
    q = MultiStageQuantizer(2, stages=2, entries=4, init="random", estimator="rotation").eval()
    coarse = torch.tensor([[1.0, 1.0], [10.0, 1.0], [1.0, 10.0], [10.0, 10.0]])
    fine = torch.tensor([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])
    q.codebooks[0].codewords.copy_(coarse)
    q.codebooks[1].codewords.copy_(fine)
    x = (coarse.unsqueeze(1) + fine.unsqueeze(0)).reshape(-1, 2)  # each vector is exactly its codeword sum
    torch.testing.assert_close(q(x).quantized, x)
    twin = copy.deepcopy(q)
    twin.estimator = "straight_through"
    upstream = torch.randn(16, 2)
    grads = []
    for layer in (q, twin):
        xi = x.clone().requires_grad_()
        (layer(xi).quantized * upstream).sum().backward()
        grads.append(xi.grad)
    torch.testing.assert_close(grads[0], grads[1], atol=1e-5, rtol=1e-5)


def test_straight_through_copies_the_gradient():
    e = torch.randn(3, 2, requires_grad=True)
    out = straight_through(e, torch.ones(3, 2))
    torch.testing.assert_close(out, torch.ones(3, 2))
    out.sum().backward()
    torch.testing.assert_close(e.grad, torch.ones(3, 2))


def test_unknown_estimator_is_named():
    with pytest.raises(RvqlayerError, match="`estimator`"):
        MultiStageQuantizer(4, estimator="copy")
