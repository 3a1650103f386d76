"""The programs an export holds: one observation interval and one warm-up interval, and their capture.

Step program (state ``s = [x, r]``, ``D + d_r`` components), one of three kinds
(:data:`PROGRAM_KINDS`)::

    autonomous:  s_{n+1} = Φ_Δt(s_n)                       inputs (state)
    timed:       s_{n+1} = Φ_Δt(s_n; t_n)                  inputs (t, state)
    forced:      s_{n+1} = Φ_Δt(s_n; t_n, u_n, u_{n+1})    inputs (t, state, u_a, u_b)

For a forced model the forcing inside the interval is linear between the samples
``u_a = u(t_n)`` and ``u_b = u(t_n + Δt)`` -- the piecewise-linear interpolation of
:class:`mnemode.hybrid.Forcing` that fitting and assessment use -- and the physics
and closure see the time ``t`` of the rollout's clock (``t_n`` at the interval's
start). A timed program is the unforced model whose physics reads ``t``
(:func:`mnemode.hybrid.reads_time`): the solver's clock starts the interval at the
given ``t`` (a 0-d tensor, one clock for the batch, as in the forced program). An
autonomous program restarts ``t`` at 0 each interval; it is the program of every
model whose physics ignores ``t`` (declared ``autonomous``), of data-only models
and of discrete models.

Warm-up program: ``(x_n, x_{n+1}, r_n) ↦ r_{n+1}`` (forced: ``(t, x_a, x_b, r, u_a, u_b)``),
:func:`mnemode.hybrid.warm_up` on a two-sample history. A warm-up evaluates no
physics (the observations stand in for ``x``) and closures do not see ``t``, so a
timed model keeps the autonomous warm-up program.
"""

from __future__ import annotations

import io
from dataclasses import dataclass, field

import torch
from torch import nn

from ..errors import ConfigError
from ..hybrid import Driven, HybridField, HybridFlowMap, reads_time, warm_up
from ..solvers import Solver

__all__ = ["PROGRAM_KINDS", "program_kind", "IntervalForcing", "StepProgram", "BlockProgram", "WarmUpInterval",
           "Program", "capture", "program_bytes", "reload"]


PROGRAM_KINDS = ("autonomous", "timed", "forced")


def program_kind(model: nn.Module, forced: bool) -> str:
    """The step program a model exports with: ``'forced'``, ``'timed'`` or ``'autonomous'``.

    Timed: a continuous model without forcing inputs whose physics may depend on ``t``
    (it does not declare ``autonomous = True``). Discrete models integrate Ψ0 from
    ``t = 0`` every interval and so are autonomous whatever their physics.
    """
    if forced:
        return "forced"
    if isinstance(model, HybridField) and reads_time(model.physics):
        return "timed"
    return "autonomous"


class IntervalForcing(nn.Module):
    """``u(t) = u_a + (t − t_a)/Δt · (u_b − u_a)``: the forcing inside one interval."""

    def __init__(self, t_a: torch.Tensor, dt: float, u_a: torch.Tensor, u_b: torch.Tensor):
        super().__init__()
        self.t_a, self.dt, self.u_a, self.u_b = t_a, dt, u_a, u_b

    def forward(self, t) -> torch.Tensor:
        w = (t - self.t_a) / self.dt
        return self.u_a + w * (self.u_b - self.u_a)


class _AutonomousStep(nn.Module):
    def __init__(self, model: nn.Module, solver: Solver | None, dt: float):
        super().__init__()
        self.model, self.solver, self.dt = model, solver, float(dt)
        # the frozen model's folded form (HybridField.prepared), built once: the program then captures
        # one matrix product per stage where the closure allows it, with the folded weights as constants.
        # Kept only when it differs from the model (a plain attribute, never a second name for a submodule).
        prepared = model.prepared() if isinstance(model, HybridField) else model
        self._prepared = None if prepared is model else prepared

    @property
    def field(self):
        """What the solver steps: the prepared field, else the model itself."""
        return self.model if self._prepared is None else self._prepared

    def forward(self, state: torch.Tensor) -> torch.Tensor:
        if isinstance(self.model, HybridFlowMap):
            return self.model(state)
        return self.solver.advance(self.field, 0.0, state, self.dt)


class _TimedStep(_AutonomousStep):
    def forward(self, t: torch.Tensor, state: torch.Tensor) -> torch.Tensor:
        return self.solver.advance(self.field, t, state, self.dt)


class _ForcedStep(_AutonomousStep):
    def forward(self, t: torch.Tensor, state: torch.Tensor, u_a: torch.Tensor, u_b: torch.Tensor) -> torch.Tensor:
        driven = Driven(self.field, IntervalForcing(t, self.dt, u_a, u_b))
        return self.solver.advance(driven, t, state, self.dt)


class _AutonomousWarmUp(_AutonomousStep):
    def forward(self, x_a: torch.Tensor, x_b: torch.Tensor, r: torch.Tensor) -> torch.Tensor:
        return warm_up(self.model, torch.stack((x_a, x_b)), self.dt, self.solver, r0=r)


class _ForcedWarmUp(_AutonomousStep):
    def forward(self, t: torch.Tensor, x_a: torch.Tensor, x_b: torch.Tensor, r: torch.Tensor, u_a: torch.Tensor,
                u_b: torch.Tensor) -> torch.Tensor:
        return warm_up(self.model, torch.stack((x_a, x_b)), self.dt, self.solver, r0=r, t0=t,
                       forcing=IntervalForcing(t, self.dt, u_a, u_b))


_STEPS = {"autonomous": _AutonomousStep, "timed": _TimedStep, "forced": _ForcedStep}


def StepProgram(model: nn.Module, solver: Solver | None, dt: float, kind: str = "autonomous") -> nn.Module:
    """One observation interval of a hybrid model, with the inputs of its ``kind``.

    ``(state)`` when autonomous, ``(t, state)`` when timed, ``(t, state, u_a, u_b)``
    when forced (see :func:`program_kind`).
    """
    if kind not in _STEPS:
        raise ConfigError("program kind", f"is {kind!r}; expected one of {PROGRAM_KINDS}",
                          "pass the kind program_kind() returns.")
    return _STEPS[kind](model, solver, dt)


class BlockProgram(nn.Module):
    """``steps`` consecutive intervals of an autonomous step program: ``state ↦ states (steps, batch, width)``."""

    def __init__(self, step: nn.Module, steps: int):
        super().__init__()
        self.step, self.steps = step, int(steps)

    def forward(self, state: torch.Tensor) -> torch.Tensor:
        out = []
        for _ in range(self.steps):
            state = self.step(state)
            out.append(state)
        return torch.stack(out)


def WarmUpInterval(model: nn.Module, solver: Solver | None, dt: float, forced: bool = False) -> nn.Module:
    """One warm-up interval (:func:`warm_up` on two samples): ``(x_a, x_b, r)``, or ``(t, x_a, x_b, r, u_a, u_b)``."""
    return (_ForcedWarmUp if forced else _AutonomousWarmUp)(model, solver, dt)


@dataclass
class Program:
    """One program file of an export: its role, file name, bytes and signature.

    ``inputs`` maps each input name to its shape (``"batch"`` for the dynamic
    dimension, ``[]`` for a scalar); ``kind`` says how it is loaded
    (``"torch.export"``, ``"onnx"``, or a later kind such as an ahead-of-time
    compiled package). Further programs join an export by appending a
    ``Program`` to the exporter's list; the manifest lists every one.
    """

    role: str
    file: str
    kind: str
    data: bytes
    inputs: dict
    outputs: dict
    maps: str
    extra: dict = field(default_factory=dict)


def capture(module: nn.Module, examples: tuple, what: str):
    """``torch.export.export`` with a dynamic batch on the leading axis of every non-scalar input."""
    batch = torch.export.Dim("batch", min=1)
    shapes = tuple(None if e.ndim == 0 else {0: batch} for e in examples)
    try:
        return torch.export.export(module, examples, dynamic_shapes=shapes)
    except Exception as exc:  # torch.export raises many kinds; all mean "not exportable as written"
        first = str(exc).strip().splitlines()[0][:300] if str(exc).strip() else type(exc).__name__
        raise ConfigError(what, f"cannot be captured by torch.export ({type(exc).__name__}: {first})",
                          "keep the model's forward free of data-dependent Python control flow, .item() "
                          "calls and non-torch libraries (torchdiffeq solvers are replaced by RK4 "
                          "automatically; custom ones are not).") from None


def program_bytes(ep) -> bytes:
    """The ``.pt2`` bytes of a captured program, written with nothing pickled.

    The sample inputs are dropped (torch pickles them); the loader refuses any
    archive that holds pickled entries (see :mod:`mnemode.archive`).
    """
    ep.example_inputs = None
    buf = io.BytesIO()
    torch.export.save(ep, buf)
    return buf.getvalue()


def reload(data: bytes):
    """The callable module of ``.pt2`` bytes this process just wrote."""
    return torch.export.load(io.BytesIO(data)).module()
