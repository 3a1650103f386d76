"""Discrete recurrent closure on the flow map, for observations too sparse for derivatives.

Acts inside :class:`mnemode.hybrid.HybridFlowMap` on the observation grid::

    x_{n+1} = Ψ0(x_n) + Δt · m(x_n, r_n)
    r_{n+1} = GRU(x̃_n, r_n)

with the gated recurrent unit (reset ``ρ``, update ``z``)::

    ρ = σ(W_ρ x̃ + U_ρ r + b_ρ),   z = σ(W_z x̃ + U_z r + b_z)
    n = tanh(W_n x̃ + b_n + ρ ⊙ (U_n r + c_n))
    r' = (1 − z) ⊙ n + z ⊙ r

and the readout ``m = out_offset + out_scale ⊙ (C r + D x̃ + c)`` (``'linear'``) or
``out_offset + out_scale ⊙ MLP([x̃, r])`` (``'mlp'``).

Reference: K. Cho et al., EMNLP 2014 (gated recurrent unit).
"""

from __future__ import annotations

import math

import torch
from torch import nn

from ..errors import ConfigError
from .base import DiscreteRecurrent, Scaling
from .recurrent import _INITIAL, _READOUTS, _MLP, _check_choice

__all__ = ["GRUFlowClosure"]


class GRUFlowClosure(DiscreteRecurrent):
    """Discrete recurrent closure ``(x_n, r_n) ↦ (m_n, r_{n+1})`` (module docstring).

    Args:
        dim: observed components corrected.
        hidden_size: size of the GRU state.
        readout: ``'linear'`` or ``'mlp'``.
        readout_width: hidden width of the MLP readout.
        initial_hidden: ``'zeros'``, ``'learned'`` or ``'warm_up'`` (as for
            :class:`~mnemode.closures.RecurrentClosure`).
        seed: seeds the initial weights.
    """

    def __init__(self, dim: int, hidden_size: int = 16, readout: str = "linear", readout_width: int = 32,
                 initial_hidden: str = "zeros", seed: int = 0, forcing_dim: int = 0, dtype=None):
        super().__init__(dim, 0, None, dtype)
        if int(forcing_dim) != 0:
            raise ConfigError("closure", f"GRUFlowClosure got forcing_dim={forcing_dim}; discrete closures take no "
                              "forcing inputs in this version", "use model=continuous for forced data.")
        _check_choice("readout", readout, _READOUTS)
        _check_choice("initial_hidden", initial_hidden, _INITIAL)
        if int(hidden_size) < 1:
            raise ConfigError("hidden_size", f"is {hidden_size}; a recurrent closure needs at least 1 hidden state",
                              "use a memoryless closure for hidden_size 0.")
        self.hidden_size, self.readout, self.readout_width = int(hidden_size), readout, int(readout_width)
        self.initial_hidden_mode, self.seed = initial_hidden, int(seed)
        self.scaling = Scaling(self.dim, self.dim, self.dtype)
        gen = torch.Generator().manual_seed(self.seed)
        dtype = self.dtype
        H = self.hidden_size
        self.cell = nn.utils.skip_init(nn.GRUCell, self.dim, H, dtype=dtype)
        with torch.no_grad():  # seeded re-initialisation, U(−1/√H, 1/√H) as torch's default
            for p in self.cell.parameters():
                p.copy_((torch.rand(p.shape, generator=gen, dtype=torch.float64) * 2 - 1) / math.sqrt(H))
        if readout == "linear":
            self.C = nn.Parameter((torch.randn((dim, H), generator=gen, dtype=torch.float64)
                                   * 0.1 / math.sqrt(H)).to(dtype))
            self.D = nn.Parameter(torch.zeros(dim, dim, dtype=dtype))
            self.c = nn.Parameter(torch.zeros(dim, dtype=dtype))
        else:
            self.mlp = _MLP(dim + H, self.readout_width, dim, gen).to(dtype)
        if initial_hidden == "learned":
            self.r0 = nn.Parameter(torch.zeros(H, dtype=dtype))

    def hidden_field(self, x, r, u=None):
        """The next hidden state ``r_{n+1} = GRU(x̃_n, r_n)`` (any leading batch shape)."""
        xt = self.scaling.inputs(x)
        lead = xt.shape[:-1]
        rr = r.expand(*lead, self.hidden_size)
        out = self.cell(xt.reshape(-1, self.dim), rr.reshape(-1, self.hidden_size))
        return out.reshape(*lead, self.hidden_size)

    def correction(self, x, r=None, u=None):
        if r is None:
            raise ConfigError(type(self).__name__, "needs its hidden state r, got None",
                              "simulate it inside a HybridFlowMap, which carries r.")
        xt = self.scaling.inputs(x)
        if self.readout == "linear":
            y = r @ self.C.T + xt @ self.D.T + self.c
        else:
            y = self.mlp(torch.cat((xt, r.expand(*xt.shape[:-1], self.hidden_size)), dim=-1))
        return self.scaling.outputs(y)

    def initial_hidden(self, batch_shape, dtype=torch.float32):
        if self.initial_hidden_mode == "learned":
            return self.r0.to(dtype).expand(*batch_shape, self.hidden_size)
        return super().initial_hidden(batch_shape, dtype)

    def extra_repr(self) -> str:
        return f"dim={self.dim}, hidden_size={self.hidden_size}, readout={self.readout!r}"
