"""Lorenz-96, single scale and two-scale (Lorenz 1996).

Single scale, K sites on a ring, forcing F:

    dX_k/dt = (X_{k+1} − X_{k−2}) X_{k−1} − X_k + F

Two-scale form (Lorenz 1996, eqs. 3.1–3.2): each slow X_k drives J fast Y_{j,k},
the Y forming one ring of K·J sites:

    dX_k/dt     = X_{k−1}(X_{k+1} − X_{k−2}) − X_k + F − (h c / b) Σ_j Y_{j,k}
    dY_{j,k}/dt = −c b Y_{j+1,k}(Y_{j+2,k} − Y_{j−1,k}) − c Y_{j,k} + (h c / b) X_k

h is the coupling strength, b the amplitude ratio and c the time-scale ratio of
fast to slow variables. Published set K=36, J=10, F=10, h=1, b=c=10. The nominal
model is the slow equation without the coupling term; the observed variables are
the X.

References: E. N. Lorenz, "Predictability — a problem partly solved", ECMWF
seminar (1996); E. N. Lorenz & K. A. Emanuel, J. Atmos. Sci. 55 (1998).
"""

from __future__ import annotations

import torch

from .base import System, VectorField

__all__ = ["Lorenz96Field", "Lorenz96TwoScaleField", "lorenz96", "lorenz96_two_scale"]


def _advection(x: torch.Tensor) -> torch.Tensor:
    """(X_{k+1} − X_{k−2}) X_{k−1} on a ring along the last dimension."""
    return (torch.roll(x, -1, -1) - torch.roll(x, 2, -1)) * torch.roll(x, 1, -1)


class Lorenz96Field(VectorField):
    """Single-scale Lorenz-96 right-hand side on a ring of ``k`` sites with constant forcing ``F``."""

    autonomous = True

    def __init__(self, k: int = 40, F: float = 8.0):
        super().__init__()
        if k < 4:
            raise ValueError(f"Lorenz-96 needs at least 4 sites on the ring, got k={k}")
        self.dim = int(k)
        self.F = float(F)

    def forward(self, t, x, u=None):
        return _advection(x) - x + self.F

    def extra_repr(self) -> str:
        return f"k={self.dim}, F={self.F}"


class Lorenz96TwoScaleField(VectorField):
    """Two-scale Lorenz-96 right-hand side; state is ``[X (k), Y (k·j)]``."""

    autonomous = True

    def __init__(self, k: int = 36, j: int = 10, F: float = 10.0,
                 coupling: float = 1.0, amplitude_ratio: float = 10.0, time_scale_ratio: float = 10.0):
        super().__init__()
        self.k, self.j = int(k), int(j)
        self.dim = self.k * (1 + self.j)
        self.F = float(F)
        self.h, self.b, self.c = float(coupling), float(amplitude_ratio), float(time_scale_ratio)

    def forward(self, t, x, u=None):
        X, Y = x[..., : self.k], x[..., self.k:]
        hcb = self.h * self.c / self.b
        coupling = Y.reshape(*Y.shape[:-1], self.k, self.j).sum(-1)
        dX = _advection(X) - X + self.F - hcb * coupling
        # Fast ring: −c b Y_{j+1}(Y_{j+2} − Y_{j−1}) − c Y_j + (hc/b) X_k
        Yp1 = torch.roll(Y, -1, -1)
        dY = (-self.c * self.b * Yp1 * (torch.roll(Y, -2, -1) - torch.roll(Y, 1, -1))
              - self.c * Y + hcb * torch.repeat_interleave(X, self.j, dim=-1))
        return torch.cat((dX, dY), dim=-1)

    def extra_repr(self) -> str:
        return f"k={self.k}, j={self.j}, F={self.F}, h={self.h}, b={self.b}, c={self.c}"


def lorenz96(k: int = 40, F: float = 8.0, nominal_F: float | None = None,
             spin_up: float = 20.0) -> System:
    """Single-scale Lorenz-96; the nominal model may use a different forcing."""
    truth = Lorenz96Field(k, F)
    nominal = Lorenz96Field(k, F if nominal_F is None else nominal_F)
    return System(
        name="lorenz96",
        state_names=tuple(f"X{i + 1}" for i in range(k)),
        state_units=("1",) * k,
        time_unit="dimensionless (1 unit ≈ 5 days, Lorenz 1996)",
        nominal=nominal,
        truth=truth,
        observed_index=tuple(range(k)),
        spin_up=spin_up,
        ring=True,
        initial_mean=(F,) * k,
        initial_scale=(1.0,) * k,
        description="Lorenz-96 single scale; " + truth.extra_repr(),
    )


def lorenz96_two_scale(k: int = 36, j: int = 10, F: float = 10.0, coupling: float = 1.0,
                       amplitude_ratio: float = 10.0, time_scale_ratio: float = 10.0,
                       spin_up: float = 10.0) -> System:
    """Two-scale Lorenz-96; observed = slow X, nominal = slow equations without coupling."""
    truth = Lorenz96TwoScaleField(k, j, F, coupling, amplitude_ratio, time_scale_ratio)
    nominal = Lorenz96Field(k, F)
    return System(
        name="lorenz96_two_scale",
        state_names=tuple(f"X{i + 1}" for i in range(k)),
        state_units=("1",) * k,
        time_unit="dimensionless (1 unit ≈ 5 days, Lorenz 1996)",
        nominal=nominal,
        truth=truth,
        observed_index=tuple(range(k)),
        hidden_names=tuple(f"Y{jj + 1},{kk + 1}" for kk in range(k) for jj in range(j)),
        spin_up=spin_up,
        ring=True,
        initial_mean=(0.0,) * (k * (1 + j)),
        initial_scale=(3.0,) * k + (0.3,) * (k * j),
        description="Lorenz-96 two-scale; " + truth.extra_repr(),
    )
