"""ODE solvers every stage unrolls through: fixed-step Euler and RK4, adaptive, flow maps.

Solvers are configured objects (``RK4(step=0.01)``), not string keys. The fixed-step
solvers own their loop: the step is always explicit, output times may be further
apart than the step (sub-steps are taken between them), there is no ``.item()`` or
other host synchronisation inside the loop, and everything is differentiable, so
later stages can compile, export and backpropagate through them. Adaptive
integration goes through torchdiffeq.

All solvers integrate ``f(t, y)`` where ``y`` has any shape (batch on leading
dimensions) and return trajectories shaped ``(time, *y.shape)``.
"""

from __future__ import annotations

import math
from typing import Callable, Sequence

import torch
from torch import nn

from .errors import ConfigError, MnemodeError

__all__ = ["Solver", "Euler", "RK4", "Adaptive", "FlowMap", "substeps_for", "CountingField",
           "StepBudgetExceeded"]

Field = Callable[[object, torch.Tensor], torch.Tensor]


def substeps_for(interval: float, step: float) -> int:
    """Number of equal sub-steps no longer than ``step`` that cover ``interval``."""
    if step <= 0:
        raise ValueError(f"solver step must be > 0, got {step}")
    return max(1, math.ceil(interval / step - 1e-9))


def _as_floats(times) -> list[float]:
    if isinstance(times, torch.Tensor):
        times = times.detach().cpu().tolist()
    out = [float(t) for t in times]
    if any(b <= a for a, b in zip(out, out[1:])):
        raise ValueError("output times must be strictly increasing")
    return out


class Solver:
    """Common interface: advance one interval, unroll on a regular grid, integrate on any grid."""

    def advance(self, f: Field, t0: float, y: torch.Tensor, dt: float) -> torch.Tensor:
        raise NotImplementedError

    def unroll(self, f: Field, y0: torch.Tensor, t0: float, dt: float, n_steps: int) -> torch.Tensor:
        """States at ``t0 + i·dt`` for ``i = 0..n_steps``, shape ``(n_steps + 1, *y0.shape)``."""
        ys = [y0]
        y = y0
        for i in range(n_steps):
            y = self.advance(f, t0 + i * dt, y, dt)
            ys.append(y)
        return torch.stack(ys)

    def integrate(self, f: Field, y0: torch.Tensor, times: Sequence[float] | torch.Tensor) -> torch.Tensor:
        """States at each of the strictly increasing ``times`` (``y0`` at ``times[0]``)."""
        ts = _as_floats(times)
        ys = [y0]
        y = y0
        for a, b in zip(ts, ts[1:]):
            y = self.advance(f, a, y, b - a)
            ys.append(y)
        return torch.stack(ys)


class _FixedStep(Solver):
    """A fixed-step method: ``advance`` loops :meth:`one_step` over equal sub-steps.

    Args:
        step: the largest step; an interval is covered by the fewest equal
            sub-steps no longer than it.
        compile: run each step through ``torch.compile``
            (:class:`mnemode.compiled.CompiledStep`: several times faster at small
            batches once compiled, eager again if compilation is unavailable or
            fails). Off by default: compiling takes seconds to minutes, and
            fused kernels round differently from eager ones in the last bits, so a
            fit resumed with a different setting is not bit-for-bit equal.
    """

    order: int
    stages: int

    def __init__(self, step: float, compile: bool = False):
        if not step > 0:
            raise ValueError(f"{type(self).__name__} step must be > 0, got {step}")
        self.step = float(step)
        self.compile = bool(compile)
        self._compiled = None

    def one_step(self, f: Field, t: float, y: torch.Tensor, h: float) -> torch.Tensor:
        raise NotImplementedError

    def _stepper(self):
        """The one-step map ``advance`` loops: compiled when asked for, except while being captured.

        Inside ``torch.export`` or ``torch.compile`` (an exported simulator, a
        compiled caller) the eager step is traced instead: the capture compiles it.
        """
        if not self.compile or torch.compiler.is_compiling():
            return self.one_step
        if self._compiled is None:
            from .compiled import CompiledStep

            self._compiled = CompiledStep(self.one_step, repr(self))
        return self._compiled

    def advance(self, f, t0, y, dt):
        """Advance by ``dt`` with the fewest equal sub-steps no longer than ``step``.

        A negative ``dt`` integrates backwards with sub-steps no longer than ``step``.
        """
        n = substeps_for(abs(dt), self.step)
        h = dt / n
        step = self._stepper()
        for i in range(n):
            y = step(f, t0 + i * h, y, h)
        return y

    def __getstate__(self):
        # a compiled step is process-local: copies (deepcopy, pickle) compile again on first use
        state = dict(self.__dict__)
        state["_compiled"] = None
        return state

    def __repr__(self) -> str:
        extra = ", compile=True" if self.compile else ""
        return f"{type(self).__name__}(step={self.step}{extra})"


class Euler(_FixedStep):
    """1st order explicit Euler method. Fixed step. Uses 1 stage.

    ``y_{n+1} = y_n + h f(t_n, y_n)``.
    """

    order, stages = 1, 1

    def one_step(self, f, t, y, h):
        return torch.add(y, f(t, y), alpha=h)


class RK4(_FixedStep):
    """4th order classical Runge–Kutta method. Fixed step. Uses 4 stages.

    Reference: E. Hairer, S. P. Nørsett, G. Wanner, *Solving ODEs I*, §II.1.
    """

    order, stages = 4, 4

    def one_step(self, f, t, y, h):
        # ``torch.add(a, b, alpha=c)`` forms ``a + c·b`` in one pass: 7 tensor operations per step
        # besides the field, against 13 for the textbook expression (no temporaries for c·b)
        half = h / 2
        k1 = f(t, y)
        k2 = f(t + half, torch.add(y, k1, alpha=half))
        k3 = f(t + half, torch.add(y, k2, alpha=half))
        k4 = f(t + h, torch.add(y, k3, alpha=h))
        incr = torch.add(k1, torch.add(k2, k3), alpha=2.0).add_(k4)  # k1 + 2 k2 + 2 k3 + k4
        return torch.add(y, incr, alpha=h / 6)


class CountingField(nn.Module):
    """Wraps a vector field and counts its evaluations (``nfe``)."""

    def __init__(self, field: Field):
        super().__init__()
        self.field = field
        self.nfe = 0

    def forward(self, t, y):
        self.nfe += 1
        return self.field(t, y)


class StepBudgetExceeded(MnemodeError, RuntimeError):
    """An adaptive integration needed more steps than its budget allows.

    Also a ``RuntimeError``, so code that treats a blown-up run as a numerical
    failure (rather than a crash) keeps catching it.
    """

    exit_code = 3


class Adaptive(Solver):
    """Adaptive-step integration through torchdiffeq (dopri5, dopri8, bosh3, ...).

    Args:
        method: a torchdiffeq adaptive method name.
        rtol, atol: error tolerances.
        max_steps: step budget; exceeding it raises :class:`StepBudgetExceeded`
            instead of running forever.
        adjoint: backpropagate with the adjoint method (memory O(1) in the number
            of steps) instead of directly through the solver's operations.
        compile: must be ``False``; accepted so that one solver config (with its
            ``compile`` key) serves every solver. torchdiffeq's step-size control
            synchronises with the host every step and is not compiled.

    Note that torchdiffeq uses one error norm for the whole batch: one stiff
    trajectory makes every trajectory in the batch take small steps.
    """

    METHODS = ("dopri5", "dopri8", "bosh3", "fehlberg2", "adaptive_heun")

    def __init__(self, method: str = "dopri5", rtol: float = 1e-7, atol: float = 1e-9,
                 max_steps: int = 100_000, adjoint: bool = False, compile: bool = False):
        if compile:
            raise ConfigError("solver.compile", "is true for an adaptive solver, which has no compiled path",
                              "set solver.compile=false, or use a fixed-step solver (RK4, Euler) to compile.")
        if method not in self.METHODS:
            raise ValueError(f"adaptive method {method!r} is not one of {self.METHODS}")
        self.method, self.rtol, self.atol = method, float(rtol), float(atol)
        self.max_steps, self.adjoint = int(max_steps), bool(adjoint)
        self.nfe = 0

    def integrate(self, f, y0, times):
        import torchdiffeq

        t = torch.as_tensor(_as_floats(times), dtype=y0.dtype, device=y0.device)
        counted = f if isinstance(f, CountingField) else CountingField(f)
        kwargs = dict(rtol=self.rtol, atol=self.atol, method=self.method,
                      options={"max_num_steps": self.max_steps})
        start = counted.nfe
        try:
            if self.adjoint:
                out = torchdiffeq.odeint_adjoint(counted, y0, t, **kwargs)
            else:
                out = torchdiffeq.odeint(counted, y0, t, **kwargs)
        except AssertionError as exc:
            # torchdiffeq signals an exhausted step budget with a bare assert.
            if "max_num_steps" not in str(exc):
                raise
            raise StepBudgetExceeded(
                f"{self!r}", f"needed more than max_steps={self.max_steps} steps to integrate from "
                f"t={float(t[0])!r} to t={float(t[-1])!r}",
                "raise max_steps, loosen rtol/atol, or use a fixed-step solver such as RK4; a model "
                "that grows stiff or diverges (e.g. during fitting) also exhausts the budget.") from None
        finally:
            self.nfe += counted.nfe - start
        return out

    def advance(self, f, t0, y, dt):
        return self.integrate(f, y, [t0, t0 + dt])[-1]

    def unroll(self, f, y0, t0, dt, n_steps):
        return self.integrate(f, y0, [t0 + i * dt for i in range(n_steps + 1)])

    def __repr__(self) -> str:
        return f"Adaptive(method={self.method!r}, rtol={self.rtol}, atol={self.atol}, adjoint={self.adjoint})"


class FlowMap(nn.Module):
    """The flow map Ψ of a vector field over one interval ``dt``: ``x ↦ x(t + dt)``.

    With the nominal physics and an accurate solver this is Ψ0, the flow map that
    discrete hybrid models correct. The field must be autonomous or take ``t``
    relative to the start of the interval.
    """

    def __init__(self, field: nn.Module, dt: float, solver: Solver):
        super().__init__()
        self.field, self.dt, self.solver = field, float(dt), solver

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.solver.advance(self.field, 0.0, x, self.dt)
