"""Does the missing term need memory? A regression test on the data, before any unroll.

The residual ``ρ = ẋ̂ − f0(x)`` (finite-difference derivatives; ``ẋ̂`` without
physics) is what a closure must supply; when the sampling is too coarse for
finite differences (:mod:`~mnemode.fitting.sampling_diagnostic`), the flow-map
residual ``ρ_n = (x_{n+1} − Ψ0(x_n))/Δt`` takes its place (``targets='flow_map'``). Two regressions on the same samples:

1. **memoryless** — the best function of the present state: random Fourier
   features of ``x̃`` with a ridge readout
   (:class:`~mnemode.closures.RandomFeatureClosure`, length-scale and penalty
   chosen on validation data);
2. **with history** — the same features plus the recent history of ``x``,
   summarised by a bank of leaky integrators of each component (exponential
   moving averages with time constants ``τ_k``, log-spaced)::

       h_{k,n+1} = a_k h_{k,n} + (1 − a_k) x_{n+1},     a_k = exp(−Δt/τ_k)

   fitted jointly by ridge regression (penalty chosen on validation data).

On validation data, the fraction of the residual's variance each explains is
``E = 1 − Σ‖ρ̂ − ρ‖² / Σ‖ρ − ρ̄‖²``. The gain ``E_history − E_memoryless`` is what
the past adds over the best function of the present, and

    G = (E_history − E_memoryless) / (1 − E_memoryless)

is the fraction of the memoryless model's *remaining* error that the past
explains. The recommendation is ``'memory'`` when ``G ≥ threshold`` (0.5 by
default: history removes at least half of what the best memoryless closure
leaves), otherwise ``'memoryless'``. ``G`` does not depend on how much of the
residual the present state already explains, so it means the same with physics
(the residual is the missing term) and without (the residual is all of ẋ).

References: A. Rahimi, B. Recht, NIPS 2007 (random features); A. E. Hoerl,
R. W. Kennard, Technometrics 12 (1970) (ridge); C. W. J. Granger, Econometrica
37 (1969) 424–438 (predictability gained from the past of a series).
"""

from __future__ import annotations

import math

import numpy as np
import torch

from ..closures.random_features import RandomFeatureClosure
from ..data import FD_SCHEMES, TrajectorySet
from ..errors import DataError
from .regression import relative_error, set_scaling
from ..linalg import ridge_solve
from ..solvers import RK4, FlowMap
from .targets import derivative_targets, flow_map_targets

__all__ = ["memory_need", "leaky_averages"]


def leaky_averages(states: np.ndarray, dt: float, time_constants) -> np.ndarray:
    """Exponential moving averages of each component along axis 0.

    ``h_{k,0} = x_0`` and ``h_{k,n+1} = a_k h_{k,n} + (1 − a_k) x_{n+1}`` with
    ``a_k = exp(−Δt/τ_k)``.

    Args:
        states: ``(T, B, D)`` samples.
        dt: sampling interval.
        time_constants: ``K`` time constants ``τ_k``.

    Returns:
        ``(T, B, K·D)``, ordered time constant by time constant.
    """
    x = np.asarray(states, dtype=np.float64)
    a = np.exp(-dt / np.asarray(time_constants, dtype=np.float64))[:, None, None]   # (K, 1, 1)
    h = np.repeat(x[0][None], len(a), axis=0)                                       # (K, B, D)
    out = np.empty((x.shape[0], len(a)) + x.shape[1:])
    out[0] = h
    for n in range(1, x.shape[0]):
        h = a * h + (1.0 - a) * x[n][None]
        out[n] = h
    return np.moveaxis(out, 1, 2).reshape(x.shape[0], x.shape[1], -1)


def _explained(pred: torch.Tensor, target: torch.Tensor) -> float:
    return 1.0 - relative_error(pred, target) ** 2


def memory_need(train: TrajectorySet, val: TrajectorySet | None, physics, *, scheme: str = "central4",
                time_constants=None, n_filters: int = 6, threshold: float = 0.5, n_features: int = 300,
                lengthscale=(1.0, 2.0, 4.0), ridge=(1e-8, 1e-6, 1e-4), seed: int = 0,
                targets: str = "derivative") -> dict:
    """How much of the residual the present state explains, and how much more its history adds.

    Args:
        train, val: trajectory sets (``val = None``: the last 30 % of each training
            trajectory is held out).
        physics: the nominal field ``f0(t, x[, u])``, or ``None`` (data-only).
        scheme: finite-difference scheme for ``ẋ̂``.
        targets: ``'derivative'`` (finite differences) or ``'flow_map'``
            (``(x_{n+1} − Ψ0(x_n))/Δt``, for coarse sampling).
        time_constants: ``(τ_min, τ_max)`` of the history filters; default
            ``(5 Δt, 500 Δt)`` capped at a tenth of the trajectory length.
        n_filters: filters per component.
        threshold: share of the memoryless model's remaining error that history must
            explain for memory to be recommended.
        n_features, lengthscale, ridge, seed: the random-feature regression
            (lists are searched on the validation data).

    Returns:
        plain data: ``memoryless_explained``, ``history_explained``,
        ``additional_explained``, ``remaining_explained`` (fractions, validation
        data), ``recommendation`` (``'memory'`` or ``'memoryless'``), ``threshold``,
        ``time_constants``, ``lengthscale``, ``ridge``, ``history_ridge``,
        ``n_train`` and ``n_val`` (samples used), ``targets``.

    Raises:
        DataError: trajectories too short for the filters' transient.
    """
    if val is None:
        train, val = train.split_by_time([0.7, 0.3])
    dt = train.dt
    if time_constants is None:
        span = min(train.duration, val.duration)
        time_constants = (5 * dt, max(5 * dt, min(500 * dt, span / 10)))
    taus = np.geomspace(float(time_constants[0]), float(time_constants[1]), int(n_filters))
    discard = int(round(2 * taus[-1] / dt))

    if targets not in ("derivative", "flow_map"):
        raise ValueError(f"targets {targets!r} is not 'derivative' or 'flow_map'")
    flow = None if physics is None else FlowMap(physics, dt, RK4(dt / 10))

    def samples(ts: TrajectorySet, what: str):
        if targets == "flow_map":
            with torch.no_grad():
                inputs, rho = flow_map_targets(ts, flow, true_time=True)
            index = np.arange(ts.n_times - 1)
        else:
            inputs, rho = derivative_targets(ts, physics, scheme)
            offsets = FD_SCHEMES[scheme][0]
            index = np.arange(-min(offsets), ts.n_times - max(offsets))
        keep = index >= discard
        if not keep.any():
            raise DataError(what, f"trajectories of {ts.n_times} samples are shorter than the history filters' "
                            f"transient ({discard} samples = 2 τ_max)",
                            "use longer trajectories or smaller time_constants.")
        B = ts.n_trajectories
        hist = leaky_averages(ts.states, dt, taus)[index[keep]]
        inputs = inputs.reshape(len(index), B, -1)[keep].reshape(-1, inputs.shape[-1])
        rho = rho.reshape(len(index), B, -1)[keep].reshape(-1, rho.shape[-1])
        return inputs, rho, torch.as_tensor(hist.reshape(-1, hist.shape[-1]))

    x_tr, y_tr, h_tr = samples(train, "training data")
    x_va, y_va, h_va = samples(val, "validation data")

    closure = RandomFeatureClosure(train.dim, forcing_dim=x_tr.shape[1] - train.dim, n_features=n_features,
                                   lengthscale=list(np.atleast_1d(lengthscale)), ridge=list(np.atleast_1d(ridge)),
                                   seed=seed).double()
    set_scaling(closure, x_tr, y_tr)
    info = closure.fit_regression(x_tr, y_tr, val_inputs=x_va, val_targets=y_va)
    s = closure.scaling
    with torch.no_grad():
        phi_tr, phi_va = (closure.features(s.inputs(x)) for x in (x_tr, x_va))
        explained_ml = _explained(s.outputs(phi_va @ closure.readout), y_va)
        h_mean, h_std = h_tr.mean(0), h_tr.std(0).clamp_min(1e-12)
        # history features first, so the random features' bias column stays last (unpenalised)
        f_tr = torch.cat(((h_tr - h_mean) / h_std, phi_tr), dim=-1)
        f_va = torch.cat(((h_va - h_mean) / h_std, phi_va), dim=-1)
        yt = s.outputs_inverse(y_tr)
        best = (-math.inf, None)
        for lam in np.atleast_1d(ridge):
            w = ridge_solve(f_tr, yt, float(lam) * f_tr.shape[0], penalise_last=False)
            e = _explained(s.outputs(f_va @ w), y_va)
            if e > best[0]:
                best = (e, float(lam))
    explained_h, lam_h = best
    gain = explained_h - explained_ml
    remaining = gain / max(1.0 - explained_ml, 1e-300)
    return {
        "memoryless_explained": float(explained_ml),
        "history_explained": float(explained_h),
        "additional_explained": float(gain),
        "remaining_explained": float(remaining),
        "recommendation": "memory" if remaining >= threshold else "memoryless",
        "threshold": float(threshold),
        "time_constants": [float(t) for t in taus],
        "lengthscale": float(info["lengthscale"]),
        "ridge": float(info["ridge"]),
        "history_ridge": lam_h,
        "n_train": int(x_tr.shape[0]),
        "n_val": int(x_va.shape[0]),
        "targets": targets,
    }
