"""Figures of a correction reading, built without pyplot (Agg when saved).

* ``along_targets.png``: the learned correction and its own regression targets
  (derivative, or discrete flow-map for a flow-map model) along the first test
  trajectory, one panel per component;
* ``against_targets.png``: learned correction against each kind of target, per
  component, with R² and the identity line;
* ``partial_dependence.png``: one panel per (component, input);
* ``surrogate.png``: the sparse surrogate against the learned correction;
* ``memory.png`` (closures with memory): time constants and the share of the
  correction each input's history carries.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

from ..fileio import atomic_path

__all__ = ["rate_unit", "along_targets_figure", "against_targets_figure", "partial_dependence_figure",
           "surrogate_figure", "memory_figure", "save_png"]

_DIMENSIONLESS = ("", "1", "-", "dimensionless")


def _label(name: str, unit: str) -> str:
    return name if unit in ("",) else f"{name} [{unit}]"


def rate_unit(unit: str, time_unit: str) -> str:
    """Units of a rate of change of a quantity in ``unit`` (``'1/time'`` when both are dimensionless)."""
    per = "time" if time_unit in _DIMENSIONLESS else time_unit
    return f"1/{per}" if unit in _DIMENSIONLESS else f"{unit}/{per}"


def _margins(fig: Figure, rows: int, cols: int) -> None:
    """Fixed margins (constrained layout costs seconds per figure on a busy CPU)."""
    w, h = fig.get_size_inches()
    fig.subplots_adjust(left=min(0.3, 0.85 / w), right=0.98, bottom=min(0.3, 0.55 / h), top=1 - min(0.3, 0.6 / h),
                        wspace=0.45 if cols > 1 else 0.2, hspace=0.55 if rows > 1 else 0.2)


def _r2(v) -> str:
    return "n/a" if v is None or not math.isfinite(v) else f"{v:.3f}"


def along_targets_figure(reading, trace, max_components: int = 6) -> Figure:
    """Learned correction and the model's own regression targets over the first test trajectory."""
    D = min(len(reading.state_names), max_components)
    fig = Figure(figsize=(8.0, 2.0 * D + 0.6))
    axes = fig.subplots(D, 1, sharex=True, squeeze=False)[:, 0]
    # the model's own target: discrete flow-map targets for a flow-map model, derivative targets otherwise
    own = reading.comparisons[1] if reading.form == "discrete" else reading.comparisons[0]
    B = trace.x.shape[1]
    first = (own.rows % B) == 0
    t = trace.times
    for i, ax in enumerate(axes):
        ax.plot(own.time[first], own.target[first, i], color="0.7", lw=2.5, label=f"{own.kind} target")
        ax.plot(t, trace.m[:, 0, i].double().numpy(), color="C0", lw=1.0, label="learned correction")
        ax.set_ylabel(_label(f"m_{reading.state_names[i]}",
                             rate_unit(reading.state_units[i], reading.time_unit)))
    axes[-1].set_xlabel(_label("time", "" if reading.time_unit in _DIMENSIONLESS else reading.time_unit))
    axes[0].legend(fontsize=8, loc="upper right")
    fig.suptitle(f"{reading.model_name}: learned correction along the first test trajectory")
    _margins(fig, D, 1)
    return fig


def against_targets_figure(reading, max_components: int = 6, max_points: int = 3000) -> Figure:
    """Scatter of learned correction against each target kind, per component, with R²."""
    D = min(len(reading.state_names), max_components)
    K = len(reading.comparisons)
    fig = Figure(figsize=(3.2 * K, 2.8 * D))
    axes = fig.subplots(D, K, squeeze=False)
    rng = np.random.default_rng(0)
    for k, comp in enumerate(reading.comparisons):
        n = comp.target.shape[0]
        pick = rng.choice(n, max_points, replace=False) if n > max_points else np.arange(n)
        for i in range(D):
            ax = axes[i, k]
            y, m = comp.target[pick, i], comp.learned[pick, i]
            ax.plot(y, m, ".", ms=2, alpha=0.5, color="C0")
            lo, hi = float(min(y.min(), m.min())), float(max(y.max(), m.max()))
            ax.plot([lo, hi], [lo, hi], color="black", lw=0.8)
            unit = rate_unit(reading.state_units[i], reading.time_unit)
            ax.set_xlabel(_label(f"{comp.kind} target", unit), fontsize=8)
            ax.set_ylabel(_label(f"learned m_{reading.state_names[i]}", unit), fontsize=8)
            ax.set_title(f"{reading.state_names[i]}: R² = {_r2(comp.r2[i])}", fontsize=9)
    fig.suptitle(f"{reading.model_name}: learned correction against regression targets")
    _margins(fig, D, K)
    return fig


def partial_dependence_figure(reading, max_components: int = 6, max_inputs: int = 8) -> Figure:
    """Partial-dependence curves, components in rows, inputs in columns."""
    pd = reading.partial
    D = min(len(reading.state_names), max_components)
    J = min(len(pd.input_names), max_inputs)
    fig = Figure(figsize=(2.6 * J + 0.6, 2.2 * D + 0.6))
    axes = fig.subplots(D, J, squeeze=False, sharey="row")
    in_units = list(reading.state_units) + [""] * (len(pd.input_names) - len(reading.state_units))
    for i in range(D):
        for j in range(J):
            ax = axes[i, j]
            ax.plot(pd.grid[j], pd.curves[j, :, i], color="C0")
            if i == D - 1:
                ax.set_xlabel(_label(pd.input_names[j], in_units[j]))
            if j == 0:
                ax.set_ylabel(_label(f"m_{reading.state_names[i]}",
                                     rate_unit(reading.state_units[i], reading.time_unit)), fontsize=8)
    fig.suptitle(f"{reading.model_name}: partial dependence over the training envelope")
    _margins(fig, D, J)
    return fig


def surrogate_figure(reading, values: np.ndarray, predicted: np.ndarray, max_components: int = 6) -> Figure:
    """Sparse surrogate against the learned correction at the surrogate's sample points."""
    D = min(len(reading.state_names), max_components)
    fig = Figure(figsize=(3.2 * D, 3.0))
    axes = fig.subplots(1, D, squeeze=False)[0]
    for i, ax in enumerate(axes):
        ax.plot(values[:, i], predicted[:, i], ".", ms=2, alpha=0.5, color="C1")
        lo, hi = float(values[:, i].min()), float(values[:, i].max())
        ax.plot([lo, hi], [lo, hi], color="black", lw=0.8)
        unit = rate_unit(reading.state_units[i], reading.time_unit)
        ax.set_xlabel(_label(f"learned m_{reading.state_names[i]}", unit), fontsize=8)
        ax.set_ylabel(_label("sparse surrogate", unit), fontsize=8)
        ax.set_title(f"{reading.state_names[i]}: R² = {_r2(reading.surrogate.r2[i])}", fontsize=9)
    fig.suptitle(f"{reading.model_name}: sparse polynomial surrogate")
    _margins(fig, 1, D)
    return fig


def memory_figure(reading) -> Figure:
    """Time constants (log scale) and the share of the correction carried by each input's history."""
    fig = Figure(figsize=(9.0, 3.2))
    ax1, ax2 = fig.subplots(1, 2)
    tau = np.asarray(reading.time_constants.tau)
    finite = np.isfinite(tau) & (tau > 0)
    ax1.plot(np.arange(tau.size)[finite], tau[finite], "o", color="C0")
    ax1.set_yscale("log")
    ax1.set_xlabel("mode (sorted)")
    ax1.set_ylabel(_label("time constant", "" if reading.time_unit in _DIMENSIONLESS else reading.time_unit))
    ax1.set_title("memory time constants", fontsize=9)
    h = reading.history
    ax2.bar(range(len(h.names)), [max(0.0, c) if math.isfinite(c) else 0.0 for c in h.carried], color="C2")
    ax2.set_xticks(range(len(h.names)), h.names, rotation=30, fontsize=8)
    ax2.set_ylabel("share of correction variance lost")
    ax2.set_title("history frozen at its training mean", fontsize=9)
    fig.suptitle(f"{reading.model_name}: memory")
    _margins(fig, 1, 2)
    fig.subplots_adjust(bottom=0.25)
    return fig


def save_png(fig: Figure, path: str | Path, dpi: int = 110) -> Path:
    """Write ``fig`` as PNG atomically."""
    path = Path(path)
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=dpi, format="png")
    return path
