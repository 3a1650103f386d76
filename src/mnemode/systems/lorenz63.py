"""Lorenz-63 convection model (Lorenz 1963), with an optionally perturbed nominal model.

    dx/dt = σ (y − x)
    dy/dt = x (ρ − z) − y
    dz/dt = x y − β z

Published parameters σ = 10, ρ = 28, β = 8/3. The classic imperfect-model setting
keeps the truth at those values and perturbs one parameter in the nominal model
(e.g. ρ 5 % low); the missing term is then ``(ρ_true − ρ_nominal)·x`` in the
second equation. Largest Lyapunov exponent 0.9056 (Sprott, *Chaos and Time-Series
Analysis*, 2003).

Reference: E. N. Lorenz, "Deterministic nonperiodic flow", J. Atmos. Sci. 20 (1963).
"""

from __future__ import annotations

import torch

from .base import System, VectorField

__all__ = ["Lorenz63Field", "lorenz63"]

LORENZ63_LYAPUNOV = 0.9056  # Sprott (2003), largest exponent at σ=10, ρ=28, β=8/3


class Lorenz63Field(VectorField):
    """Right-hand side of Lorenz-63.

    Args:
        sigma: Prandtl number σ.
        rho: reduced Rayleigh number ρ.
        beta: geometric factor β.
    """

    autonomous = True

    dim = 3

    def __init__(self, sigma: float = 10.0, rho: float = 28.0, beta: float = 8.0 / 3.0):
        super().__init__()
        self.sigma, self.rho, self.beta = float(sigma), float(rho), float(beta)

    def forward(self, t, x, u=None):
        X, Y, Z = x[..., 0], x[..., 1], x[..., 2]
        return torch.stack(
            (self.sigma * (Y - X), X * (self.rho - Z) - Y, X * Y - self.beta * Z), dim=-1
        )

    def extra_repr(self) -> str:
        return f"sigma={self.sigma}, rho={self.rho}, beta={self.beta}"


def lorenz63(sigma: float = 10.0, rho: float = 28.0, beta: float = 8.0 / 3.0,
             nominal_sigma: float | None = None, nominal_rho: float | None = None,
             nominal_beta: float | None = None, spin_up: float = 20.0) -> System:
    """Lorenz-63 with truth parameters and (optionally perturbed) nominal parameters.

    Any ``nominal_*`` left ``None`` equals the truth value.
    """
    truth = Lorenz63Field(sigma, rho, beta)
    nominal = Lorenz63Field(
        sigma if nominal_sigma is None else nominal_sigma,
        rho if nominal_rho is None else nominal_rho,
        beta if nominal_beta is None else nominal_beta,
    )
    published = (sigma, rho, beta) == (10.0, 28.0, 8.0 / 3.0)
    return System(
        name="lorenz63",
        state_names=("x", "y", "z"),
        state_units=("1", "1", "1"),
        time_unit="dimensionless",
        nominal=nominal,
        truth=truth,
        observed_index=(0, 1, 2),
        lyapunov_exponent=LORENZ63_LYAPUNOV if published else None,
        spin_up=spin_up,
        initial_mean=(0.0, 0.0, 25.0),
        initial_scale=(8.0, 8.0, 8.0),
        description="Lorenz-63; nominal " + nominal.extra_repr() + "; truth " + truth.extra_repr(),
    )
