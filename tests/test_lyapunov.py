"""Largest Lyapunov exponent against a published value and exact linear cases."""

from __future__ import annotations

import pytest
import torch

from mnemode.lyapunov import largest_lyapunov_exponent
from mnemode.solvers import RK4
from mnemode.systems import Lorenz63Field


class Linear(torch.nn.Module):
    """dz/dt = A z."""

    def __init__(self, a):
        super().__init__()
        self.a = torch.as_tensor(a, dtype=torch.float64)

    def forward(self, t, z):
        return z @ self.a.to(z.dtype).T


@pytest.mark.parametrize("growth", [0.3, -0.2])
def test_linear_system_exponent_is_largest_real_part(growth):
    # For dz/dt = A z every separation obeys the same linear equation, and the largest
    # Lyapunov exponent is the largest real part of A's eigenvalues (textbook; e.g.
    # Ott, *Chaos in Dynamical Systems*, §4.4). Here A has eigenvalues growth ± 2i and −1:
    # the rotation leaves the norm's growth exactly e^{growth·t} once the −1 direction has
    # decayed during the transient.
    a = [[growth, -2.0, 0.0], [2.0, growth, 0.0], [0.0, 0.0, -1.0]]
    z0 = torch.zeros(4, 3, dtype=torch.float64)  # the separation dynamics do not depend on z
    lam = largest_lyapunov_exponent(Linear(a), z0, duration=20.0, transient=20.0, seed=1)
    assert abs(lam - growth) < 1e-6


@pytest.mark.parametrize("dtype, duration, tolerance", [
    (torch.float64, 60.0, 0.03),
    # float32: the separation is raised to ≈ 1e-4 of the state's size and rounding adds
    # noise, so a shorter run with a looser tolerance.
    (torch.float32, 40.0, 0.05),
])
def test_lorenz63_largest_exponent(dtype, duration, tolerance):
    # Largest Lyapunov exponent of Lorenz-63 at σ=10, ρ=28, β=8/3: 0.9056
    # (Sprott, *Chaos and Time-Series Analysis*, 2003). 64 starting states × 60 time units
    # with mnemode's RK4: the spread over seeds was ≈ 1 % when measured.
    gen = torch.Generator().manual_seed(11)
    z0 = torch.tensor([0.0, 0.0, 25.0], dtype=dtype) + 8 * torch.randn(64, 3, generator=gen, dtype=dtype)
    lam = largest_lyapunov_exponent(Lorenz63Field(), z0, duration=duration, transient=5.0,
                                    solver=RK4(0.01), seed=2)
    assert abs(lam / 0.9056 - 1) < tolerance, lam
