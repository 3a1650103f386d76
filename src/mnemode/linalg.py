"""Linear algebra shared by closures and fitters: ridge regression in closed form."""

from __future__ import annotations

import torch

__all__ = ["ridge_solve"]


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
    gram = phi.T @ phi
    reg = torch.full((phi.shape[1],), float(alpha), dtype=torch.float64)
    if not penalise_last:
        reg[-1] = 0.0
    gram = gram + torch.diag(reg)
    rhs = phi.T @ y
    chol, info = torch.linalg.cholesky_ex(gram)
    if int(info) == 0:
        w = torch.cholesky_solve(rhs, chol)
    else:  # singular (alpha = 0 and rank-deficient): least squares
        w = torch.linalg.lstsq(gram, rhs).solution
    return w.to(features.dtype)
