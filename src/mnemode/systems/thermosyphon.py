"""The demo scenario: a thermosyphon convection loop with a heat-storing wall.

A closed vertical loop of fluid heated from below and cooled from above. The
observed state x = (X, Y, Z) is the loop flow rate X and two modes of the fluid
temperature, Y (horizontal, drives the flow) and Z (vertical, departure from
conduction). The nominal model assumes an *ideal wall* that stores no heat:

    dX/dt = σ (Y − X)
    dY/dt = r X − X Z − Y
    dZ/dt = X Y − Z

The real wall has heat capacity. Its temperature modes P and Q (hidden,
unmeasured) relax towards the fluid's and return heat to it:

    dY/dt gains + P,          dP/dt = (Y / (1 + β) − P) / τ
    dZ/dt gains + Q,          dQ/dt = (Z / (1 + β) − Q) / τ

Parameters (defaults σ = 6, r = 50, β = 1):
    σ   loop Prandtl number (momentum over thermal diffusion in the loop);
    r   loop Rayleigh number (heating strength);
    β   ratio of outer to inner wall conductance;
    τ   wall thermal response time = wall heat capacity over total wall
        conductance, in units of the fluid–wall thermal relaxation time, which is
        the time unit of the model.

τ is the knob. For τ → 0 the wall follows the fluid instantly, P → Y/(1+β),
Q → Z/(1+β), and the missing term is a function of x (memoryless regime,
τ = 0.01). For larger τ the wall lags and the missing term depends on the
history of x (memory regime, τ = 1).

Measured while designing the scenario (scipy DOP853): the nominal model alone
stays valid (normalised error ≤ 0.5) for ≈ 0.23 time units; the truth's largest
Lyapunov exponent is ≈ 0.74 at τ = 0.01 and ≈ 0.55 at τ = 1. This scenario is
mnemode's own; it is not a published benchmark.
"""

from __future__ import annotations

import torch

from .base import System, VectorField

__all__ = ["IdealWallLoopField", "HeatStoringWallLoopField", "thermosyphon"]

# Largest Lyapunov exponents measured for the default σ, r, β (see module docstring).
_MEASURED_LYAPUNOV = {0.01: 0.74, 1.0: 0.55}


class _LinearPlusFlowProduct:
    """``f(z) = z L + X · (z Q)``: a field linear in the state ``z`` plus the flow rate ``X = z_0`` times a linear one.

    Both loop fields have this form (every product in them is ``X`` times
    another component), so one evaluation is one ``(n × 2n)`` matrix product, one
    multiplication and one addition — about half the time of the componentwise
    expressions on small batches, with the same values to rounding. The
    matrices are held in float64 and float32 (built once, never changed, so a
    traced or exported copy sees constants); other dtypes and devices convert
    them per call.
    """

    def __init__(self, linear, product):
        lq = torch.cat((torch.as_tensor(linear, dtype=torch.float64),
                        torch.as_tensor(product, dtype=torch.float64)), 1)
        self._n = lq.shape[0]
        self._by_dtype = {torch.float64: lq, torch.float32: lq.to(torch.float32)}

    def __call__(self, z: torch.Tensor) -> torch.Tensor:
        lq = self._by_dtype.get(z.dtype)
        if lq is None or lq.device != z.device:
            lq = self._by_dtype[torch.float64].to(dtype=z.dtype, device=z.device)
        y = z @ lq
        n = self._n
        return torch.addcmul(y[..., :n], z[..., :1], y[..., n:])


class IdealWallLoopField(VectorField):
    """Nominal loop model with an ideal (heat-free) wall: state (X, Y, Z).

    Args:
        prandtl: loop Prandtl number σ.
        rayleigh: loop Rayleigh number r.
    """

    autonomous = True
    dim = 3

    def __init__(self, prandtl: float = 6.0, rayleigh: float = 50.0):
        super().__init__()
        self.prandtl, self.rayleigh = float(prandtl), float(rayleigh)
        s, r = self.prandtl, self.rayleigh
        # columns: dX/dt, dY/dt, dZ/dt; rows: X, Y, Z.  Linear part, then the part multiplied by X
        self._field = _LinearPlusFlowProduct([[-s, r, 0.0], [s, -1.0, 0.0], [0.0, 0.0, -1.0]],
                                             [[0.0, 0.0, 0.0], [0.0, 0.0, 1.0], [0.0, -1.0, 0.0]])

    def forward(self, t, x, u=None):
        # (σ (Y − X),  r X − X Z − Y,  X Y − Z)
        return self._field(x)

    def extra_repr(self) -> str:
        return f"prandtl={self.prandtl}, rayleigh={self.rayleigh}"


class HeatStoringWallLoopField(VectorField):
    """Truth loop model with a heat-storing wall: state (X, Y, Z, P, Q).

    Args:
        prandtl: loop Prandtl number σ.
        rayleigh: loop Rayleigh number r.
        conductance_ratio: β, outer over inner wall conductance.
        wall_response_time: τ, wall heat capacity over total wall conductance.
    """

    autonomous = True
    dim = 5

    def __init__(self, prandtl: float = 6.0, rayleigh: float = 50.0,
                 conductance_ratio: float = 1.0, wall_response_time: float = 1.0):
        super().__init__()
        if wall_response_time <= 0:
            raise ValueError(f"wall_response_time τ must be > 0, got {wall_response_time}")
        self.fluid = IdealWallLoopField(prandtl, rayleigh)
        self.beta, self.tau = float(conductance_ratio), float(wall_response_time)
        s, r, g, k = self.fluid.prandtl, self.fluid.rayleigh, 1.0 / (1.0 + self.beta), 1.0 / self.tau
        # columns: dX, dY, dZ, dP, dQ; rows: X, Y, Z, P, Q.  Linear part, then the part multiplied by X
        self._field = _LinearPlusFlowProduct(
            [[-s, r, 0.0, 0.0, 0.0], [s, -1.0, 0.0, g * k, 0.0], [0.0, 0.0, -1.0, 0.0, g * k],
             [0.0, 1.0, 0.0, -k, 0.0], [0.0, 0.0, 1.0, 0.0, -k]],
            [[0.0] * 5, [0.0, 0.0, 1.0, 0.0, 0.0], [0.0, -1.0, 0.0, 0.0, 0.0], [0.0] * 5, [0.0] * 5])

    def forward(self, t, z, u=None):
        # the fluid's field plus (0, P, Q), and dP/dt = (g Y − P)/τ, dQ/dt = (g Z − Q)/τ, g = 1/(1 + β)
        return self._field(z)

    def extra_repr(self) -> str:
        return f"{self.fluid.extra_repr()}, conductance_ratio={self.beta}, wall_response_time={self.tau}"


def thermosyphon(prandtl: float = 6.0, rayleigh: float = 50.0, conductance_ratio: float = 1.0,
                 wall_response_time: float = 1.0, spin_up: float | None = None) -> System:
    """The demo system; ``spin_up`` defaults to max(50, 10 τ) time units."""
    truth = HeatStoringWallLoopField(prandtl, rayleigh, conductance_ratio, wall_response_time)
    nominal = IdealWallLoopField(prandtl, rayleigh)
    lyap = None
    if (prandtl, rayleigh, conductance_ratio) == (6.0, 50.0, 1.0):
        lyap = _MEASURED_LYAPUNOV.get(float(wall_response_time))
    g = 1.0 / (1.0 + conductance_ratio)
    return System(
        name="thermosyphon",
        state_names=("flow_rate", "temp_horizontal", "temp_vertical"),
        state_units=("scaled flow", "scaled K", "scaled K"),
        time_unit="fluid-wall thermal relaxation time",
        nominal=nominal,
        truth=truth,
        observed_index=(0, 1, 2),
        hidden_names=("wall_temp_horizontal", "wall_temp_vertical"),
        lyapunov_exponent=lyap,
        spin_up=max(50.0, 10.0 * wall_response_time) if spin_up is None else float(spin_up),
        initial_mean=(0.0, 0.0, 45.0, 0.0, 45.0 * g),
        initial_scale=(8.0, 8.0, 8.0, 4.0, 4.0),
        description="Thermosyphon loop with a heat-storing wall; " + truth.extra_repr(),
    )
