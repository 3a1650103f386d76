"""Partial dependence of each correction component on each input, over the training envelope.

For input ``j`` (an observed component or a forcing input) and a grid value ``v``::

    PD_ij(v) = (1/N) Σ_n m_i(z_n with z_nj := v)

averaged over ``N`` sample points ``z_n`` of the test data (with their driven hidden
states for a closure with memory, which are held as they are: the curve shows the
*instantaneous* dependence of the readout on that input). The grid spans the
training data's range of the input, where the closure has seen data.

Reference: J. H. Friedman, "Greedy function approximation: a gradient boosting
machine", Ann. Statist. 29 (2001) 1189–1232, §8.2.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from .trace import Trace, evaluate_correction

__all__ = ["PartialDependence", "partial_dependence"]


@dataclass
class PartialDependence:
    """Curves ``PD_ij`` for every input ``j`` and component ``i``.

    Attributes:
        input_names: names of the inputs (observed, then forcing).
        grid: ``(n_inputs, n_grid)`` grid values.
        curves: ``(n_inputs, n_grid, n_components)`` averaged correction.
        spread: ``(n_inputs, n_components)`` max − min of each curve (how much the
            correction moves with that input alone).
    """

    input_names: list[str]
    grid: np.ndarray
    curves: np.ndarray
    spread: np.ndarray

    def to_dict(self, component_names) -> dict:
        return {name: {c: float(self.spread[j, i]) for i, c in enumerate(component_names)}
                for j, name in enumerate(self.input_names)}


def partial_dependence(closure, trace: Trace, envelope: dict[str, list[float]], input_names,
                       n_grid: int = 41, n_points: int = 400, keep: np.ndarray | None = None,
                       seed: int = 0) -> PartialDependence:
    """Partial-dependence curves of ``closure``'s correction (module docstring).

    Args:
        closure: the fitted closure.
        trace: correction traced along the test data (points and hidden states).
        envelope: ``{input name: [min, max]}`` of the training data.
        input_names: observed names then forcing names, in input order.
        n_grid: grid values per input.
        n_points: sample points averaged over (a random subset).
        keep: ``(T,)`` mask of usable sample times (after the warm-up), or ``None``.
        seed: chooses the subset.
    """
    T, B, D = trace.x.shape
    times_ok = np.ones(T, dtype=bool) if keep is None else np.asarray(keep, dtype=bool)
    rows = np.nonzero(np.repeat(times_ok, B))[0]
    rng = np.random.default_rng(seed)
    if rows.size > n_points:
        rows = np.sort(rng.choice(rows, n_points, replace=False))
    idx = torch.as_tensor(rows)
    x = trace.x.reshape(-1, D)[idx]
    u = None if trace.u is None else trace.u.reshape(-1, trace.u.shape[-1])[idx]
    r = None if trace.r is None else trace.r.reshape(-1, trace.r.shape[-1])[idx]
    n_in = D + (0 if u is None else u.shape[-1])
    names = list(input_names)[:n_in]
    grid = np.zeros((n_in, n_grid))
    curves = np.zeros((n_in, n_grid, D))
    for j in range(n_in):
        lo, hi = envelope.get(names[j], [None, None])
        column = x[:, j] if j < D else u[:, j - D]
        lo = float(column.min()) if lo is None else float(lo)
        hi = float(column.max()) if hi is None else float(hi)
        grid[j] = np.linspace(lo, hi, n_grid)
        values = torch.as_tensor(grid[j], dtype=x.dtype)
        # every (grid value, point) pair in one batch: (n_grid, N, ·)
        xs = x.expand(n_grid, *x.shape).clone()
        us = None if u is None else u.expand(n_grid, *u.shape).clone()
        if j < D:
            xs[..., j] = values[:, None]
        else:
            us[..., j - D] = values[:, None]
        rs = None if r is None else r.expand(n_grid, *r.shape)
        m = evaluate_correction(closure, xs, rs, us)
        curves[j] = m.mean(dim=1).to(torch.float64).numpy()
    spread = curves.max(axis=1) - curves.min(axis=1)
    return PartialDependence(names, grid, curves, spread)
