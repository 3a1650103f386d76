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

from ..forecasting import model_dtype
from ..data import FD_SCHEMES, TrajectorySet
from ..closures.base import LinearReadout
from .base import Fitter
from ..errors import ConfigError, DataError, FitDiverged
from ..hybrid import Forcing, HybridField, HybridFlowMap, warm_up
from ..linalg import ridge_solve
from .regression import relative_error, set_scaling
from .targets import derivative_targets, flow_map_targets

__all__ = ["ReadoutRidgeFit", "residual_targets", "drive_hidden"]

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


def drive_hidden(model: HybridField | HybridFlowMap, data: TrajectorySet, solver, dtype=None) -> torch.Tensor | None:
    """Hidden states ``(T, B, H)`` along whole trajectories driven by the observations.

    The closure starts from its initial hidden state and is driven exactly as by
    :func:`mnemode.hybrid.warm_up` (observed ``x`` linear between samples), one
    interval at a time. ``None`` for a memoryless model.
    """
    if model.hidden_size == 0:
        return None
    dtype = dtype or model_dtype(model)
    states = data.tensor(dtype)
    dt = data.dt
    u = _forcing_tensor(data, dtype)
    forcing = Forcing(float(data.times[0]), dt, u) if u is not None and isinstance(model, HybridField) else None
    with torch.no_grad():
        r = model.closure.initial_hidden(states.shape[1:-1], dtype)
        out = [r]
        for i in range(data.n_times - 1):
            r = warm_up(model, states[i:i + 2], dt, solver, r0=r, t0=float(data.times[i]), forcing=forcing)
            out.append(r)
    return torch.stack(out)


def _features(model, data: TrajectorySet, solver, scheme, discard: int, dtype, targets=None):
    """Readout features and targets at the samples past the hidden state's ``discard``-sample transient.

    ``targets`` are :func:`residual_targets` of ``data`` if already computed.
    """
    index, inputs, rho = targets if targets is not None else residual_targets(model, data, scheme)
    r_all = drive_hidden(model, data, solver, dtype)
    keep = index >= discard
    if not keep.any():
        raise DataError("training data", f"trajectories of {data.n_times} samples leave nothing after the "
                        f"{discard}-sample warm-up of the hidden state",
                        "use longer trajectories or a shorter warm_up.")
    index, inputs, rho = index[keep], inputs[keep].to(dtype), rho[keep].to(dtype)
    D = model.dim
    x, u = inputs[..., :D], (inputs[..., D:] if inputs.shape[-1] > D else None)
    with torch.no_grad():
        r = r_all[index] if r_all is not None else None
        phi = model.closure.readout_features(x, r, u)
    return phi.reshape(-1, phi.shape[-1]), rho.reshape(-1, rho.shape[-1])


class ReadoutRidgeFit(Fitter):
    """Fit a closure's linear readout by ridge regression on observation-driven hidden states.

    The maths is in the module docstring. Works for closures that expose
    ``readout_features(x, r, u)`` and ``set_readout(W)`` with a linear readout:
    :class:`~mnemode.closures.ReservoirClosure`, and
    :class:`~mnemode.closures.RecurrentClosure` with ``readout='linear'`` (its
    hidden field is then kept as initialised, e.g. a filter bank).

    Args:
        ridge: ridge penalty per sample, or a list of candidates of which the one
            with the smallest validation error is kept; ``None`` uses the closure's
            ``ridge`` attribute if it has one, else ``DEFAULT_ALPHAS``.
        scheme: finite-difference scheme for ``ẋ̂`` (see :data:`mnemode.data.FD_SCHEMES`).

    ``fit`` returns ``train_error`` and ``val_error`` as relative RMS errors of the
    residual targets (:func:`mnemode.fitting.regression.relative_error`: 0 is
    perfect, 1 no better than the mean), ``ridge``, ``n_samples`` and ``fit_seconds``.
    """

    def __init__(self, ridge: float | Sequence[float] | None = None, scheme: str = "central4"):
        self.ridge, self.scheme = ridge, scheme

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
        dtype = model_dtype(model)
        targets = residual_targets(model, train, self.scheme)
        _, inputs, rho = targets
        set_scaling(closure, inputs.reshape(-1, inputs.shape[-1]), rho.reshape(-1, rho.shape[-1]))
        discard = int(round(ctx.warm_up / train.dt)) if model.hidden_size else 0
        phi, y = _features(model, train, ctx.solver, self.scheme, discard, dtype, targets)
        scale = closure.scaling
        y_n = scale.outputs_inverse(y)
        val_phi = val_rho = None
        if val is not None:
            val_phi, val_rho = _features(model, val, ctx.solver, self.scheme, discard, dtype)
        best = None
        for alpha in self._alphas(closure):
            w = ridge_solve(phi, y_n, alpha * phi.shape[0], penalise_last=False)
            train_err = relative_error(scale.outputs(phi @ w), y)
            val_err = relative_error(scale.outputs(val_phi @ w), val_rho) if val_phi is not None else float("nan")
            score = val_err if val_phi is not None else train_err
            if not np.isfinite(score):
                continue
            if best is None or score < best[0]:
                best = (score, alpha, w, train_err, val_err)
        if best is None:
            raise FitDiverged(f"ridge readout of {ctx.name}", "every penalty gave a non-finite fit",
                              "check the data for outliers or raise the ridge penalty (ridge).")
        _, alpha, w, train_err, val_err = best
        closure.set_readout(w)
        return {"train_error": train_err, "val_error": val_err, "ridge": alpha,
                "n_samples": int(phi.shape[0]), "fit_seconds": time.perf_counter() - t0}
