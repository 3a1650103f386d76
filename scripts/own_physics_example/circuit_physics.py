"""A user's own nominal physics, written as a modeller would write it for mnemode.

The scenario: an oscillator circuit (a van der Pol oscillator, the classic model of
a triode or tunnel-diode oscillator) whose load resistor heats up. The modeller's
trusted model is the textbook van der Pol equation in scaled units

    dv/dt = i
    di/dt = μ (1 − v²) i − v

with v the capacitor voltage and i the loop current. In the real circuit the
resistor warms with dissipated power and its extra resistance damps the current,
with a thermal lag: the missing term depends on the history of the current.
"""

import torch
from torch import nn


class VanDerPolCircuit(nn.Module):
    """Nominal model: state (v, i); μ is the nonlinearity (gain) parameter."""

    # The field does not read t: saying so keeps mnemode on its time-free path (no per-trajectory
    # clock in fitting, the one-input step program in the export). Leave it out if f0 uses t.
    autonomous = True

    def __init__(self, mu: float = 1.0):
        super().__init__()
        self.mu = float(mu)

    def forward(self, t, x, u=None):
        v, i = x[..., 0], x[..., 1]
        return torch.stack((i, self.mu * (1 - v**2) * i - v), dim=-1)


class CircuitWithHeatingResistor(nn.Module):
    """The real circuit used to make the example data: state (v, i, θ).

    θ is the resistor's temperature rise: dθ/dt = (a i² − θ)/τ_θ; it adds a damping
    −k θ i to di/dt. Only v and i are measured.
    """

    dim = 3

    def __init__(self, mu: float = 1.0, heating: float = 0.5, thermal_time: float = 3.0, k: float = 0.4):
        super().__init__()
        self.nominal = VanDerPolCircuit(mu)
        self.heating, self.thermal_time, self.k = float(heating), float(thermal_time), float(k)

    def forward(self, t, z, u=None):
        x, theta = z[..., :2], z[..., 2]
        d = self.nominal(t, x)
        i = x[..., 1]
        di = d[..., 1] - self.k * theta * i
        dtheta = (self.heating * i**2 - theta) / self.thermal_time
        return torch.stack((d[..., 0], di, dtheta), dim=-1)


class DrivenVanDerPolCircuit(VanDerPolCircuit):
    """Nominal model with a known drive voltage u(t) (a forcing input): di/dt gains + u."""

    def forward(self, t, x, u=None):
        d = super().forward(t, x)
        if u is None:
            return d
        return torch.stack((d[..., 0], d[..., 1] + u[..., 0]), dim=-1)


class DrivenCircuitWithHeatingResistor(CircuitWithHeatingResistor):
    """The real circuit driven by u(t) = amplitude·cos(ω t) (ω in rad per time unit)."""

    def __init__(self, amplitude: float = 0.8, omega: float = 1.3, **kwargs):
        super().__init__(**kwargs)
        self.amplitude, self.omega = float(amplitude), float(omega)

    def drive(self, t):
        return self.amplitude * torch.cos(self.omega * torch.as_tensor(t, dtype=torch.float64))

    def forward(self, t, z, u=None):
        d = super().forward(t, z)
        return torch.stack((d[..., 0], d[..., 1] + self.drive(t).to(z.dtype), d[..., 2]), dim=-1)
