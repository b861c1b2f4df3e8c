"""The rotation trick: a gradient estimator through a vector quantizer.

Fifty et al., "Restructuring vector quantization with the rotation trick",
ICLR 2025: the encoder output ``e`` is carried onto its codeword ``q`` by the
rotation ``R`` that turns the direction of ``e`` into the direction of ``q``,
and the rescaling ``||q|| / ||e||``; both are treated as constants in the
backward pass. The forward value is ``q`` as before; the gradient reaching
``e`` is ``(||q|| / ||e||) R^T g`` instead of the straight-through copy ``g``.

``R`` is applied in closed form, never built as a ``d x d`` matrix: with unit
vectors ``u = e / ||e||``, ``v = q / ||q||`` and ``w = (u + v) / ||u + v||``,
``R = I - 2 w w^T + 2 v u^T``: an orthogonal map with ``R u = v`` that
leaves every vector orthogonal to both ``u`` and ``v`` unchanged.
"""

from __future__ import annotations

import torch

ESTIMATORS = ("straight_through", "rotation")


def straight_through(x: torch.Tensor, target: torch.Tensor) -> torch.Tensor:
    """Value ``target``, gradient to ``x`` unchanged (straight-through estimator)."""
    return x + (target - x).detach()


def rotation_trick(x: torch.Tensor, target: torch.Tensor, eps: float = 1e-6) -> torch.Tensor:
    """Value ``target`` ``[..., d]``; gradient to ``x`` ``[..., d]`` through a constant rotation and rescaling.

    Rows where the rotation is not defined (``x`` or ``target`` of norm below
    ``eps`` times the largest norm, or ``target`` pointing straight against
    ``x``) fall back to the straight-through estimator.

    >>> x = torch.tensor([[2.0, 0.0]], requires_grad=True)
    >>> out = rotation_trick(x, torch.tensor([[0.0, 1.0]]))
    >>> out.detach().tolist()
    [[0.0, 1.0]]
    >>> out[0, 1].backward()    # target's direction pulls back onto x's, scaled by |target| / |x| = 1/2
    >>> [round(g, 6) for g in x.grad[0].tolist()]
    [0.5, 0.0]
    """
    target = target.detach()
    with torch.no_grad():
        x_norm = x.detach().norm(dim=-1, keepdim=True)
        t_norm = target.norm(dim=-1, keepdim=True)
        scale_ref = torch.maximum(x_norm.amax(), t_norm.amax()).clamp_min(torch.finfo(x_norm.dtype).tiny)
        u = x.detach() / x_norm.clamp_min(torch.finfo(x_norm.dtype).tiny)
        v = target / t_norm.clamp_min(torch.finfo(t_norm.dtype).tiny)
        w = u + v
        w_norm = w.norm(dim=-1, keepdim=True)
        w = w / w_norm.clamp_min(torch.finfo(w_norm.dtype).tiny)
        ok = (x_norm > eps * scale_ref) & (t_norm > eps * scale_ref) & (w_norm > eps)
        scale = t_norm / x_norm.clamp_min(torch.finfo(x_norm.dtype).tiny)
    rotated = x - 2.0 * w * (w * x).sum(-1, keepdim=True) + 2.0 * v * (u * x).sum(-1, keepdim=True)
    carried = torch.where(ok, scale * rotated, x)
    return carried + (target - carried).detach()
