"""What theory allows: the Gaussian rate-distortion bound, and an audit of a quantizer on the user's own vectors.

Reverse water-filling (Cover & Thomas, *Elements of Information Theory*, 2nd
ed. 2006, Thm 10.3.3): a Gaussian vector whose covariance has eigenvalues
``lambda_i``, coded at ``R`` bits per vector under squared error, reaches at
best the distortion ``sum_i min(theta, lambda_i)`` where ``theta`` solves
``sum_i max(0, 1/2 log2(lambda_i / theta)) = R``. For squared error the
Gaussian is the hardest source of a given covariance (C&T Thm 10.3.2 and its
discussion), so for any source with that covariance the bound is a distortion
a good enough quantizer can reach, and no quantizer of a Gaussian can beat it.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import torch

from ._checks import check_int, fail

if TYPE_CHECKING:
    from .quantizer import MultiStageQuantizer


def _as_eigenvalues(eigenvalues: Any) -> np.ndarray:
    if isinstance(eigenvalues, torch.Tensor):
        values = eigenvalues.detach().cpu().double().numpy()
    else:
        try:
            values = np.asarray(eigenvalues, dtype=np.float64)
        except (TypeError, ValueError):
            raise fail("eigenvalues", "a 1-D array of numbers", type(eigenvalues).__name__) from None
    if values.ndim != 1 or values.size == 0:
        raise fail("eigenvalues", "a non-empty 1-D array", f"shape {values.shape}")
    if not np.isfinite(values).all():
        raise fail("eigenvalues", "finite (no NaN or Inf)", f"{int((~np.isfinite(values)).sum())} non-finite values")
    # Eigenvalues of a sample covariance may come out a rounding error below zero.
    tolerance = 1e-9 * max(float(np.abs(values).max()), 1e-300)
    if float(values.min()) < -tolerance:
        raise fail("eigenvalues", "non-negative (a covariance's eigenvalues)", f"minimum {float(values.min())!r}")
    return np.clip(values, 0.0, None)


def water_filling_distortion(eigenvalues: Any, bits_per_vector: float) -> float:
    """Mean squared error per dimension of the reverse water-filling bound.

    Args:
        eigenvalues: ``[d]`` eigenvalues of the source's covariance (numpy,
            torch or a sequence; a tiny negative rounding error is taken as 0).
        bits_per_vector: rate ``R >= 0`` in bits for the whole ``d``-vector.

    Returns:
        ``D / d`` with ``D = sum_i min(theta, lambda_i)`` (Cover & Thomas 2006,
        Thm 10.3.3); equal eigenvalues ``s2`` give ``s2 * 2 ** (-2 R / d)``.
        Components with ``lambda_i <= theta`` get no bits and cost their whole
        variance; zero eigenvalues cost nothing.

    Solved in closed form: with the ``k`` largest eigenvalues active,
    ``log2 theta = (sum_{i<=k} log2 lambda_i - 2 R) / k``; the right ``k`` is
    the largest for which ``theta`` stays below the ``k``-th eigenvalue.

    >>> water_filling_distortion([1.0, 1.0], 2.0)   # 1 bit per dimension: 2^-2
    0.25
    >>> water_filling_distortion([4.0, 1.0], 1.0)   # theta = 4 * 2^-2 = 1: the small one gets nothing
    1.0
    """
    values = _as_eigenvalues(eigenvalues)
    if isinstance(bits_per_vector, bool) or not isinstance(bits_per_vector, (int, float)):
        raise fail("bits_per_vector", "a number", f"{bits_per_vector!r} ({type(bits_per_vector).__name__})")
    rate = float(bits_per_vector)
    if not (rate >= 0.0 and math.isfinite(rate)):
        raise fail("bits_per_vector", "a finite number >= 0", rate)
    d = values.size
    positive = np.sort(values[values > 0.0])[::-1]
    if positive.size == 0 or rate == 0.0:
        return float(values.sum() / d)
    logs = np.log2(positive)
    cum = np.cumsum(logs)
    log_theta = None
    for k in range(positive.size, 0, -1):
        candidate = (cum[k - 1] - 2.0 * rate) / k
        if candidate <= logs[k - 1]:  # theta at most the smallest active eigenvalue
            log_theta = candidate
            break
    assert log_theta is not None  # k = 1 always qualifies when rate > 0
    theta = 2.0**log_theta
    return float(np.minimum(theta, values).sum() / d)


@dataclass(frozen=True)
class AuditRow:
    """One stage count of :func:`rate_distortion_audit`.

    Attributes:
        stages: stages used (the first ``stages`` codebooks).
        bits_per_vector: fixed-length bits per vector at that stage count.
        mse: achieved mean squared error per dimension on the data.
        bound_mse: reverse water-filling bound per dimension at that rate.
        gap_db: ``10 log10(mse / bound_mse)``: how far above the bound (0 = on it).
    """

    stages: int
    bits_per_vector: float
    mse: float
    bound_mse: float
    gap_db: float


def covariance_eigenvalues(data: torch.Tensor, chunk: int = 65536) -> torch.Tensor:
    """Eigenvalues ``[dim]`` (float64, descending) of the covariance of ``data`` ``[N, dim]``.

    Accumulated in float64 over row blocks of ``chunk`` (bounded memory); the
    covariance divides by ``N`` (the data is the whole source).
    """
    n, dim = data.shape
    total = torch.zeros(dim, dtype=torch.float64)
    outer = torch.zeros(dim, dim, dtype=torch.float64)
    for start in range(0, n, chunk):
        block = data[start : start + chunk].detach().to("cpu", torch.float64)
        total += block.sum(0)
        outer += block.T @ block
    mean = total / n
    cov = outer / n - torch.outer(mean, mean)
    return torch.linalg.eigvalsh((cov + cov.T) / 2).flip(0)


@torch.no_grad()
def rate_distortion_audit(
    quantizer: MultiStageQuantizer,
    data: torch.Tensor,
    *,
    beam: int = 1,
    stage_counts: Sequence[int] | None = None,
    chunk: int = 65536,
) -> list[AuditRow]:
    """Achieved MSE of ``quantizer`` on ``data`` beside the Gaussian bound, per stage count.

    Args:
        quantizer: a :class:`~rvqlayer.MultiStageQuantizer` (its encoder is used
            as it is; nothing is changed).
        data: ``[N, dim]`` vectors (``dim`` the quantizer's input size).
        beam: beam width of the encoding (1 = greedy).
        stage_counts: stage counts to report (default ``1..stages``).
        chunk: rows encoded at a time.

    The bound at ``b`` bits per vector is :func:`water_filling_distortion` of
    the eigenvalues of the data's covariance: what a Gaussian source with the
    same covariance allows (Cover & Thomas 2006, Thm 10.3.3). The mean of the
    data costs no bits there, so a quantizer pays for it only through its
    first stage.
    """
    if not isinstance(data, torch.Tensor):
        raise fail("data", "a floating-point torch.Tensor", type(data).__name__)
    if not data.is_floating_point():
        raise fail("data", "a floating-point torch.Tensor", f"dtype {data.dtype}")
    if data.ndim != 2 or data.shape[1] != quantizer.dim or data.shape[0] == 0:
        raise fail("data", f"of shape [N, {quantizer.dim}] with N >= 1", f"shape {tuple(data.shape)}")
    if not bool(torch.isfinite(data).all()):
        raise fail("data", "finite (no NaN or Inf)", f"{int((~torch.isfinite(data)).sum())} non-finite values")
    check_int("beam", beam, 1)
    check_int("chunk", chunk, 1)
    counts = list(range(1, quantizer.stages + 1)) if stage_counts is None else list(stage_counts)
    for k in counts:
        check_int("stage_counts", k, 1, quantizer.stages)
    eigenvalues = covariance_eigenvalues(data, chunk)
    # Greedy codes of k stages are the first k of more stages; beam codes are searched for each count.
    was_training = quantizer.training
    quantizer.eval()
    try:
        squared = {k: 0.0 for k in counts}
        top = max(counts)
        for start in range(0, data.shape[0], chunk):
            block = data[start : start + chunk]
            if beam == 1:
                codes = quantizer.encode(_rows_to_axis(block, quantizer.axis), stages=top)
            for k in counts:
                if beam > 1:
                    codes = quantizer.encode(_rows_to_axis(block, quantizer.axis), stages=k, beam=beam)
                x_hat = quantizer.decode(codes[..., :k])
                diff = _axis_to_rows(x_hat, quantizer.axis).double() - block.double()
                squared[k] += float((diff * diff).sum())
    finally:
        quantizer.train(was_training)
    rows = []
    n_values = data.shape[0] * data.shape[1]
    for k in counts:
        bits = quantizer.bits_per_vector(stages=k)
        mse = squared[k] / n_values
        bound = water_filling_distortion(eigenvalues, bits)
        gap = 10.0 * math.log10(max(mse, 1e-300) / max(bound, 1e-300))
        rows.append(AuditRow(stages=k, bits_per_vector=bits, mse=mse, bound_mse=bound, gap_db=gap))
    return rows


def audit_table(rows: Sequence[AuditRow]) -> str:
    """The audit as a fixed-width text table (one line per stage count)."""
    lines = [f"{'stages':>6} {'bits':>7} {'MSE/dim':>11} {'bound MSE/dim':>13} {'gap dB':>7}"]
    for r in rows:
        lines.append(f"{r.stages:>6} {r.bits_per_vector:>7.1f} {r.mse:>11.4g} {r.bound_mse:>13.4g} {r.gap_db:>7.2f}")
    return "\n".join(lines)


def _rows_to_axis(rows: torch.Tensor, axis: int) -> torch.Tensor:
    """``[N, dim]`` rows shaped for a layer whose feature axis is ``axis`` (singleton axes added)."""
    n, dim = rows.shape
    if axis == 0:
        return rows.T
    if axis > 0:
        return rows.reshape(n, *([1] * (axis - 1)), dim)
    return rows.reshape(n, dim, *([1] * (-axis - 1)))


def _axis_to_rows(x: torch.Tensor, axis: int) -> torch.Tensor:
    return x.movedim(axis, -1).reshape(-1, x.shape[axis])
