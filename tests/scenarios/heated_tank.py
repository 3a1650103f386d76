"""A heated, stirred tank with a slow wall: a scenario with forcing and memory for loader tests.

Observed: liquid level ``h`` and temperature ``T``. Forcing: inflow ``q(t)`` and heater
power ``P(t)``. Unobserved: the wall temperature ``W``, which stores heat and
returns it slowly. With area ``A``, outflow coefficient ``k``, inflow temperature
``T_in``, liquid-wall time ``τ_l`` and wall time ``τ_w``::

    dh/dt = (q − k √h) / A
    dT/dt = q (T_in − T) / (A h) + P / (A h) − (T − W) / τ_l
    dW/dt = (T − W) / τ_w − (W − T_a) / τ_a

The modeller's nominal model leaves the wall out and takes the liquid's loss to
the room (``W = T_a``): the missing term ``(W − T_a)/τ_l`` depends on the history
of ``T`` through the wall, a memory effect driven by the forcing.
"""

import math

import numpy as np
import torch
from torch import nn

AREA, OUTFLOW, T_IN, T_ROOM, TAU_L, TAU_W, TAU_A = 1.0, 0.5, 15.0, 20.0, 2.0, 8.0, 20.0


class NominalTank(nn.Module):
    """The modeller's model: state (h, T), forcing u = (q, P); the wall is taken at room temperature."""

    def forward(self, t, x, u=None):
        h, temp = x[..., 0].clamp_min(1e-3), x[..., 1]
        q = u[..., 0] if u is not None else torch.ones_like(h)
        p = u[..., 1] if u is not None else torch.zeros_like(h)
        dh = (q - OUTFLOW * torch.sqrt(h)) / AREA
        dT = q * (T_IN - temp) / (AREA * h) + p / (AREA * h) - (temp - T_ROOM) / TAU_L
        return torch.stack((dh, dT), dim=-1)


def drive(t, phase):
    """Inflow and heater power at time ``t`` (array) for a trajectory with ``phase``."""
    q = 1.0 + 0.4 * np.sin(0.31 * t + phase)
    p = 30.0 + 25.0 * np.sin(0.17 * t + 2.0 * phase) + 10.0 * np.sign(np.sin(0.05 * t + phase))
    return np.stack((q, p), axis=-1)


def simulate(t0, n, dt, phase, state0=(4.0, 30.0, 25.0), substeps=10):
    """Truth samples at ``t0 + i·dt`` (``i < n``): returns times, observed (n, 2), forcing (n, 2)."""
    z = np.array(state0, dtype=np.float64)

    def f(t, z):
        q, p = drive(np.array(t), phase)
        h, temp, wall = max(z[0], 1e-3), z[1], z[2]
        return np.array([(q - OUTFLOW * math.sqrt(h)) / AREA,
                         q * (T_IN - temp) / (AREA * h) + p / (AREA * h) - (temp - wall) / TAU_L,
                         (temp - wall) / TAU_W - (wall - T_ROOM) / TAU_A])

    # settle the slow wall before sampling
    t = t0 - 40.0
    h = dt / substeps
    out = []
    while t < t0 - 1e-12:
        z = _rk4(f, t, z, h)
        t += h
    for i in range(n):
        out.append(z.copy())
        for _ in range(substeps):
            z = _rk4(f, t, z, h)
            t += h
    times = t0 + dt * np.arange(n)
    states = np.array(out)
    return times, states[:, :2], drive(times, phase)


def _rk4(f, t, z, h):
    k1 = f(t, z)
    k2 = f(t + h / 2, z + h / 2 * k1)
    k3 = f(t + h / 2, z + h / 2 * k2)
    k4 = f(t + h, z + h * k3)
    return z + h / 6 * (k1 + 2 * k2 + 2 * k3 + k4)
