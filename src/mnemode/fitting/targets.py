"""Regression targets for memoryless closures: what the nominal physics misses, sample by sample.

Derivative targets (observations dense enough for finite differences)::

    input  x_n (and u_n),      target  ẋ̂_n − f0(x_n, u_n)

with ``ẋ̂`` from :func:`mnemode.data.finite_difference`.

Flow-map targets (any sampling interval Δt), *discrete* form, for
``x_{n+1} = Ψ0(x_n) + Δt·m(x_n)`` (:class:`~mnemode.hybrid.HybridFlowMap`)::

    input  x_n (and u_n),      target  (x_{n+1} − Ψ0(x_n)) / Δt

Read as a vector-field correction this target is biased by O(Δt): to first order
in ``m``, ``x_{n+1} − Ψ0(x_n) = ∫_0^Δt Φ0(Δt, s) m(x(s)) ds`` where ``Φ0`` is the
tangent propagator of ``f0``. (tests/test_regression_fits.py measures the bias on
Lorenz-63 with ρ 5 % low at several Δt.) The
*continuous* form removes that bias to second order with the midpoint rule::

    x_mid  = ½ (Ψ0^{Δt/2}(x_n) + Ψ0^{−Δt/2}(x_{n+1}))     (half steps forward and backward)
    input  x_mid (and ½(u_n + u_{n+1})),
    target Φ0(Δt, Δt/2)⁻¹ (x_{n+1} − Ψ0(x_n)) / Δt        (Φ0 = Jacobian of the last half step at x_mid)

(its remaining bias grows quickly with Δt — measured in the same tests — so it is
meant for fine sampling; at coarse sampling fit the discrete form with a flow-map
model, or read the equivalent vector-field term with ``mnemode correction``). It is what :class:`~mnemode.hybrid.HybridField` models need.

Forcing (``ts.forcing`` not ``None``): ``u`` is passed to ``f0`` as its third
argument (linear in time between samples inside an interval) and appended to the
closure inputs, so closures then take ``forcing_dim = n_forcing`` extra inputs,
ordered ``[x, u]``.

Time: ``f0`` is evaluated at each sample's true time
(:meth:`~mnemode.data.TrajectorySet.absolute_times`, i.e. ``times`` plus each
trajectory's ``start_times``), as a float when all trajectories share it, else as
a ``(B, 1)`` / ``(N, 1)`` tensor (:func:`mnemode.hybrid.physics_time`); flow-map
targets do so when asked (``true_time``: the continuous model's targets), while a
discrete model's Ψ0 is autonomous.

All results are float64 tensors ``(N, ·)`` with ``N`` = usable samples × trajectories.
"""

from __future__ import annotations

import numpy as np
import torch
from torch import nn

from ..data import TrajectorySet, finite_difference
from ..errors import ConfigError, DataError
from ..hybrid import physics_time, reads_time
from ..solvers import FlowMap

__all__ = ["derivative_targets", "flow_map_targets"]


def _call(physics, t, x, u):
    if physics is None:
        return torch.zeros_like(x)
    return physics(t, x) if u is None else physics(t, x, u)


def _flatten(a: np.ndarray | torch.Tensor) -> torch.Tensor:
    a = torch.as_tensor(a, dtype=torch.float64)
    return a.reshape(-1, a.shape[-1])


def _check_finite(name: str, *arrays: torch.Tensor) -> None:
    for a in arrays:
        if not bool(torch.isfinite(a).all()):
            raise DataError(name, "contain non-finite values (the physics overflowed or the data hold gaps)",
                            "validate the data and check the nominal model on the observed range.")


def derivative_targets(ts: TrajectorySet, physics: nn.Module | None, scheme: str = "central4"):
    """Inputs and targets ``ẋ̂ − f0(x[, u])`` from finite differences of ``ts``.

    Args:
        ts: evenly sampled trajectories ``(T, B, D)``.
        physics: nominal field ``f0(t, x[, u])`` (called once per sample time, batched
            over trajectories, in float64, at the samples' true times: a float, or a
            ``(B, 1)`` tensor when the trajectories started at different times), or
            ``None`` for a data-only model (``f0 = 0``).
        scheme: a :data:`mnemode.data.FD_SCHEMES` name.

    Returns:
        ``(inputs, targets)``: ``(N, D + U)`` states with forcing appended, and ``(N, D)``.

    Raises:
        DataError: uneven sampling, too few samples, non-finite results.
        ValueError: an unknown scheme (from :func:`mnemode.data.finite_difference`).
    """
    dt = ts.dt
    index, deriv = finite_difference(ts.states, dt, scheme)
    x = torch.as_tensor(ts.states[index], dtype=torch.float64)
    u = None if ts.forcing is None else torch.as_tensor(ts.forcing[index], dtype=torch.float64)
    # the true clock only for physics that may read it (one float per sample otherwise)
    clock = ts.absolute_times() if reads_time(physics) else None
    with torch.no_grad():
        f0 = torch.stack([_call(physics, float(ts.times[i]) if clock is None
                                else physics_time(clock[i], (ts.n_trajectories,)), x[j],
                                None if u is None else u[j]) for j, i in enumerate(index)])
    targets = torch.as_tensor(deriv, dtype=torch.float64) - f0
    inputs = x if u is None else torch.cat((x, u), dim=-1)
    inputs, targets = _flatten(inputs), _flatten(targets)
    _check_finite("derivative targets", inputs, targets)
    return inputs, targets


class _Forced(nn.Module):
    """``σ·f0(o + t_a + σ·s, z, u(t_a + σ·s))`` with ``u`` linear from ``u_0`` at 0 to ``u_1`` at ``dt``.

    ``σ = −1`` runs the field backwards in time (for half steps from ``x_{n+1}``);
    ``o`` is each pair's true start time (``None``: the physics' clock starts at 0).
    """

    def __init__(self, physics, u0, u1, dt: float, t_a: float, sign: float, origin=None):
        super().__init__()
        self.physics, self.u0, self.u1, self.origin = physics, u0, u1, origin
        self.dt, self.t_a, self.sign = float(dt), float(t_a), float(sign)

    def forward(self, s, z):
        t = self.t_a + self.sign * s
        u = None if self.u0 is None else self.u0 + (t / self.dt) * (self.u1 - self.u0)
        return self.sign * _call(self.physics, t if self.origin is None else self.origin + t, z, u)


def flow_map_targets(ts: TrajectorySet, flow_map: FlowMap | None, continuous: bool = False, true_time: bool = False):
    """Inputs and targets ``(x_{n+1} − Ψ0(x_n)) / Δt`` from consecutive samples of ``ts``.

    Args:
        ts: evenly sampled trajectories ``(T, B, D)``.
        flow_map: Ψ0 over ``ts.dt`` — a :class:`~mnemode.solvers.FlowMap` of the nominal
            field (its field and solver are reused for forcing and for the continuous
            form), any callable ``x ↦ Ψ0(x)`` (discrete form without forcing only), or
            ``None`` for a data-only model (Ψ0 = identity, f0 = 0).
        continuous: return the midpoint-corrected targets for a vector-field closure
            (module docstring) instead of the discrete ones.
        true_time: integrate ``f0`` at each pair's true time (``absolute_times``)
            instead of from ``t = 0`` over every interval: the targets of a
            continuous model, whose physics may depend on ``t`` (ignored for a
            field declared ``autonomous``). Leave it off for a discrete model (its
            Ψ0 is autonomous).

    Returns:
        ``(inputs, targets)``: ``(N, D + U)`` and ``(N, D)``, ``N = (T − 1)·B``.

    Raises:
        ConfigError: a flow map over another interval than ``ts.dt``, or a plain
            callable where the field is needed (forcing, continuous form).
        DataError: uneven sampling or non-finite results.
    """
    dt = ts.dt
    is_map = isinstance(flow_map, FlowMap)
    if is_map and abs(flow_map.dt - dt) > 1e-9 * max(1.0, dt):
        raise ConfigError("flow map Ψ0", f"integrates over {flow_map.dt} but the data are sampled every {dt}",
                          "build Ψ0 with the data's sampling interval.")
    # the clock does not matter without physics or for a field declared autonomous
    true_time = true_time and flow_map is not None and (not is_map or reads_time(flow_map.field))
    needs_field = ts.forcing is not None or continuous or true_time
    if flow_map is not None and not is_map and needs_field:
        raise ConfigError("flow map Ψ0", "is a plain callable, but forcing inputs, continuous targets or true "
                          "times need the nominal field", "pass a mnemode.solvers.FlowMap of the nominal field.")
    states = torch.as_tensor(ts.states, dtype=torch.float64)
    x0, x1 = _flatten(states[:-1]), _flatten(states[1:])
    u0 = u1 = None
    if ts.forcing is not None:
        forcing = torch.as_tensor(ts.forcing, dtype=torch.float64)
        u0, u1 = _flatten(forcing[:-1]), _flatten(forcing[1:])
    physics = flow_map.field if is_map else None
    origin = None
    if true_time:
        origin = physics_time(ts.absolute_times()[:-1].reshape(-1), (x0.shape[0],))
    with torch.no_grad():
        if flow_map is None:
            base = x0
        elif not needs_field:
            base = flow_map(x0)
        else:
            base = flow_map.solver.advance(_Forced(physics, u0, u1, dt, 0.0, 1.0, origin), 0.0, x0, dt)
        residual = (x1 - base) / dt
    if not continuous:
        inputs = x0 if u0 is None else torch.cat((x0, u0), dim=-1)
        _check_finite("flow-map targets", inputs, residual)
        return inputs, residual
    targets, x_mid = _midpoint_correct(physics, flow_map, x0, x1, u0, u1, dt, residual, origin)
    inputs = x_mid if u0 is None else torch.cat((x_mid, 0.5 * (u0 + u1)), dim=-1)
    _check_finite("flow-map targets", inputs, targets)
    return inputs, targets


def _midpoint_correct(physics, flow_map, x0, x1, u0, u1, dt, residual, origin=None):
    """Continuous-form targets and midpoint inputs (see the module docstring)."""
    if physics is None:  # f0 = 0: Φ0 = I, the midpoint is the chord's middle
        return residual, 0.5 * (x0 + x1)
    solver, h = flow_map.solver, 0.5 * dt
    with torch.no_grad():
        forward = solver.advance(_Forced(physics, u0, u1, dt, 0.0, 1.0, origin), 0.0, x0, h)
        backward = solver.advance(_Forced(physics, u0, u1, dt, dt, -1.0, origin), 0.0, x1, h)
    x_mid = 0.5 * (forward + backward)
    # Φ0(Δt, Δt/2) at x_mid, row by row with reverse-mode autograd (the map acts on each pair
    # separately, so the gradient of the sum of output i over pairs is row i of every Jacobian).
    with torch.enable_grad():
        z = x_mid.detach().requires_grad_(True)
        end = solver.advance(_Forced(physics, u0, u1, dt, h, 1.0, origin), 0.0, z, h)
        rows = [torch.autograd.grad(end[:, i].sum(), z, retain_graph=i + 1 < end.shape[-1])[0]
                for i in range(end.shape[-1])]
    jac = torch.stack(rows, dim=-2)                                # (N, D, D)
    targets = torch.linalg.solve(jac, residual.unsqueeze(-1)).squeeze(-1)
    return targets.detach(), x_mid.detach()
