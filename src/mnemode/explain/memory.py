"""What a closure with memory remembers: its time constants and which inputs' histories matter.

Time constants. Along the driven hidden states ``r_n`` the hidden dynamics are
linearised, ``J = ∂g/∂r`` averaged over the samples (for the leaky-linear field and
the filter bank ``J`` is the constant matrix ``A`` or ``−diag(1/τ)``, so the result
is exact). Each eigenvalue ``λ`` gives a time constant and, when complex, a period::

    continuous (dr/dt = g):       τ = −1 / Re λ,      period = 2π / |Im λ|
    discrete (r_{n+1} = cell):    τ = −Δt / ln|μ|,    period = 2π Δt / |arg μ|

Share of the correction carried by each input's history. The hidden state is
driven again with input ``j`` frozen at its training mean (its history erased;
the readout still sees its present value), and the correction recomputed::

    carried_j = 1 − R²(m_frozen_j, m)          (share of the correction's variance lost;
                                                above 1 when the frozen run is worse than none)
    ΔR²_j     = R²(m, target) − R²(m_frozen_j, target)

(R² against the target pooled over components, so the large ones weigh most).

``target`` being the model's own regression target (derivative targets for a
continuous model, discrete flow-map targets for a flow-map model). A row with
every input frozen gives the share carried by memory as a whole.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import torch

from ..closures.base import DiscreteRecurrent
from .surrogate import r_squared
from .trace import Trace, drive_hidden, evaluate_correction

__all__ = ["TimeConstants", "time_constants", "HistoryShare", "history_share"]


@dataclass
class TimeConstants:
    """Eigenvalues of the linearised hidden dynamics and the time constants they give.

    Attributes:
        eigenvalues: complex eigenvalues (continuous rates, or discrete multipliers).
        tau: time constants (``inf`` for a neutral or growing mode), sorted ascending.
        period: oscillation periods (``inf`` for a real eigenvalue), same order.
        discrete: whether the eigenvalues are multipliers of a one-interval map.
        exact: ``True`` when the hidden field is linear in ``r`` (no linearisation).
    """

    eigenvalues: np.ndarray
    tau: np.ndarray
    period: np.ndarray
    discrete: bool
    exact: bool

    def to_dict(self) -> dict:
        return {"tau": [float(t) for t in self.tau], "period": [float(p) for p in self.period],
                "discrete": self.discrete, "exact": self.exact}


def _is_linear_field(closure) -> bool:
    """Whether the hidden field is linear in ``r`` (its time constants are then exact)."""
    from ..closures import RecurrentClosure, ReservoirClosure, ReservoirFlowClosure

    return (isinstance(closure, RecurrentClosure) and closure.form == "leaky") or (
        isinstance(closure, (ReservoirClosure, ReservoirFlowClosure)) and closure.kind == "filter_bank")


def time_constants(closure, trace: Trace, dt: float, keep: np.ndarray | None = None,
                   n_points: int = 200) -> TimeConstants:
    """Time constants of ``closure``'s hidden dynamics (module docstring)."""
    T, B, D = trace.x.shape
    times_ok = np.ones(T, dtype=bool) if keep is None else np.asarray(keep, dtype=bool)
    rows = np.nonzero(np.repeat(times_ok, B))[0]
    rows = rows[np.linspace(0, rows.size - 1, min(n_points, rows.size)).astype(int)]
    idx = torch.as_tensor(rows)
    x = trace.x.reshape(-1, D)[idx]
    u = None if trace.u is None else trace.u.reshape(-1, trace.u.shape[-1])[idx]
    r = trace.r.reshape(-1, trace.r.shape[-1])[idx].detach()
    H = r.shape[-1]
    with torch.enable_grad():
        z = r.clone().requires_grad_(True)
        g = closure.hidden_field(x, z) if isinstance(closure, DiscreteRecurrent) else closure.hidden_field(x, z, u)
        jac = torch.stack([torch.autograd.grad(g[:, i].sum(), z, retain_graph=i + 1 < H)[0]
                           for i in range(H)], dim=1)          # (N, H, H)
    J = jac.mean(0).detach().to(torch.float64).numpy()
    ev = np.linalg.eigvals(J)
    if isinstance(closure, DiscreteRecurrent):
        mod = np.abs(ev)
        with np.errstate(divide="ignore"):
            tau = np.where((mod < 1) & (mod > 0), -dt / np.log(np.where(mod > 0, mod, 1.0)),
                           np.where(mod == 0, 0.0, np.inf))
        ang = np.abs(np.angle(ev))
        period = np.where(ang > 1e-12, 2 * math.pi * dt / np.where(ang > 1e-12, ang, 1.0), np.inf)
    else:
        re = ev.real
        tau = np.where(re < 0, -1.0 / np.where(re < 0, re, -1.0), np.inf)
        im = np.abs(ev.imag)
        period = np.where(im > 1e-12, 2 * math.pi / np.where(im > 1e-12, im, 1.0), np.inf)
    order = np.argsort(tau)
    return TimeConstants(ev[order], tau[order], period[order], isinstance(closure, DiscreteRecurrent), _is_linear_field(closure))


def _pooled_r2(predicted: np.ndarray, target: np.ndarray) -> float:
    """``1 − ΣΣ(ŷ − y)² / ΣΣ(y − ȳ)²`` over all components (large components weigh most)."""
    spread = float(np.sum((target - target.mean(0)) ** 2))
    return 1.0 - float(np.sum((predicted - target) ** 2)) / spread if spread > 0 else math.nan


@dataclass
class HistoryShare:
    """How much of the correction each input's history carries (module docstring).

    Attributes:
        names: input names, then ``'all inputs'``.
        carried: ``1 − R²(m_frozen, m)`` per row.
        r2_full: R² of the full correction against the target.
        r2_frozen: R² of the frozen-history correction against the target, per row.
        target_kind: which target.
    """

    names: list[str]
    carried: list[float]
    r2_full: float
    r2_frozen: list[float]
    target_kind: str

    def to_dict(self) -> dict:
        return {"target": self.target_kind, "r2_full": self.r2_full,
                "rows": {n: {"carried": c, "r2_frozen": f, "r2_drop": self.r2_full - f}
                         for n, c, f in zip(self.names, self.carried, self.r2_frozen)}}


def history_share(model, trace: Trace, dt: float, input_means, input_names, target_rows: np.ndarray,
                  target: np.ndarray, target_kind: str, keep: np.ndarray, solver=None) -> HistoryShare:
    """Freeze each input's history in turn and measure what the correction loses.

    Args:
        model: the hybrid model (its closure has memory).
        trace: the full correction along the data.
        dt: sampling interval.
        input_means: training mean of each input ``[x, u]``.
        input_names: their names.
        target_rows: ``(N,)`` flat indices into ``(T·B)`` where ``target`` applies.
        target: ``(N, D)`` regression target on those rows.
        target_kind: its name (for the report).
        keep: ``(T,)`` mask of sample times after the warm-up.
        solver: integrates a continuous hidden field.
    """
    T, B, D = trace.x.shape
    rows_ok = np.repeat(np.asarray(keep, dtype=bool), B)
    m_full = trace.m.reshape(-1, D).to(torch.float64).numpy()
    r2_full = _pooled_r2(m_full[target_rows], target)
    n_in = len(input_means)
    sets = [{j: float(input_means[j])} for j in range(n_in)] + [{j: float(input_means[j]) for j in range(n_in)}]
    names = list(input_names)[:n_in] + ["all inputs"]
    carried, r2_frozen = [], []
    for frozen in sets:
        r = drive_hidden(model, trace.x, trace.u, dt, solver, frozen)
        m = evaluate_correction(model.closure, trace.x, r, trace.u).reshape(-1, D).to(torch.float64).numpy()
        per = [r_squared(m[rows_ok, i], m_full[rows_ok, i]) for i in range(D)]
        weights = m_full[rows_ok].var(axis=0)
        ok = np.isfinite(per)
        share = 1.0 - float(np.average(np.asarray(per)[ok], weights=weights[ok])) if ok.any() else math.nan
        carried.append(share)
        r2_frozen.append(_pooled_r2(m[target_rows], target))
    return HistoryShare(names, carried, r2_full, r2_frozen, target_kind)
