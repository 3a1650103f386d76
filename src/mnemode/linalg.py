"""Linear algebra shared by closures and fitters: ridge regression in closed form."""

from __future__ import annotations

import torch

__all__ = ["ridge_solve", "ridge_solve_normal"]


def ridge_solve(features: torch.Tensor, targets: torch.Tensor, alpha: float,
                penalise_last: bool = True) -> torch.Tensor:
    """Weights ``W`` minimising ``‖Φ W − Y‖² + α ‖W‖²``.

    Solves the normal equations ``(ΦᵀΦ + α I) W = ΦᵀY`` by Cholesky (float64
    inside, result in the features' dtype). With ``penalise_last=False`` the last
    column of ``Φ`` (a constant bias feature) is not penalised.

    Args:
        features: ``(N, p)`` design matrix Φ.
        targets: ``(N, q)`` targets Y.
        alpha: ridge penalty α ≥ 0.

    Returns:
        ``(p, q)`` weights.
    """
    phi = features.to(torch.float64)
    y = targets.to(torch.float64)
    return ridge_solve_normal(phi.T @ phi, phi.T @ y, alpha, penalise_last).to(features.dtype)


def ridge_solve_normal(gram: torch.Tensor, rhs: torch.Tensor, alpha: float, penalise_last: bool = True) -> torch.Tensor:
    """The ridge weights from the normal equations' parts ``ΦᵀΦ`` ``(p, p)`` and ``ΦᵀY`` ``(p, q)``.

    Lets a caller accumulate ``ΦᵀΦ`` and ``ΦᵀY`` over chunks of data instead of holding
    ``Φ`` whole. Solved by Cholesky in float64; a singular system (``alpha = 0`` and a
    rank-deficient ``Φ``) falls back to least squares. Returns float64 ``(p, q)``.
    """
    gram = gram.to(torch.float64)
    rhs = rhs.to(torch.float64)
    reg = torch.full((gram.shape[0],), float(alpha), dtype=torch.float64)
    if not penalise_last:
        reg[-1] = 0.0
    gram = gram + torch.diag(reg)
    chol, info = torch.linalg.cholesky_ex(gram)
    if int(info) == 0:
        return torch.cholesky_solve(rhs, chol)
    return torch.linalg.lstsq(gram, rhs).solution
