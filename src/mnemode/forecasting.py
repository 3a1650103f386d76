"""Forecasts and free runs of hybrid models from points along observed trajectories.

A forecast starts at sample ``s`` of test trajectory ``b``: the model's hidden
state is first driven by the ``n_warm + 1`` observed samples ``x_{s−n_warm} .. x_s``
(:func:`mnemode.hybrid.warm_up`), then the model free-runs from ``(x_s, r)`` for
``n_horizon`` intervals (:func:`mnemode.hybrid.simulate`). Every model gets the
same starts and the same warm-up history, so scores are comparable; memoryless
models ignore the history. A long free run is the same with a longer horizon,
of which a transient is discarded. Given the samples' true times, the physics of
a continuous model sees each forecast's own clock: the true time of its start
sample at the start (``time_origin`` of :func:`mnemode.hybrid.simulate`).

These functions only simulate: they never change a model's parameters. Fitting
(validation forecasts) and assessment (test forecasts) both use them, so they sit
below both stages.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
import torch

from .data import take_windows
from .errors import DataError
from .hybrid import Forcing, HybridField, HybridFlowMap, simulate, warm_up
from .solvers import Solver

__all__ = ["Starts", "choose_starts", "model_dtype", "run_forecasts", "RunOutcome"]

# Numerical failures a solver can raise on a run that blows up (torchdiffeq's step
# underflow is an AssertionError; step budgets and NaN checks are RuntimeErrors).
_NUMERICAL_FAILURES = (RuntimeError, AssertionError, FloatingPointError, OverflowError)


@dataclass
class Starts:
    """Forecast initial conditions: trajectory ``trajectory[i]``, sample ``index[i]``."""

    trajectory: np.ndarray
    index: np.ndarray

    def __len__(self) -> int:
        return int(self.trajectory.size)

    def windows(self, states: np.ndarray, n_after: int) -> np.ndarray:
        """The observed states from each start on: ``(n_after + 1, len(self), D)`` of ``states (T, B, D)``."""
        return np.stack([states[s: s + n_after + 1, b] for b, s in zip(self.trajectory, self.index)], axis=1)

    def subset(self, k: int) -> "Starts":
        """``k`` of these starts, evenly spread over them."""
        k = max(1, min(int(k), len(self)))
        pick = np.floor((np.arange(k) + 0.5) * len(self) / k).astype(int)
        return Starts(self.trajectory[pick], self.index[pick])


def choose_starts(n_times: int, n_trajectories: int, n_before: int, n_after: int, n_starts: int,
                  what: str = "test set",
                  fix: str = "shorten assess.horizon or warm_up, or use longer test trajectories.") -> Starts:
    """``n_starts`` start samples, evenly spaced along the concatenated test trajectories.

    A start ``s`` needs ``n_before`` samples of history before it and ``n_after``
    samples after it, so ``s ∈ [n_before, n_times − 1 − n_after]`` on every
    trajectory. The admissible positions of all trajectories are laid end to end
    and the starts placed at the centres of ``n_starts`` equal parts, which
    spreads them over trajectories and over time. If fewer positions exist than
    requested, every admissible position is used.

    Raises:
        DataError: the trajectories are too short for the history plus the horizon.
    """
    per_traj = n_times - n_before - n_after
    if per_traj <= 0:
        raise DataError(what, f"trajectories of {n_times} samples are too short for a warm-up of "
                        f"{n_before} samples plus a forecast of {n_after} samples", fix)
    total = per_traj * n_trajectories
    n = min(int(n_starts), total)
    pos = np.floor((np.arange(n) + 0.5) * total / n).astype(int)
    return Starts(pos // per_traj, n_before + pos % per_traj)


def model_dtype(model) -> torch.dtype:
    """The floating dtype a model computes in: its closure's tensors' dtype, else float64.

    Physics fields hold plain floats (dtype-agnostic), so only a learned closure
    fixes the dtype; a closure with no tensors (or no closure) runs in float64.
    """
    closure = model.closure
    if closure is not None:
        for t in itertools.chain(closure.parameters(), closure.buffers()):
            if t.is_floating_point():
                return t.dtype
    return torch.float64


@dataclass
class RunOutcome:
    """Observed states of a set of runs ``(n_steps + 1, N, D)`` (float64) and what went wrong, if anything."""

    states: np.ndarray
    failure: str | None = None

    @property
    def finite(self) -> bool:
        return self.failure is None and bool(np.all(np.isfinite(self.states)))


def run_forecasts(model: HybridField | HybridFlowMap, solver: Solver | None, states: np.ndarray, starts: Starts,
                  n_warm: int, n_steps: int, dt: float, forcing: np.ndarray | None = None,
                  batch_size: int | None = None, on_batch=None, times: np.ndarray | None = None) -> RunOutcome:
    """Warm up on ``n_warm`` intervals of observed history, then free-run ``n_steps`` intervals.

    Args:
        model: continuous or discrete hybrid model.
        solver: integrates a continuous model (ignored for a discrete one).
        states: observed test states ``(T, B, D)``.
        starts: where the forecasts begin.
        n_warm: warm-up intervals before each start (the history is ``n_warm + 1`` samples).
        n_steps: forecast intervals after each start.
        dt: sampling interval of ``states``.
        forcing: forcing inputs ``(T, B, U)`` aligned with ``states`` or ``None``;
            a continuous model is driven by them during warm-up and forecast
            (the window must then lie inside the data).
        batch_size: forecasts run together (all at once when ``None``).
        on_batch: called with the number of forecasts after each batch (progress).
        times: true sample times ``(T, B)`` of ``states``
            (:meth:`~mnemode.data.TrajectorySet.absolute_times`); the physics then
            sees ``times[s, b] + t`` along a forecast from sample ``s`` of
            trajectory ``b``. ``None``: its clock reads 0 at every start.

    Returns:
        A :class:`RunOutcome` whose ``states`` start at ``x_s`` (row 0). A
        numerical failure inside the solver fills the batch with NaN and records
        the message instead of raising: a model that blows up is a result.
    """
    dtype = model_dtype(model)
    data = torch.as_tensor(np.asarray(states), dtype=dtype)
    n = len(starts)
    size = n if batch_size is None else max(1, int(batch_size))
    out = np.full((n_steps + 1, n, data.shape[-1]), np.nan)
    failure = None
    origins = None if times is None else np.asarray(times, dtype=np.float64)[starts.index, starts.trajectory]
    for lo in range(0, n, size):
        sl = slice(lo, min(n, lo + size))
        traj = torch.as_tensor(starts.trajectory[sl])
        first = torch.as_tensor(starts.index[sl] - n_warm)
        history = take_windows(data, traj, first, n_warm + 1)
        u = None
        if forcing is not None and isinstance(model, HybridField):
            u = Forcing(-n_warm * dt, dt, take_windows(torch.as_tensor(np.asarray(forcing), dtype=dtype), traj,
                                                       first, n_warm + n_steps + 1))
        try:
            with torch.no_grad():
                r0 = warm_up(model, history, dt, solver, t0=-n_warm * dt, forcing=u) if model.hidden_size else None
                x = simulate(model, history[-1], n_steps, dt, solver, r0=r0, t0=0.0, forcing=u,
                             time_origin=None if origins is None else origins[sl])
            out[:, sl] = x.detach().to(torch.float64).cpu().numpy()
        except _NUMERICAL_FAILURES as exc:  # a blow-up is a result, not a crash
            failure = f"{type(exc).__name__}: {exc}"
            out[0, sl] = history[-1].to(torch.float64).cpu().numpy()
        if on_batch is not None:
            on_batch(sl.stop - sl.start)
    return RunOutcome(out, failure)
