"""Physics plus closure: one augmented vector field, one corrected flow map, and their unrolls.

Continuous hybrid (state ``s = [x, r]``, ``r`` the closure's hidden memory)::

    dx/dt = f0(x, u) + m(x, r, u)
    dr/dt = g(x, r, u)

With no physics (``physics=None``) it is the data-only model; with no closure the
physics-only model. Discrete hybrid on the observation grid (``Δt``)::

    x_{n+1} = Ψ0(x_n) + Δt · m(x_n, r_n),     r_{n+1} = cell(x_n, r_n)

where Ψ0 integrates f0 accurately over one ``Δt``.

:func:`simulate` free-runs either kind from ``(x0, r0)``; :func:`warm_up` drives the
hidden state with observed ``x`` (the observations replace the model's ``x``) to
give the ``r0`` a forecast starts from. Trajectories are ``(time, batch, dim)``.

Time. Solvers run on a scalar clock (``t0 + i·Δt`` plus sub-steps); a nominal
field that depends on ``t`` (a daily cycle, a scheduled input) must see each
trajectory's *true* time instead. :func:`simulate` therefore takes a
``time_origin`` per trajectory and the physics is called at ``t + origin``: a
float when every trajectory shares one origin, else a ``(*batch, 1)`` tensor in
the state's dtype that broadcasts against ``x`` ``(*batch, dim)``
(:func:`physics_time`). Forcing keeps its own clock (the solver's ``t``).
Discrete models are autonomous: Ψ0 integrates ``f0`` over each ``Δt`` from
``t = 0``, so a time-dependent ``f0`` needs the continuous form.
"""

from __future__ import annotations

from typing import Callable

import torch
from torch import nn

from .closures.base import Closure, DiscreteRecurrent, Recurrent
from .errors import ConfigError
from .solvers import FlowMap, Solver

__all__ = ["HybridField", "AffineHybridField", "PreparedMemoryField", "PreparedMemorylessField", "HybridFlowMap",
           "Forcing", "Driven",
           "drive", "physics_time", "reads_time", "simulate", "warm_up"]


def reads_time(physics) -> bool:
    """Whether a nominal field may depend on ``t``: it exists and does not declare ``autonomous = True``."""
    return physics is not None and not getattr(physics, "autonomous", False)


def physics_time(values, batch_shape: tuple | None = None) -> float | torch.Tensor | None:
    """Times in the form a nominal field receives them: ``None``, a float, or a ``(*batch, 1)`` float64 tensor.

    ``values`` is ``None``, a number, or one time per trajectory (array or tensor
    of shape ``batch_shape``, or ``(*batch_shape, 1)``). Equal values collapse to
    one float, so sets whose trajectories share a clock keep the scalar path.

    Raises:
        ValueError: per-trajectory times whose shape does not match ``batch_shape``.
    """
    if values is None:
        return None
    if isinstance(values, (int, float)):
        return float(values)
    v = torch.as_tensor(values).detach().to(device="cpu", dtype=torch.float64)
    if v.numel() == 0:
        return None
    if v.numel() == 1 or bool((v == v.reshape(-1)[0]).all()):
        return float(v.reshape(-1)[0])
    if batch_shape is not None:
        batch_shape = tuple(batch_shape)
        if tuple(v.shape) == batch_shape + (1,):
            v = v[..., 0]
        if tuple(v.shape) != batch_shape:
            raise ValueError(f"time_origin has shape {tuple(v.shape)}, but the states have batch shape {batch_shape}; "
                             "give one time per trajectory (or one float for all)")
    return v.unsqueeze(-1)


class Forcing:
    """Piecewise-linear forcing ``u(t)`` from samples ``values (T, B, U)`` at regular times."""

    def __init__(self, t0: float, dt: float, values: torch.Tensor):
        self.t0, self.dt, self.values = float(t0), float(dt), values

    def shifted(self, steps: int) -> "Forcing":
        """The same signal with its time origin moved ``steps`` samples later (values unchanged)."""
        return Forcing(self.t0 + steps * self.dt, self.dt, self.values)

    def __call__(self, t) -> torch.Tensor:
        s = (torch.as_tensor(t, dtype=self.values.dtype) - self.t0) / self.dt
        s = s.clamp(0, self.values.shape[0] - 1)
        i = torch.clamp(torch.floor(s).long(), max=self.values.shape[0] - 2)
        w = s - i
        return self.values[i] * (1 - w) + self.values[i + 1] * w


class HybridField(nn.Module):
    """Augmented vector field ``f(t, [x, r])`` of a continuous hybrid model.

    Args:
        physics: nominal field ``f0(t, x[, u])`` or ``None`` (data-only).
        closure: a continuous :class:`Closure` or ``None`` (physics-only).
        dim: number of observed components.
    """

    def __init__(self, physics: nn.Module | None, closure: Closure | None, dim: int):
        super().__init__()
        if physics is None and closure is None:
            raise ValueError("a hybrid model needs physics, a closure, or both")
        if isinstance(closure, DiscreteRecurrent):
            raise ValueError(f"{type(closure).__name__} is a discrete closure; use HybridFlowMap")
        self.physics, self.closure, self.dim = physics, closure, int(dim)

    @property
    def hidden_size(self) -> int:
        return 0 if self.closure is None else self.closure.hidden_size

    def prepared(self) -> "HybridField | AffineHybridField":
        """This field in the form one unroll should evaluate: equal values, fewer operations.

        A closure that is affine in the state (:meth:`~mnemode.closures.RecurrentClosure.affine_rates`:
        the leaky hidden field with a linear readout) has its scalings and
        weights folded once into one matrix, and every solver stage then costs
        the physics plus one matrix product (:class:`AffineHybridField`); a
        memoryless closure with a folded correction
        (:meth:`~mnemode.closures.RandomFeatureClosure.prepared_correction`) is
        called directly (:class:`PreparedMemorylessField`). Other closures return
        the field itself. The folded form is built from the
        parameters, so gradients reach them; build it again after they change
        (each :func:`simulate` does).
        """
        if self.closure is None:
            return self
        affine = self.closure.affine_rates()
        if affine is not None:
            return AffineHybridField(self.physics, *affine, self.dim)
        if self.hidden_size == 0:
            correction = self.closure.prepared_correction()
            if correction is not None:
                return PreparedMemorylessField(self.physics, correction, self.dim)
        else:
            rates = self.closure.prepared_rates()
            if rates is not None:
                return PreparedMemoryField(self.physics, rates, self.dim, self.hidden_size)
        return self

    def split(self, state: torch.Tensor):
        return state[..., : self.dim], state[..., self.dim:]

    def forward(self, t, state: torch.Tensor, u: torch.Tensor | None = None) -> torch.Tensor:
        """``d[x, r]/dt`` at time ``t``; ``u`` are the forcing inputs at ``t`` (``None``: unforced)."""
        x, r = self.split(state)
        dx = 0
        if self.physics is not None:
            dx = self.physics(t, x, u) if u is not None else self.physics(t, x)
        if self.closure is None:
            return dx
        rr = r if self.hidden_size else None
        dx = dx + self.closure.correction(x, rr, u)
        if not self.hidden_size:
            return dx
        return torch.cat((dx, self.closure.hidden_field(x, r, u)), dim=-1)


class PreparedMemoryField:
    """``d[x, r]/dt = [f0(t, x[, u]), 0] + g(s)``, ``g`` a memory closure's prepared rates ``s ↦ [m, dr/dt]``."""

    def __init__(self, physics, rates: Callable, dim: int, hidden_size: int):
        self.physics, self.rates, self.dim, self.hidden_size = physics, rates, int(dim), int(hidden_size)

    def __call__(self, t, state: torch.Tensor, u: torch.Tensor | None = None) -> torch.Tensor:
        out = self.rates(state)
        if self.physics is None:
            return out
        x = state[..., : self.dim]
        dx = self.physics(t, x, u) if u is not None else self.physics(t, x)
        return out + torch.nn.functional.pad(dx, (0, self.hidden_size))


class AffineHybridField(PreparedMemoryField):
    """``d[x, r]/dt = [f0(t, x[, u]), 0] + [x, r] @ M + v``: a hybrid field whose closure is affine in the state.

    Made by :meth:`HybridField.prepared` for one unroll; it evaluates the same
    field as the :class:`HybridField` it came from (to rounding) with a few
    tensor operations per stage instead of dozens.
    """

    def __init__(self, physics, M: torch.Tensor, v: torch.Tensor, dim: int):
        super().__init__(physics, self._affine, dim, M.shape[0] - int(dim))
        self.M, self.v = M, v

    def _affine(self, state: torch.Tensor) -> torch.Tensor:
        return torch.addmm(self.v, state, self.M) if state.dim() == 2 else state @ self.M + self.v


class PreparedMemorylessField:
    """``dx/dt = f0(t, x[, u]) + m(x)``, ``m`` a closure's prepared correction (:meth:`HybridField.prepared`)."""

    hidden_size = 0

    def __init__(self, physics, correction: Callable, dim: int):
        self.physics, self.correction, self.dim = physics, correction, int(dim)

    def __call__(self, t, x: torch.Tensor, u: torch.Tensor | None = None) -> torch.Tensor:
        m = self.correction(x)
        if self.physics is None:
            return m
        return (self.physics(t, x, u) if u is not None else self.physics(t, x)) + m


class Driven(nn.Module):
    """A hybrid field bound to a forcing signal and a time origin: ``f(t, s) = field(t + origin, s, u(t))``.

    Solvers integrate ``f(t, y)`` on their own scalar clock; this is how an explicit
    forcing and each trajectory's true time reach the field without the field
    itself carrying them. The forcing is read on the solver's clock ``t`` (it has
    its own origin); the physics sees ``t + origin``. ``time_origin`` is ``None``, a
    float, or a ``(*batch, 1)`` tensor as :func:`physics_time` makes it (the sum is
    cast to the state's dtype). Built per call, never stored on a model.
    """

    def __init__(self, field: HybridField, forcing: Callable | None = None, time_origin=None):
        super().__init__()
        if isinstance(time_origin, (int, float)):
            time_origin = float(time_origin)
        self.field, self.forcing, self.time_origin = field, forcing, time_origin

    def forward(self, t, state: torch.Tensor) -> torch.Tensor:
        u = None if self.forcing is None else self.forcing(t)
        origin = self.time_origin
        if origin is None:
            return self.field(t, state, u)
        if isinstance(origin, float):
            return self.field(t + origin, state, u)
        # sum in float64, then the state's dtype: a float64 (B, 1) time would promote a float32 state
        true_t = (origin.to(state.device) + t).to(state.dtype)
        return self.field(true_t, state, u)


def drive(field: HybridField, forcing: Callable | None = None, time_origin=None) -> nn.Module:
    """``field`` itself when unforced with no time shift, else the :class:`Driven` field.

    ``time_origin`` as :class:`Driven` takes it. It is dropped when nothing reads
    ``t``: a data-only model (no physics), or physics declared ``autonomous``.
    """
    origin = time_origin if reads_time(getattr(field, "physics", None)) else None
    if isinstance(origin, (int, float)) and origin == 0.0:
        origin = None
    if forcing is None and origin is None:
        return field
    return Driven(field, forcing, origin)


class HybridFlowMap(nn.Module):
    """One observation step of a discrete hybrid model: ``[x_n, r_n] ↦ [x_{n+1}, r_{n+1}]``.

    Args:
        flow_map: Ψ0 (a :class:`~mnemode.solvers.FlowMap` of the nominal field) or
            ``None`` for a data-only discrete model (``x_{n+1} = x_n + Δt·m``).
        closure: memoryless closure or a :class:`~mnemode.closures.DiscreteRecurrent` one.
        dt: the observation interval Δt.
    """

    def __init__(self, flow_map: FlowMap | None, closure: Closure | None, dim: int, dt: float):
        super().__init__()
        if isinstance(closure, Recurrent):
            raise ValueError(f"{type(closure).__name__} has a continuous hidden field (dr/dt); a discrete model "
                             "needs a recurrent cell (e.g. GRUFlowClosure) or a memoryless closure")
        self.flow_map, self.closure, self.dim, self.dt = flow_map, closure, int(dim), float(dt)

    @property
    def hidden_size(self) -> int:
        return 0 if self.closure is None else self.closure.hidden_size

    def forward(self, state: torch.Tensor) -> torch.Tensor:
        x, r = state[..., : self.dim], state[..., self.dim:]
        base = self.flow_map(x) if self.flow_map is not None else x
        if self.closure is None:
            return base
        rr = r if self.hidden_size else None
        x_next = base + self.dt * self.closure.correction(x, rr)
        if not self.hidden_size:
            return x_next
        return torch.cat((x_next, self.closure.hidden_field(x, r)), dim=-1)


def _initial_state(model, x0: torch.Tensor, r0: torch.Tensor | None) -> torch.Tensor:
    if model.hidden_size == 0:
        return x0
    if r0 is None:
        r0 = model.closure.initial_hidden(x0.shape[:-1], x0.dtype)
    return torch.cat((x0, r0), dim=-1)


def simulate(model: HybridField | HybridFlowMap, x0: torch.Tensor, n_steps: int, dt: float,
             solver: Solver | None = None, r0: torch.Tensor | None = None, t0: float = 0.0,
             return_hidden: bool = False, forcing: Callable | None = None, time_origin=None):
    """Free-run a hybrid model for ``n_steps`` observation intervals of ``dt``.

    Returns observed states ``(n_steps + 1, *x0.shape)`` (and the hidden states if
    ``return_hidden``). A continuous model needs a ``solver``; a discrete one
    ignores it (its ``dt`` is fixed by construction). ``forcing`` is ``u(t)`` (a
    :class:`Forcing`) for a forced continuous model, evaluated at the solver's
    times ``t0 + i·dt`` (plus sub-steps).

    ``time_origin`` (continuous models) is each trajectory's time at the solver's
    ``t = 0``: a float, or one value per state of ``x0`` (shape ``x0.shape[:-1]``);
    the physics is then called at ``origin + t`` (see :func:`physics_time`), e.g.
    ``origin`` = a forecast start's true time and ``t0 = 0``. ``None`` (default)
    leaves the physics on the solver's clock. Physics declared ``autonomous``
    (:func:`reads_time`) and discrete models, which are autonomous, ignore it.

    Raises:
        ValueError: a continuous model without a solver; a ``time_origin`` that
            does not match ``x0``'s batch shape.
    """
    s0 = _initial_state(model, x0, r0)
    if isinstance(model, HybridFlowMap):
        if forcing is not None:
            raise ValueError("discrete hybrid models take no forcing inputs in this version")
        states = [s0]
        s = s0
        for _ in range(n_steps):
            s = model(s)
            states.append(s)
        traj = torch.stack(states)
    else:
        if solver is None:
            raise ValueError("simulating a continuous hybrid model needs a solver")
        origin = physics_time(time_origin, tuple(x0.shape[:-1])) if reads_time(model.physics) else None
        # a compiled solver step traces the plain field (it fuses the operations itself)
        field = model if getattr(solver, "compile", False) else model.prepared()
        traj = solver.unroll(drive(field, forcing, origin), s0, t0, dt, n_steps)
    x = traj[..., : model.dim]
    return (x, traj[..., model.dim:]) if return_hidden else x


class _ObservedDriving(nn.Module):
    """``dr/dt = g(x_obs(t), r)`` with ``x_obs`` linearly interpolated between samples."""

    def __init__(self, closure: Closure, x_a: torch.Tensor, x_b: torch.Tensor, t_a: float, dt: float, forcing):
        super().__init__()
        self.closure, self.x_a, self.x_b, self.t_a, self.dt, self.forcing = closure, x_a, x_b, t_a, dt, forcing

    def forward(self, t, r):
        w = (t - self.t_a) / self.dt
        x = self.x_a + w * (self.x_b - self.x_a)
        u = self.forcing(t) if self.forcing is not None else None
        return self.closure.hidden_field(x, r, u)


def _exact_warm_up(closure, history, dt, r, t0, first_grad, forcing):
    """:func:`warm_up` for a closure that solves its observation-driven hidden field exactly."""
    u = None
    if forcing is not None:  # the forcing at the samples: linear between them, like the observations
        u = torch.stack([forcing(t0 + i * dt) for i in range(history.shape[0])]).to(history.dtype)
    if first_grad > 0:
        with torch.no_grad():
            r = closure.exact_warm_up(history[: first_grad + 1], dt, r0=r,
                                      forcing=None if u is None else u[: first_grad + 1])
        r = r.detach()
        history = history[first_grad:]
        u = None if u is None else u[first_grad:]
    return closure.exact_warm_up(history, dt, r0=r, forcing=u)


def warm_up(model: HybridField | HybridFlowMap, history: torch.Tensor, dt: float,
            solver: Solver | None = None, r0: torch.Tensor | None = None, t0: float = 0.0,
            grad_steps: int | None = None, forcing: Callable | None = None,
            exact: bool | None = None) -> torch.Tensor | None:
    """Hidden state after being driven by observed ``history`` ``(T, *batch, dim)``.

    The observations stand in for the model's ``x``: ``r`` follows
    ``dr/dt = g(x_obs(t), r)`` (continuous; ``x_obs`` linear between samples;
    solved exactly, whatever the solver, when the closure can, as the leaky
    hidden field of :class:`~mnemode.closures.RecurrentClosure` can) or
    ``r_{n+1} = cell(x_n, r_n)`` (discrete) from ``r0`` (the closure's initial
    hidden state by default) over the ``T − 1`` intervals, the first sample at
    time ``t0``. ``forcing`` is ``u(t)`` for a forced model. Returns ``None`` for a
    memoryless model. The physics is not evaluated here (the observations stand in
    for ``x``), so a warm-up needs no time origin. ``grad_steps`` keeps the graph only for the last that many
    intervals (truncated backpropagation saves time on long warm-ups). ``exact``
    (``None``: wherever the closure offers it) chooses the exact solution over the
    solver's steps; ``False`` steps with the solver even where an exact one exists.
    """
    if model.hidden_size == 0:
        return None
    closure = model.closure
    r = closure.initial_hidden(history.shape[1:-1], history.dtype) if r0 is None else r0
    n = history.shape[0] - 1
    first_grad = 0 if grad_steps is None else max(0, n - grad_steps)
    can = isinstance(model, HybridField) and getattr(closure, "drives_exactly", False)
    if exact and not can:
        raise ConfigError("warm_up(exact=True)", f"{type(closure).__name__} in a {type(model).__name__} has no exact "
                          "solution of its observation-driven hidden field",
                          "leave exact=None (exact where available) or step with the solver (exact=False).")
    if can if exact is None else exact:
        return _exact_warm_up(closure, history, dt, r, t0, first_grad, forcing)

    def advance(i, r):
        if isinstance(model, HybridFlowMap):
            return closure.hidden_field(history[i], r)
        drive = _ObservedDriving(closure, history[i], history[i + 1], t0 + i * dt, dt, forcing)
        return solver.advance(drive, t0 + i * dt, r, dt)

    if first_grad > 0:
        # the early history still sets the state, but is not differentiated through
        with torch.no_grad():
            for i in range(first_grad):
                r = advance(i, r)
        r = r.detach()
    for i in range(first_grad, n):
        r = advance(i, r)
    return r
