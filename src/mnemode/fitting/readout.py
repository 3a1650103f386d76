"""Ridge readouts for closures whose hidden field is fixed.

A closure with a fixed hidden field (a reservoir, or a recurrent closure whose
hidden field is held fixed) and a readout linear in features ``φ(x, r)`` is fitted
without backpropagation:

1. drive its hidden state with the observed ``x`` along every whole training
   trajectory (exactly as :func:`mnemode.hybrid.warm_up` does before a forecast),
   giving ``r(t)`` at every sample;
2. form the residual targets the closure must supply,
   ``ρ = ẋ̂ − f0(x)`` (finite-difference derivatives; ``ẋ̂`` itself without
   physics), or ``(x_{n+1} − Ψ0(x_n))/Δt`` on a flow map;
3. drop the first ``ctx.warm_up`` time units of each trajectory (the hidden
   state is still forgetting its start there), and solve the ridge problem::

       min_W  Σ_n ‖φ_n W − ρ̃_n‖² + α N ‖W‖²,    ρ̃ = (ρ − out_offset)/out_scale

   (the bias feature is not penalised; ``α`` is per sample, so it does not
   depend on the amount of data).

The closure's :class:`~mnemode.closures.Scaling` is set from the training data
first (:func:`mnemode.fitting.regression.set_scaling`): inputs by the mean and
standard deviation of ``x``, outputs by the mean and standard deviation of ``ρ``
— the mean carries the missing term's offset.

Reference: A. E. Hoerl, R. W. Kennard, Technometrics 12 (1970) 55–67 (ridge).
"""

from __future__ import annotations

import time
from typing import Sequence

import numpy as np
import torch

from ..forecasting import choose_starts, model_dtype, run_forecasts
from ..validity import rms_scale, validity_times
from ..data import FD_SCHEMES, TrajectorySet
from ..closures.base import LinearReadout
from .base import Fitter
from ..errors import ConfigError, DataError, FitDiverged
from ..hybrid import Forcing, HybridField, HybridFlowMap, warm_up
from ..linalg import ridge_solve_normal
from .regression import set_scaling
from .targets import derivative_targets, flow_map_targets

__all__ = ["ReadoutRidgeFit", "residual_targets", "drive_hidden", "hidden_chunks"]

# penalties tried when neither the fitter nor the closure names one (chosen on validation data)
DEFAULT_ALPHAS = (1e-8, 1e-6, 1e-4)


def _forcing_tensor(data: TrajectorySet, dtype):
    return None if data.forcing is None else torch.as_tensor(data.forcing, dtype=dtype)


def residual_targets(model: HybridField | HybridFlowMap, data: TrajectorySet, scheme: str = "central4"):
    """What the closure must add, kept on the ``(time, batch)`` grid so hidden states line up.

    Continuous model: ``ρ_n = ẋ̂_n − f0(x_n)`` (:func:`~mnemode.fitting.targets.derivative_targets`);
    discrete model: ``ρ_n = (x_{n+1} − Ψ0(x_n)) / Δt``
    (:func:`~mnemode.fitting.targets.flow_map_targets`, discrete form).

    Returns:
        ``(index, inputs, rho)``: the sample indices ``(n,)`` along the time axis,
        the closure inputs ``[x, u]`` there ``(n, B, D + U)`` and the targets
        ``(n, B, D)`` (float64 tensors).
    """
    if isinstance(model, HybridFlowMap):
        inputs, rho = flow_map_targets(data, model.flow_map)
        index = np.arange(data.n_times - 1)
    else:
        inputs, rho = derivative_targets(data, model.physics, scheme)
        offsets = FD_SCHEMES[scheme][0]
        index = np.arange(-min(offsets), data.n_times - max(offsets))
    B = data.n_trajectories
    return index, inputs.reshape(len(index), B, -1), rho.reshape(len(index), B, -1)


def hidden_chunks(model: HybridField | HybridFlowMap, data: TrajectorySet, solver, dtype=None, chunk: int = 2048):
    """Hidden states along whole trajectories driven by the observations, in time chunks.

    Yields ``(first, r)`` with ``r`` the states ``(L, B, H)`` at samples ``first … first + L − 1``.
    The closure starts from its initial hidden state and is driven exactly as by
    :func:`mnemode.hybrid.warm_up` (observed ``x`` linear between samples), one interval
    at a time; only one chunk is held at once.
    """
    dtype = dtype or model_dtype(model)
    states = data.tensor(dtype)
    dt = data.dt
    u = _forcing_tensor(data, dtype)
    forcing = Forcing(float(data.times[0]), dt, u) if u is not None and isinstance(model, HybridField) else None
    closure = model.closure
    with torch.no_grad():
        r = closure.initial_hidden(states.shape[1:-1], dtype)
        if isinstance(model, HybridField) and getattr(closure, "drives_exactly", False):
            # solved exactly, a chunk at a time; each chunk starts from the last state of the one before
            for first in range(0, data.n_times, chunk):
                last = min(data.n_times, first + chunk)
                lo = max(first - 1, 0)
                seg = closure.exact_warm_up(states[lo:last], dt, r0=r, return_all=True,
                                            forcing=None if u is None else u[lo:last])
                seg = seg[first - lo:]
                r = seg[-1]
                yield first, seg
            return
        out, first = [r], 0
        for i in range(data.n_times - 1):
            r = warm_up(model, states[i:i + 2], dt, solver, r0=r, t0=float(data.times[i]), forcing=forcing)
            out.append(r)
            if len(out) == chunk:
                yield first, torch.stack(out)
                first, out = first + chunk, []
        if out:
            yield first, torch.stack(out)


def drive_hidden(model: HybridField | HybridFlowMap, data: TrajectorySet, solver, dtype=None) -> torch.Tensor | None:
    """Hidden states ``(T, B, H)`` along whole trajectories (:func:`hidden_chunks` joined); ``None`` without memory."""
    if model.hidden_size == 0:
        return None
    return torch.cat([r for _, r in hidden_chunks(model, data, solver, dtype)])


class _NormalEquations:
    """``ΦᵀΦ``, ``ΦᵀỸ`` and the target sums a ridge readout and its errors need, accumulated chunk by chunk.

    ``Ỹ`` are the normalised targets ``(ρ − out_offset)/out_scale``; the errors are
    reported in physical units, ``ρ − ρ̂ = out_scale ⊙ (Ỹ − ΦW)``, so that for
    ``Σ_n ‖ρ̂_n − ρ_n‖²`` only ``Σ ỹ²`` per component is needed beside the two products.
    """

    def __init__(self):
        self.gram = self.rhs = self.y2 = self.y_sum = self.y_sq = None
        self.n = 0

    def add(self, phi: torch.Tensor, y: torch.Tensor, y_n: torch.Tensor) -> None:
        phi, y, y_n = phi.to(torch.float64), y.to(torch.float64), y_n.to(torch.float64)
        parts = (phi.T @ phi, phi.T @ y_n, (y_n ** 2).sum(0), y.sum(0), (y ** 2).sum(0))
        if self.gram is None:
            self.gram, self.rhs, self.y2, self.y_sum, self.y_sq = parts
        else:
            for name, value in zip(("gram", "rhs", "y2", "y_sum", "y_sq"), parts):
                setattr(self, name, getattr(self, name) + value)
        self.n += phi.shape[0]

    def relative_error(self, w: torch.Tensor, out_scale: torch.Tensor) -> float:
        """:func:`~mnemode.fitting.regression.relative_error` of the readout ``w`` on the accumulated data."""
        if self.n == 0:
            return float("nan")
        resid = (torch.einsum("pc,pq,qc->c", w, self.gram, w) - 2 * (w * self.rhs).sum(0) + self.y2)
        err = float((out_scale.to(torch.float64) ** 2 * resid.clamp_min(0)).sum())
        spread = float((self.y_sq - self.y_sum ** 2 / self.n).sum())
        return float(np.sqrt(err / max(spread, 1e-300)))


def _normal_equations(model, data: TrajectorySet, solver, scheme, discard: int, dtype, targets=None):
    """Readout features and targets past the hidden state's ``discard``-sample transient, accumulated in chunks.

    ``targets`` are :func:`residual_targets` of ``data`` if already computed. The features
    are never held for the whole data set at once, so memory does not grow with its length
    beyond the targets themselves.
    """
    index, inputs, rho = targets if targets is not None else residual_targets(model, data, scheme)
    keep = index >= discard
    if not keep.any():
        raise DataError("training data", f"trajectories of {data.n_times} samples leave nothing after the "
                        f"{discard}-sample warm-up of the hidden state",
                        "use longer trajectories or a shorter warm_up.")
    D, scale = model.dim, model.closure.scaling
    position = np.full(data.n_times, -1)
    position[index] = np.arange(len(index))
    acc = _NormalEquations()
    if model.hidden_size:
        chunks = ((first, r, first + r.shape[0]) for first, r in hidden_chunks(model, data, solver, dtype))
    else:
        chunks = ((k, None, min(k + 2048, data.n_times)) for k in range(0, data.n_times, 2048))
    for first, r, last in chunks:
        rows = position[first:last]
        sel = np.nonzero((rows >= 0) & (np.arange(first, first + len(rows)) >= discard))[0]
        if sel.size == 0:
            continue
        at = torch.as_tensor(rows[sel])
        x_in = inputs[at].to(dtype)
        x, u = x_in[..., :D], (x_in[..., D:] if x_in.shape[-1] > D else None)
        y = rho[at].to(dtype)
        with torch.no_grad():
            phi = model.closure.readout_features(x, None if r is None else r[torch.as_tensor(sel)], u)
            phi, y = phi.reshape(-1, phi.shape[-1]), y.reshape(-1, y.shape[-1])
            acc.add(phi, y, scale.outputs_inverse(y))
    return acc


class ReadoutRidgeFit(Fitter):
    """Fit a closure's linear readout by ridge regression on observation-driven hidden states.

    The maths is in the module docstring. Works for closures that expose
    ``readout_features(x, r, u)`` and ``set_readout(W)`` with a linear readout:
    :class:`~mnemode.closures.ReservoirClosure`, and
    :class:`~mnemode.closures.RecurrentClosure` with ``readout='linear'`` (its
    hidden field is then kept as initialised, e.g. a filter bank).

    A closure that lists several time-constant ranges
    (``time_constant_candidates``, e.g. ``RecurrentClosure(time_constants=[[0.1, 2],
    [0.1, 10]])``) gets one ridge readout per range, and the range whose forecasts
    on the validation data stay valid longest is kept: ``val_windows`` forecasts of
    ``val_horizon`` time units after the run's warm-up, scored by their median
    validity time at threshold ``gamma`` (ties by mean). A derivative-target fit
    cannot make this choice itself: slow states that the warm-up cannot
    reconstruct still lower the residual error while shortening the forecasts.

    Args:
        ridge: ridge penalty per sample, or a list of candidates of which the one
            with the smallest validation error is kept; ``None`` uses the closure's
            ``ridge`` attribute if it has one, else ``DEFAULT_ALPHAS``.
        scheme: finite-difference scheme for ``ẋ̂`` (see :data:`mnemode.data.FD_SCHEMES`).
        val_windows, val_horizon, gamma: the forecasts that choose among time-constant
            ranges (unused when the closure has one range; the horizon is shortened to what
            the validation trajectories hold after the warm-up).

    ``fit`` returns ``train_error`` and ``val_error`` as relative RMS errors of the
    residual targets (:func:`mnemode.fitting.regression.relative_error`: 0 is
    perfect, 1 no better than the mean), ``ridge``, ``n_samples`` and
    ``fit_seconds``; with candidates also ``time_constants`` (the range kept) and
    ``time_constant_scores`` (median validation validity of each range).
    """

    def __init__(self, ridge: float | Sequence[float] | None = None, scheme: str = "central4",
                 val_windows: int = 64, val_horizon: float = 25.0, gamma: float = 0.5):
        self.ridge, self.scheme = ridge, scheme
        self.val_windows, self.val_horizon, self.gamma = int(val_windows), float(val_horizon), float(gamma)

    def _alphas(self, closure) -> list[float]:
        a = self.ridge
        if a is None:
            a = closure.ridge if closure.ridge is not None else DEFAULT_ALPHAS
        try:
            values = [float(v) for v in a] if hasattr(a, "__len__") and not isinstance(a, str) else [float(a)]
        except (TypeError, ValueError):
            values = []
        if not values or any(not np.isfinite(v) or v < 0 for v in values):
            raise ConfigError("ridge", f"is {a!r}; expected a penalty ≥ 0 or a list of them",
                              "use e.g. ridge: 1e-6 or ridge: [1e-8, 1e-6, 1e-4].")
        return values

    def fit(self, model, train: TrajectorySet, val: TrajectorySet | None, ctx) -> dict:
        t0 = time.perf_counter()
        closure = model.closure
        if not (isinstance(closure, LinearReadout) and closure.has_linear_readout):
            name = type(closure).__name__ if closure is not None else "no closure"
            raise ConfigError("fit", f"ReadoutRidgeFit needs a closure with a linear readout over fixed features; "
                              f"got {name}", "use a ReservoirClosure or a RecurrentClosure with readout='linear', "
                              "or fit with TrajectoryFit.")
        targets = residual_targets(model, train, self.scheme)
        _, inputs, rho = targets
        set_scaling(closure, inputs.reshape(-1, inputs.shape[-1]), rho.reshape(-1, rho.shape[-1]))
        val_targets = None if val is None else residual_targets(model, val, self.scheme)
        candidates = list(getattr(closure, "time_constant_candidates", None) or [])
        if len(candidates) < 2:
            out = self._fit_readout(model, train, val, ctx, targets, val_targets)
        else:
            out = self._choose_time_constants(model, candidates, train, val, ctx, targets, val_targets)
        out["fit_seconds"] = time.perf_counter() - t0
        return out

    def _fit_readout(self, model, train, val, ctx, targets, val_targets) -> dict:
        """Ridge readouts for each penalty; the best on validation data is set. Returns the errors."""
        closure = model.closure
        dtype = model_dtype(model)
        discard = int(round(ctx.warm_up / train.dt)) if model.hidden_size else 0
        fit_eq = _normal_equations(model, train, ctx.solver, self.scheme, discard, dtype, targets)
        val_eq = None if val is None else _normal_equations(model, val, ctx.solver, self.scheme, discard, dtype,
                                                             val_targets)
        out_scale = closure.scaling.out_scale
        best = None
        for alpha in self._alphas(closure):
            w = ridge_solve_normal(fit_eq.gram, fit_eq.rhs, alpha * fit_eq.n, penalise_last=False)
            train_err = fit_eq.relative_error(w, out_scale)
            val_err = val_eq.relative_error(w, out_scale) if val_eq is not None else float("nan")
            score = val_err if val_eq is not None else train_err
            if not np.isfinite(score):
                continue
            if best is None or score < best[0]:
                best = (score, alpha, w, train_err, val_err)
        if best is None:
            raise FitDiverged(f"ridge readout of {ctx.name}", "every penalty gave a non-finite fit",
                              "check the data for outliers or raise the ridge penalty (ridge).")
        _, alpha, w, train_err, val_err = best
        closure.set_readout(w)
        return {"train_error": train_err, "val_error": val_err, "ridge": alpha, "n_samples": int(fit_eq.n)}

    def _choose_time_constants(self, model, candidates, train, val, ctx, targets, val_targets) -> dict:
        """A readout per time-constant range; the range whose validation forecasts last longest is kept."""
        closure = model.closure
        data = val if val is not None else train
        dt = data.dt
        n_warm = int(round(ctx.warm_up / dt)) if model.hidden_size else 0
        # as long as asked, or as the data allow after the warm-up (short trajectories still get a choice)
        n_after = max(1, min(int(round(self.val_horizon / dt)), data.n_times - 1 - n_warm))
        starts = choose_starts(data.n_times, data.n_trajectories, n_warm, n_after, self.val_windows,
                               what="validation data", fix="shorten val_horizon or warm_up, or use longer "
                               "validation trajectories.")
        truth = starts.windows(data.states, n_after)
        scale, times = rms_scale(data.states), data.absolute_times()
        best, scores = None, {}
        for bounds in candidates:
            closure.set_time_constants(bounds)
            out = self._fit_readout(model, train, val, ctx, targets, val_targets)
            fc = run_forecasts(model, ctx.solver, data.states, starts, n_warm, n_after, dt, data.forcing,
                               times=times)
            valid, _ = validity_times(fc.states, truth, dt, self.gamma, scale)  # non-finite: invalid at once
            score = (float(np.median(valid)), float(np.mean(valid)))
            scores[f"{bounds[0]:g}-{bounds[1]:g}"] = score[0]
            if best is None or score > best[0]:
                best = (score, bounds, out, {k: v.detach().clone() for k, v in closure.state_dict().items()})
        _, bounds, out, state = best
        closure.load_state_dict(state)  # the rates carry the range kept
        out.update(time_constants=list(bounds), time_constant_scores=scores)
        return out
