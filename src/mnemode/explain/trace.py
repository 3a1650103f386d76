"""The learned correction traced along observed trajectories, hidden state included.

For a memoryless closure the correction at sample ``n`` is ``m(x_n[, u_n])``. For a
closure with memory the hidden state is first driven by the observations from the
start of each trajectory, exactly as a warm-up does (observed ``x`` replaces the
model's ``x``):

    continuous:  dr/dt = g(x_obs(t), r, u(t)),  x_obs and u linear between samples
    discrete:    r_{n+1} = cell(x_n, r_n)

and the correction is ``m(x_n, r_n[, u_n])``. Samples before ``warm_up`` time units
have a hidden state that has not yet forgotten its start and are left out of
scores by the callers.

``frozen`` replaces chosen inputs of the *hidden-state drive* by constants (their
training means): the readout still sees the true inputs, so the change in the
correction measures how much of it comes through that input's history.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch
from torch import nn

from ..closures.base import DiscreteRecurrent
from ..solvers import RK4, Solver

__all__ = ["Trace", "model_dtype", "trace_correction", "drive_hidden", "evaluate_correction"]


@dataclass
class Trace:
    """Observed inputs, hidden states and learned correction on the sample grid.

    Attributes:
        x: ``(T, B, D)`` observed states.
        u: ``(T, B, U)`` forcing or ``None``.
        r: ``(T, B, H)`` driven hidden states or ``None`` (memoryless).
        m: ``(T, B, D)`` learned correction.
        times: ``(T,)`` sample times.
    """

    x: torch.Tensor
    u: torch.Tensor | None
    r: torch.Tensor | None
    m: torch.Tensor
    times: np.ndarray


def model_dtype(model: nn.Module) -> torch.dtype:
    """The floating dtype of a model's tensors (float64 when it has none)."""
    for t in list(model.parameters()) + list(model.buffers()):
        if t.is_floating_point():
            return t.dtype
    return torch.float64


class _Drive(nn.Module):
    """``dr/dt = g(x(t), r, u(t))`` with ``x``, ``u`` linear over one interval."""

    def __init__(self, closure, x_a, x_b, u_a, u_b, t_a: float, dt: float):
        super().__init__()
        self.closure, self.x_a, self.x_b, self.u_a, self.u_b = closure, x_a, x_b, u_a, u_b
        self.t_a, self.dt = float(t_a), float(dt)

    def forward(self, t, r):
        w = (t - self.t_a) / self.dt
        x = self.x_a + w * (self.x_b - self.x_a)
        u = None if self.u_a is None else self.u_a + w * (self.u_b - self.u_a)
        return self.closure.hidden_field(x, r, u)


def _frozen_inputs(x, u, frozen: dict[int, float] | None):
    """Copies of ``x``, ``u`` with the input columns in ``frozen`` (index into ``[x, u]``) held constant."""
    if not frozen:
        return x, u
    x = x.clone()
    u = None if u is None else u.clone()
    D = x.shape[-1]
    for j, value in frozen.items():
        if j < D:
            x[..., j] = value
        else:
            u[..., j - D] = value
    return x, u


def drive_hidden(model, x: torch.Tensor, u: torch.Tensor | None, dt: float, solver: Solver | None = None,
                 frozen: dict[int, float] | None = None) -> torch.Tensor | None:
    """Hidden states ``(T, B, H)`` of ``model``'s closure driven by observations ``x (T, B, D)``.

    Args:
        model: a HybridField or HybridFlowMap.
        x: observed states; ``u``: forcing ``(T, B, U)`` or ``None``.
        dt: sampling interval.
        solver: integrates a continuous hidden field (default RK4 with step Δt/2).
        frozen: inputs of the drive held constant, ``{input index: value}``.

    Returns:
        ``None`` for a memoryless closure.
    """
    closure = model.closure
    if closure is None or not closure.hidden_size:
        return None
    xd, ud = _frozen_inputs(x, u, frozen)
    solver = solver if solver is not None else RK4(dt / 2)
    r = closure.initial_hidden(x.shape[1:-1], x.dtype)
    out = [r]
    with torch.no_grad():
        for n in range(x.shape[0] - 1):
            if isinstance(closure, DiscreteRecurrent):
                r = closure.hidden_field(xd[n], r, None if ud is None else ud[n]) if closure.forcing_dim \
                    else closure.hidden_field(xd[n], r)
            else:
                drive = _Drive(closure, xd[n], xd[n + 1], None if ud is None else ud[n],
                               None if ud is None else ud[n + 1], n * dt, dt)
                r = solver.advance(drive, n * dt, r, dt)
            out.append(r)
    return torch.stack(out)


def evaluate_correction(closure, x: torch.Tensor, r: torch.Tensor | None, u: torch.Tensor | None,
                        chunk: int = 16384) -> torch.Tensor:
    """``closure.correction(x, r, u)`` on rows of any leading shape, without gradients, in chunks."""
    lead = x.shape[:-1]
    xf = x.reshape(-1, x.shape[-1])
    rf = None if r is None else r.reshape(-1, r.shape[-1])
    uf = None if u is None else u.reshape(-1, u.shape[-1])
    out = []
    with torch.no_grad():
        for s in range(0, xf.shape[0], chunk):
            sl = slice(s, s + chunk)
            out.append(closure.correction(xf[sl], None if rf is None else rf[sl],
                                          None if uf is None or not closure.forcing_dim else uf[sl]))
    return torch.cat(out).reshape(*lead, -1)


def trace_correction(model, ts, solver: Solver | None = None, frozen: dict[int, float] | None = None) -> Trace:
    """The learned correction of ``model`` along the trajectories of ``ts`` (module docstring)."""
    dtype = model_dtype(model)
    x = torch.as_tensor(ts.states, dtype=dtype)
    u = None if ts.forcing is None else torch.as_tensor(ts.forcing, dtype=dtype)
    r = drive_hidden(model, x, u, ts.dt, solver, frozen)
    m = evaluate_correction(model.closure, x, r, u)
    return Trace(x, u, r, m, np.asarray(ts.times, dtype=np.float64))
