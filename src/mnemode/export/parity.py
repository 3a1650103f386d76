"""Parity of exported programs with the eager model, and the exportable stand-in for adaptive solvers.

Parity is the largest ``|program − eager|`` over a rollout of ``n`` observation
intervals (and over a warm-up), with places non-finite in both counted as agreeing.
A forced model is driven in both by the same forcing samples ``U (n + 1, B, U)``:
the eager model through :class:`mnemode.hybrid.Forcing` (piecewise linear), the
program interval by interval with ``(t_k, U_k, U_{k+1})``. A program that takes ``t``
(timed or forced) is called with ``t_k = t0 + k·Δt``; the eager model runs from the
same time: on the solver's clock from ``t0`` when forced, and with
``simulate(..., time_origin=t0)`` when timed (the physics sees ``t0 + t``).
"""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass

import numpy as np
import torch

from ..errors import ConfigError
from ..hybrid import Forcing, HybridFlowMap, simulate, warm_up
from ..solvers import RK4, Adaptive, FlowMap
from .programs import StepProgram, capture

__all__ = ["ParitySignals", "parity_signals", "substitute_adaptive", "program_rollout", "eager_rollout",
           "measure_parity", "float32_figure", "max_diff"]


@dataclass
class ParitySignals:
    """What the parity runs start from and are driven by.

    ``starts`` ``(N, D)`` observed states; ``r_init`` ``(1, d_r)`` or ``None``;
    ``forcing`` ``(n + W + 1, N, U)`` samples (``None`` when unforced) of which the
    first ``W + 1`` drive the warm-up history and the rest the rollouts.
    """

    starts: torch.Tensor
    starts_kind: str
    r_init: torch.Tensor | None
    forcing: torch.Tensor | None

    def full(self, b: int | None = None) -> torch.Tensor:
        s = self.starts if b is None else self.starts[:b]
        return s if self.r_init is None else torch.cat((s, self.r_init.expand(s.shape[0], -1)), -1)


def parity_signals(envelope: dict, names: list[str], parity_x0, n: int, dtype, dim: int, r_init,
                   forcing_envelope: dict | None, forcing_names: list[str], length: int, dt: float) -> ParitySignals:
    """Starts (given, or uniform in the envelope, seed 0) and a smooth forcing inside its envelope.

    The forcing of component ``j`` and trajectory ``b`` is
    ``lo_j + (hi_j − lo_j)·(1 + sin(ω_jb·t + φ_jb))/2`` with ``ω`` and ``φ`` drawn
    with seed 0 (periods between 20 and 200 intervals): inside the training
    envelope and smooth on the scale of Δt, as recorded inputs usually are.
    """
    gen = torch.Generator().manual_seed(0)
    if parity_x0 is not None:
        x0 = torch.as_tensor(np.asarray(parity_x0, dtype=np.float64), dtype=dtype)
        if x0.ndim == 1:
            x0 = x0[None]
        if x0.ndim != 2 or x0.shape[-1] != dim or not torch.isfinite(x0).all():
            raise ConfigError("parity_x0", f"has shape {tuple(x0.shape)}; expected finite (B, {dim})",
                              "pass observed states from the test data, one per row.")
        starts, kind = x0.repeat((n + x0.shape[0] - 1) // x0.shape[0], 1)[:n], "given"
    else:
        lo = torch.tensor([envelope[k][0] for k in names], dtype=torch.float64)
        hi = torch.tensor([envelope[k][1] for k in names], dtype=torch.float64)
        u = torch.rand((n, dim), generator=gen, dtype=torch.float64)
        starts, kind = (lo + u * (hi - lo)).to(dtype), "uniform in the training envelope (seed 0)"
    forcing = None
    if forcing_names:
        lo = torch.tensor([forcing_envelope[k][0] for k in forcing_names], dtype=torch.float64)
        hi = torch.tensor([forcing_envelope[k][1] for k in forcing_names], dtype=torch.float64)
        k = len(forcing_names)
        period = dt * (20 + 180 * torch.rand((n, k), generator=gen, dtype=torch.float64))
        phase = 2 * math.pi * torch.rand((n, k), generator=gen, dtype=torch.float64)
        t = dt * torch.arange(length, dtype=torch.float64)[:, None, None]
        forcing = (lo + (hi - lo) * 0.5 * (1 + torch.sin(2 * math.pi * t / period + phase))).to(dtype)
        kind += "; forcing smooth inside its training envelope (seed 0)"
    return ParitySignals(starts, kind, r_init, forcing)


def substitute_adaptive(model, solver, starts: torch.Tensor, dt: float):
    """Replace torchdiffeq integration (not exportable) by RK4 at a step matching it.

    The step halves from Δt until one interval of RK4 agrees with the adaptive
    solver within ten times its own tolerance on the parity starts (at most 256
    sub-steps), unforced. Returns ``(model, solver, record)``; ``model`` is changed
    in place only for a discrete model (the exporter's private copy).
    """
    flow = model.flow_map if isinstance(model, HybridFlowMap) else None
    adaptive = flow.solver if flow is not None else solver
    if not isinstance(adaptive, Adaptive):
        return model, solver, None
    with torch.no_grad():
        ref = flow(starts[..., : model.dim]) if flow is not None else adaptive.advance(model, 0.0, starts, dt)
        tol = 10 * (adaptive.atol + adaptive.rtol * float(ref.abs().max()))
        n, diff = 1, math.inf
        while True:
            rk4 = RK4(dt / n)
            if flow is not None:
                out = FlowMap(flow.field, flow.dt, rk4)(starts[..., : model.dim])
            else:
                out = rk4.advance(model, 0.0, starts, dt)
            diff = float((out - ref).abs().max())
            if diff <= tol or n >= 256:
                break
            n *= 2
    record = {"fitted_with": repr(adaptive), "exported_with": repr(rk4), "substeps": n,
              "one_step_max_abs_diff_vs_fitted_solver": diff, "tolerance": tol}
    if flow is not None:
        model.flow_map = FlowMap(flow.field, flow.dt, rk4)
        return model, solver, record
    return model, rk4, record


def max_diff(a: torch.Tensor, b: torch.Tensor) -> float:
    """Largest |a − b|; places non-finite in both count as agreeing, in one only as inf."""
    fa, fb = torch.isfinite(a), torch.isfinite(b)
    if not torch.equal(fa, fb):
        return math.inf
    if not fa.any():
        return 0.0
    return float((a[fa] - b[fb]).abs().max())


def program_rollout(step, s0: torch.Tensor, n: int, dt: float, forcing: torch.Tensor | None,
                    kind: str | None = None, t0: float = 0.0) -> torch.Tensor:
    """States ``(n + 1, B, D + d_r)`` of ``n`` calls of a step program.

    ``kind`` is the program's (``None``: forced when ``forcing`` is given, else
    autonomous); timed and forced programs get ``t_k = t0 + k·Δt``.
    """
    kind = kind or ("autonomous" if forcing is None else "forced")
    out, s = [s0], s0
    with torch.no_grad():
        for k in range(n):
            t = torch.tensor(t0 + k * dt, dtype=s0.dtype)
            if kind == "autonomous":
                s = step(s)
            elif kind == "timed":
                s = step(t, s)
            else:
                s = step(t, s, forcing[k], forcing[k + 1])
            out.append(s)
    return torch.stack(out)


def eager_rollout(model, solver, s0: torch.Tensor, n: int, dt: float, forcing: torch.Tensor | None,
                  t0: float = 0.0) -> torch.Tensor:
    """The eager model's states ``(n + 1, B, D + d_r)`` from full states ``s0`` at time ``t0``.

    Forced: on the solver's clock from ``t0``, the forcing's first sample at ``t0``.
    Unforced: ``time_origin=t0`` (ignored by physics that does not read ``t``).
    """
    x0, r0 = s0[..., : model.dim], (s0[..., model.dim:] if model.hidden_size else None)
    with torch.no_grad():
        if forcing is None:
            x, r = simulate(model, x0, n, dt, solver, r0=r0, return_hidden=True,
                            time_origin=None if isinstance(model, HybridFlowMap) else t0)
        else:
            x, r = simulate(model, x0, n, dt, solver, r0=r0, t0=t0, return_hidden=True,
                            forcing=Forcing(t0, dt, forcing))
    return torch.cat((x, r), -1) if model.hidden_size else x


def program_warm_up(program, history: torch.Tensor, r0: torch.Tensor, dt: float, t0: float,
                    forcing: torch.Tensor | None) -> torch.Tensor:
    """The warm-up program applied to each consecutive pair of ``history`` (forced: with its samples)."""
    r = r0
    with torch.no_grad():
        for i in range(history.shape[0] - 1):
            if forcing is None:
                r = program(history[i], history[i + 1], r)
            else:
                t = torch.tensor(t0 + i * dt, dtype=r0.dtype)
                r = program(t, history[i], history[i + 1], r, forcing[i], forcing[i + 1])
    return r


def measure_parity(model, solver, dt: float, step_prog, wu_prog, signals: ParitySignals, steps: int,
                   batches: tuple[int, ...], warm_steps: int, kind: str | None = None,
                   t0: float = 0.0) -> tuple[dict, float]:
    """Max |program − eager| over ``steps`` intervals for each batch size, and over a warm-up.

    The rollouts start at time ``t0`` (``kind`` as :func:`program_rollout` takes it).
    The warm-up history is a free run of the eager model over ``warm_steps``
    intervals (driven by the first samples of the forcing), the clock at
    ``t0 − warm_steps·Δt`` on its first sample as in the assessment's forecasts.
    """
    w = warm_steps
    fore = None if signals.forcing is None else signals.forcing[w:]
    rec, worst = {}, 0.0
    for b in batches:
        s0 = signals.full(b)
        f = None if fore is None else fore[:, :b]
        d = max_diff(program_rollout(step_prog, s0, steps, dt, f, kind, t0),
                     eager_rollout(model, solver, s0, steps, dt, f, t0))
        rec[f"batch_{b}"] = d
        worst = max(worst, d)
    out = {"step_program": {**rec, "max_abs_diff": worst}}
    if wu_prog is not None:
        hist_f = None if signals.forcing is None else signals.forcing[: w + 1]
        t_first = t0 - w * dt
        history = eager_rollout(model, solver, signals.full(), w, dt, hist_f, t_first)[..., : model.dim]
        if bool(torch.isfinite(history).all()):
            r0 = signals.r_init.expand(history.shape[1], -1)
            u = None if hist_f is None else Forcing(t_first, dt, hist_f)
            with torch.no_grad():
                ref = warm_up(model, history, dt, solver, r0=r0, t0=t_first, forcing=u)
            d = max_diff(program_warm_up(wu_prog, history, r0, dt, t_first, hist_f), ref)
            out["warm_up_program"] = {"intervals": w, f"batch_{history.shape[1]}": d, "max_abs_diff": d}
            worst = max(worst, d)
    return out, worst


def hidden_range(model, solver, dt: float, signals: ParitySignals, steps: int,
                 t0: float = 0.0) -> list[list[float]] | None:
    """Per-component ``[min, max]`` of the hidden state over the eager parity runs (``None`` if memoryless)."""
    if not model.hidden_size:
        return None
    f = None if signals.forcing is None else signals.forcing[-(steps + 1):]
    traj = eager_rollout(model, solver, signals.full(), steps, dt, f, t0)[..., model.dim:]
    traj = traj.reshape(-1, model.hidden_size)
    traj = traj[torch.isfinite(traj).all(-1)]
    if traj.shape[0] == 0:
        return None
    return [[float(a), float(b)] for a, b in zip(traj.min(0).values, traj.max(0).values)]


def float32_figure(frozen, solver, dt: float, signals: ParitySignals, steps: int, batch: int,
                   kind: str, t0: float = 0.0) -> dict:
    """Parity of a float32 copy of the step program (captured in memory, not written).

    Measured at batch ``batch`` over ``steps`` steps against float32 eager, plus
    the one-interval float32-vs-float64 difference (the precision a float32
    export gives up).
    """
    m32 = copy.deepcopy(frozen).to(torch.float32)
    s32 = ParitySignals(signals.starts.float(), signals.starts_kind,
                        None if signals.r_init is None else signals.r_init.float(),
                        None if signals.forcing is None else signals.forcing.float())
    full32 = s32.full()
    ex = (full32[:2].clone(),)
    if kind == "timed":
        ex = (torch.tensor(0.0), full32[:2].clone())
    elif kind == "forced":
        ex = (torch.tensor(0.0), full32[:2].clone(), s32.forcing[0, :2].clone(), s32.forcing[1, :2].clone())
    prog = capture(StepProgram(m32, solver, dt, kind), ex, "model (float32 copy)").module()
    rec, _ = measure_parity(m32, solver, dt, prog, None, s32, steps, (batch,), 0, kind, t0)
    f64 = None if signals.forcing is None else signals.forcing[:2]
    f32 = None if s32.forcing is None else s32.forcing[:2]
    one32 = eager_rollout(m32, solver, full32, 1, dt, f32, t0)[-1].double()
    one64 = eager_rollout(frozen, solver, signals.full(), 1, dt, f64, t0)[-1]
    return {**rec["step_program"], "steps": steps,
            "one_step_max_abs_diff_vs_float64": float((one32 - one64).abs().max()),
            "note": "float32 step program vs float32 eager (recorded, not required)"}
