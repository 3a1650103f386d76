"""Figures of a run beyond the assessment's: training curves and hidden-state traces.

Training curves come from the run's TensorBoard events (``RUN_DIR/tb``); hidden
states from driving each memory model with the observed warm-up before the
first forecast start of the test set, then letting it run free for the
assessment horizon. Both are written under ``RUN_DIR/figures/`` and sent to
TensorBoard with their numbers as scalars.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import torch

from ..hybrid import HybridFlowMap, simulate, warm_up
from . import figures as figs

__all__ = ["hidden_traces", "build_run_figures", "run_figures"]


def hidden_traces(model, solver, states: np.ndarray, start: int, n_warm: int, n_h: int, dt: float,
                  start_time: float | None = None) -> np.ndarray:
    """Hidden states ``(n_warm + n_h + 1, H)`` of one memory model around a forecast start.

    Over the warm-up the observations ``states[start − n_warm : start + 1]``
    (``(T, D)``) drive ``r`` one interval at a time (the same driving the
    assessment uses); from ``start`` the model runs free for ``n_h`` intervals,
    its physics on the true clock from ``start_time`` (the start sample's time).
    """
    dtype = next((p.dtype for p in model.parameters()), torch.float64)
    hist = torch.as_tensor(states[start - n_warm: start + 1], dtype=dtype)[:, None, :]   # (T, 1, D)
    solver = None if isinstance(model, HybridFlowMap) else solver
    with torch.no_grad():
        r = model.closure.initial_hidden((1,), dtype)
        rs = [r]
        for i in range(n_warm):
            r = warm_up(model, hist[i: i + 2], dt, solver, r0=r, t0=(i - n_warm) * dt)
            rs.append(r)
        _, r_free = simulate(model, hist[-1], n_h, dt, solver, r0=r, return_hidden=True, time_origin=start_time)
    warm = torch.stack(rs)[:, 0]                      # (n_warm + 1, H)
    free = r_free[1:, 0]                              # (n_h, H)
    return torch.cat([warm, free]).double().numpy()


def build_run_figures(run_path: str | Path, models: dict, test, warm_up_time: float, horizon: float,
                      time_unit: str = "", fit: dict | None = None, order: list[str] | None = None):
    """The training-curve and hidden-state figures of a run, and their numbers.

    Args:
        run_path: the run directory (its ``tb/`` holds the fit's curves).
        models: name → object with ``.model`` and ``.solver`` (a ``ModelEntry``).
        test: the test :class:`~mnemode.data.TrajectorySet`.
        warm_up_time, horizon: in time units, as in the assessment.
        fit: the run's fit records (closed-form fits are listed on the curves figure).
        order: all model names in the assessment's order, so colours match its figures.

    Returns:
        (figure key → Figure, figure key → {scalar tag: value}).
    """
    run_path = Path(run_path)
    dt = test.dt
    styles = figs.model_colours(order or ["physics_only", *models])
    curves = figs.read_training_curves(run_path / "tb") if (run_path / "tb").is_dir() else {}
    closed = {n: (float(d["train_error"]), d.get("fitter")) for n, d in (fit or {}).items()
              if "train/loss" not in curves.get(n, {}) and isinstance(d.get("train_error"), (int, float))}
    built = {"training_curves": figs.training_curves_figure(curves, styles, time_unit, fit_errors=closed)}
    numbers = {"training_curves": {f"final_train_loss/{n}": float(c["train/loss"][1][-1])
                                   for n, c in curves.items() if "train/loss" in c}}
    memory = {n: e for n, e in models.items() if e.model.hidden_size > 0}
    if memory and test.forcing is None:  # forced models would need u(t) along the trace too
        n_h = int(round(horizon / dt))
        n_warm = max(0, min(int(round(warm_up_time / dt)), test.n_times - 1 - n_h))
        start_time = float(test.absolute_times()[n_warm, 0])
        hidden = {n: hidden_traces(e.model, e.solver, test.states[:, 0], n_warm, n_warm, n_h, dt, start_time)
                  for n, e in memory.items()}
        t = (np.arange(n_warm + n_h + 1) - n_warm) * dt
        built["hidden_states"] = figs.hidden_state_figure(t, hidden, styles, time_unit)
        numbers["hidden_states"] = {f"hidden_norm_at_start/{n}": float(np.linalg.norm(h[n_warm]))
                                    for n, h in hidden.items()}
    return built, numbers


def run_figures(run_path: str | Path, models: dict, test, warm_up_time: float, horizon: float,
                time_unit: str = "", writer=None, fit: dict | None = None,
                order: list[str] | None = None) -> dict[str, str]:
    """Draw, save under ``RUN_DIR/figures/`` and log to ``writer`` the run's figures
    (:func:`build_run_figures`); returns figure key → path relative to ``run_path``."""
    built, numbers = build_run_figures(run_path, models, test, warm_up_time, horizon, time_unit, fit, order)
    made = {}
    for key, fig in built.items():
        figs.save_figure(fig, Path(run_path) / "figures" / f"{key}.png")
        made[key] = f"figures/{key}.png"
    if writer is not None:
        figs.log_figures(writer, built, numbers)
    return made
