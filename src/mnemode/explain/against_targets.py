"""The learned correction set beside the regression targets it should match, with R².

Two targets, both from :mod:`mnemode.fitting.targets` (reused, not re-derived):

* derivative targets ``ẋ̂ − f0(x)`` (``ẋ̂`` by finite differences), the vector-field
  term a continuous model's correction estimates;
* flow-map targets ``(x_{n+1} − Ψ0(x_n)) / Δt``: the *discrete* form for a
  :class:`~mnemode.hybrid.HybridFlowMap` (what its correction estimates), the
  midpoint-corrected *continuous* form (inputs ``x_mid``) for a
  :class:`~mnemode.hybrid.HybridField`.

Per component::

    R² = 1 − Σ_n (m_n − y_n)² / Σ_n (y_n − ȳ)²

over the test samples (those after the warm-up for a closure with memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from ..data import finite_difference
from ..fitting.regression import FlowMapFit
from ..fitting.targets import derivative_targets, flow_map_targets
from ..hybrid import HybridFlowMap
from .surrogate import r_squared
from .trace import Trace, evaluate_correction

__all__ = ["TargetComparison", "compare_with_targets", "nominal_field"]


@dataclass
class TargetComparison:
    """Learned correction and one kind of regression target on the same samples.

    Attributes:
        kind: ``'derivative'``, ``'flow map (discrete)'`` or ``'flow map (continuous)'``.
        time: ``(N,)`` sample times (for plots).
        learned: ``(N, D)`` learned correction.
        target: ``(N, D)`` regression targets.
        r2: per component R² of ``learned`` against ``target``.
        rows: ``(N,)`` flat positions ``n·B + b`` of the samples on the ``(T, B)``
            grid (for the continuous flow-map form, the interval's start).
    """

    kind: str
    time: np.ndarray
    learned: np.ndarray
    target: np.ndarray
    r2: list[float]
    rows: np.ndarray

    def to_dict(self, names) -> dict:
        return {"kind": self.kind, "n_samples": int(self.target.shape[0]),
                "r2": {n: v for n, v in zip(names, self.r2)}}


def nominal_field(model):
    """The nominal physics ``f0`` of a hybrid model (``None`` for a data-only model)."""
    if isinstance(model, HybridFlowMap):
        return None if model.flow_map is None else model.flow_map.field
    return model.physics


def _comparison(kind, times, learned, target, keep, rows) -> TargetComparison:
    learned = learned[keep].detach().cpu().numpy().astype(np.float64)
    target = target[keep].detach().cpu().numpy().astype(np.float64)
    r2 = [r_squared(learned[:, i], target[:, i]) for i in range(target.shape[1])]
    return TargetComparison(kind, times[keep], learned, target, r2, rows[keep])


def compare_with_targets(model, ts, trace: Trace, warm_up: float = 0.0,
                         scheme: str = "central4") -> list[TargetComparison]:
    """Learned correction against derivative and flow-map targets along ``ts``.

    Args:
        model: a HybridField or HybridFlowMap with a closure.
        ts: the trajectories ``trace`` was computed on.
        trace: :func:`~mnemode.explain.trace.trace_correction` of ``model`` on ``ts``.
        warm_up: time units at the start of each trajectory left out (memory closures).
        scheme: finite-difference stencil of the derivative targets.

    Returns:
        ``[derivative, flow map]`` comparisons.
    """
    T, B = ts.states.shape[:2]
    times = np.asarray(ts.times, dtype=np.float64)
    memory = trace.r is not None
    skip = warm_up if memory else 0.0
    out = []

    index, _ = finite_difference(ts.states, ts.dt, scheme)
    _, targets = derivative_targets(ts, nominal_field(model), scheme)
    learned = trace.m[index].reshape(-1, trace.m.shape[-1]).to(torch.float64)
    t_rows = np.repeat(times[index], B)
    rows = (index[:, None] * B + np.arange(B)[None, :]).reshape(-1)
    out.append(_comparison("derivative", t_rows, learned, targets, t_rows - times[0] >= skip, rows))

    t_rows = np.repeat(times[:-1], B)
    keep = t_rows - times[0] >= skip
    rows = np.arange((T - 1) * B)
    if isinstance(model, HybridFlowMap):
        _, targets = flow_map_targets(ts, model.flow_map, continuous=False)
        learned = trace.m[:-1].reshape(-1, trace.m.shape[-1]).to(torch.float64)
        out.append(_comparison("flow map (discrete)", t_rows, learned, targets, keep, rows))
    else:
        flow_map = FlowMapFit().flow_map_for(model, ts.dt)
        inputs, targets = flow_map_targets(ts, flow_map, continuous=True, true_time=True)
        D = trace.x.shape[-1]
        x_mid = inputs[:, :D].to(trace.x.dtype)
        u_mid = inputs[:, D:].to(trace.x.dtype) if inputs.shape[1] > D else None
        r_mid = None
        if memory:
            r_mid = (0.5 * (trace.r[:-1] + trace.r[1:])).reshape(-1, trace.r.shape[-1])
        learned = evaluate_correction(model.closure, x_mid, r_mid, u_mid).to(torch.float64)
        out.append(_comparison("flow map (continuous)", t_rows + 0.5 * ts.dt, learned, targets, keep, rows))
    return out
