"""A user's own forced physics for the exported-simulator tests: a slab heated by a load u(t).

Observed: the front and back face temperatures (T1, T2, in K above ambient). The
slab's core (θ) warms and cools slowly and feeds heat back into the front face;
the modeller's physics leaves that coupling out:

    truth:    dT1/dt = −k (T1 − T2) − h T1 + q u(t) + g (θ − T1)
              dT2/dt =  k (T1 − T2) − h T2
              dθ/dt  = (T1 − θ) / τ                       (unobserved, slow: τ = 5 s)
    nominal:  the same without g (θ − T1), and without θ.
"""

import torch
from torch import nn

K, H, Q, G, TAU = 0.6, 0.15, 1.0, 0.4, 5.0


def heat_load(t):
    """The load the rig applied: ``1 + 0.5 sin(0.7 t) + 0.3 sin(1.9 t + 1)`` (W, scaled)."""
    t = torch.as_tensor(t, dtype=torch.float64)
    return 1.0 + 0.5 * torch.sin(0.7 * t) + 0.3 * torch.sin(1.9 * t + 1.0)


class NominalSlab(nn.Module):
    """The modeller's trusted physics: conduction, losses and the heat load, no core."""

    def __init__(self, k: float = K, h: float = H, q: float = Q):
        super().__init__()
        self.k, self.h, self.q = float(k), float(h), float(q)

    def forward(self, t, x, u=None):
        t1, t2 = x[..., 0], x[..., 1]
        load = 0.0 if u is None else self.q * u[..., 0]
        return torch.stack((-self.k * (t1 - t2) - self.h * t1 + load, self.k * (t1 - t2) - self.h * t2), dim=-1)


class TrueSlab(nn.Module):
    """The real slab (state T1, T2, θ) driven by :func:`heat_load` on its own clock."""

    dim = 3

    def __init__(self):
        super().__init__()
        self.nominal = NominalSlab()

    def forward(self, t, z, u=None):
        x, theta = z[..., :2], z[..., 2]
        d = self.nominal(t, x, heat_load(t).to(z.dtype).reshape(1).expand(*x.shape[:-1], 1))
        d1 = d[..., 0] + G * (theta - x[..., 0])
        return torch.stack((d1, d[..., 1], (x[..., 0] - theta) / TAU), dim=-1)

