"""Largest Lyapunov exponent by the two-trajectory renormalisation method.

Benettin, Galgani, Giorgilli & Strelcyn, Meccanica 15 (1980): follow a reference
trajectory and a neighbour at distance ``d0``; every ``renorm_interval`` measure
the separation ``d``, accumulate ``ln(d/d0)`` and pull the neighbour back to
distance ``d0`` along the separation. The exponent is the accumulated sum over
the elapsed time, averaged over a batch of starting states.
"""

from __future__ import annotations

import torch

from .solvers import RK4, Solver

__all__ = ["largest_lyapunov_exponent"]


def largest_lyapunov_exponent(field, z0: torch.Tensor, *, duration: float = 200.0,
                              renorm_interval: float = 0.1, solver: Solver | None = None,
                              transient: float = 10.0, d0: float = 1e-8, seed: int = 0) -> float:
    """Estimate the largest Lyapunov exponent of ``field`` (mean over the batch of ``z0``).

    Args:
        field: vector field ``f(t, z)``.
        z0: ``(B, n)`` starting states (float64 recommended).
        duration: averaging time after the transient.
        renorm_interval: time between renormalisations.
        solver: defaults to RK4 with step 0.01.
        transient: time run first to settle onto the attractor and align the
            separation with the most unstable direction.
        d0: separation size (small enough to stay linear).
    """
    solver = solver or RK4(0.01)
    gen = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        z = solver.advance(field, 0.0, z0, transient) if transient > 0 else z0
        v = torch.randn(z.shape, generator=gen, dtype=z.dtype)
        v = v / v.norm(dim=-1, keepdim=True)
        w = z + d0 * v
        n = max(1, int(round(duration / renorm_interval)))
        total = torch.zeros(z.shape[:-1], dtype=z.dtype)
        for _ in range(n):
            z = solver.advance(field, 0.0, z, renorm_interval)
            w = solver.advance(field, 0.0, w, renorm_interval)
            sep = w - z
            d = sep.norm(dim=-1, keepdim=True)
            total = total + torch.log(d.squeeze(-1) / d0)
            w = z + sep * (d0 / d)
        return float((total / (n * renorm_interval)).mean())
