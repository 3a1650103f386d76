"""Regression fits of memoryless closures: derivative targets and flow-map targets.

Both fitters follow the fitter contract (``fit(model, train, val, ctx) -> dict``):

1. build ``(inputs, targets)`` pairs from the trajectories (:mod:`.targets`),
   optionally a random subset of ``max_samples`` of them;
2. set the closure's :class:`~mnemode.closures.base.Scaling` from the training
   pairs (:func:`set_scaling`: input mean/std, output offset = target mean,
   output scale = target std, per component — pooled over components for
   closures with ``pooled_scaling = True`` such as ring closures);
3. call the closure's ``fit_regression`` (closed form, ML-II or Adam — the
   closure's business) with the validation pairs (``val``, or a random
   ``val_fraction`` of the training pairs when ``val`` is ``None``);
4. return plain diagnostics.

Errors are *relative RMS errors of the targets*::

    error = sqrt( Σ_n ‖m(x_n) − y_n‖² / Σ_n ‖y_n − ȳ‖² )

(ȳ the mean target of the same pairs), so 0 is a perfect fit and 1 is no better
than the constant mean — the offset alone does not make a fit look good.
"""

from __future__ import annotations

import math
import time

import numpy as np
import torch

from ..closures.base import Closure, Memory, RegressionFittable
from ..data import FD_SCHEMES, TrajectorySet
from .base import Fitter
from ..errors import ConfigError, DataError, FitDiverged
from ..hybrid import HybridField, HybridFlowMap
from ..solvers import RK4, FlowMap
from .context import FitContext
from .targets import derivative_targets, flow_map_targets

__all__ = ["DerivativeFit", "FlowMapFit", "set_scaling", "relative_error"]

_REGRESSION_CLOSURES = "GaussianProcessClosure, RandomFeatureClosure, MLPClosure, PolynomialClosure or RingLocalClosure"


def set_scaling(closure: Closure, inputs: torch.Tensor, targets: torch.Tensor, floor: float = 1e-12) -> None:
    """Set ``closure.scaling`` from training pairs ``inputs (N, in_dim)``, ``targets (N, dim)``.

    Input mean and std (population, ddof = 0) per input; output offset = target
    mean and output scale = target std per component. With
    ``closure.pooled_scaling`` one mean and one std are shared by all components
    (identical sites). A std below ``floor`` times the value's size is replaced
    by 1 (a constant input or a target that is identically zero).
    """
    pooled = closure.pooled_scaling
    stats = []
    for a in (torch.as_tensor(inputs, dtype=torch.float64), torch.as_tensor(targets, dtype=torch.float64)):
        if pooled:
            mean = a.mean().expand(a.shape[1]).clone()
            std = a.std(correction=0).expand(a.shape[1]).clone()
        else:
            mean, std = a.mean(0), a.std(0, correction=0)
        size = torch.maximum(mean.abs(), torch.ones_like(mean))
        std = torch.where(std > floor * size, std, torch.ones_like(std))
        stats += [mean, std]
    closure.scaling.set(in_mean=stats[0], in_std=stats[1], out_offset=stats[2], out_scale=stats[3])


def _predict(closure: Closure, inputs: torch.Tensor, chunk: int = 8192) -> torch.Tensor:
    """Closure outputs on concatenated ``[x, u]`` pairs, in float64, in chunks."""
    dtype = next((b.dtype for b in closure.buffers() if b.is_floating_point()), torch.float64)
    out = []
    with torch.no_grad():
        for start in range(0, inputs.shape[0], chunk):
            z = inputs[start:start + chunk].to(dtype)
            x, u = z[:, : closure.dim], z[:, closure.dim:]
            out.append(closure.correction(x, None, u if u.shape[1] else None).to(torch.float64))
    return torch.cat(out) if out else torch.zeros(0, closure.dim, dtype=torch.float64)


def relative_error(predicted: torch.Tensor, targets: torch.Tensor) -> float:
    """``sqrt(Σ‖ŷ − y‖² / Σ‖y − ȳ‖²)``; NaN for no pairs."""
    if targets.shape[0] == 0:
        return math.nan
    spread = float(((targets - targets.mean(0)) ** 2).sum())
    return math.sqrt(float(((predicted - targets) ** 2).sum()) / max(spread, 1e-300))


def _memoryless_closure(model, fitter: str) -> Closure:
    closure = model.closure
    if closure is None:
        raise ConfigError(f"{fitter} model", "has no closure to fit", "give the hybrid model a closure.")
    if isinstance(closure, Memory):
        raise ConfigError(f"{fitter} closure", f"{type(closure).__name__} has a hidden state "
                          f"(hidden_size={closure.hidden_size}); regression targets exist only for memoryless "
                          "closures", "use TrajectoryFit or a reservoir readout for closures with memory.")
    if not isinstance(closure, RegressionFittable):
        raise ConfigError(f"{fitter} closure", f"{type(closure).__name__} cannot be fitted by regression",
                          f"use {_REGRESSION_CLOSURES}.")
    return closure


def _check_in_dim(closure: Closure, inputs: torch.Tensor, ts: TrajectorySet, fitter: str) -> None:
    in_dim = closure.in_dim
    n_forcing = 0 if ts.forcing is None else ts.forcing.shape[-1]
    if inputs.shape[1] != in_dim or ts.dim != closure.dim:
        raise ConfigError(f"{fitter} closure", f"has dim={closure.dim}, in_dim={in_dim}, but the data have "
                          f"{ts.dim} states and {n_forcing} forcing inputs",
                          f"set the closure's dim: {ts.dim} and forcing_dim: {n_forcing}.")


def _subsample(inputs, targets, max_samples, gen):
    if max_samples is None or inputs.shape[0] <= max_samples:
        return inputs, targets
    keep = torch.randperm(inputs.shape[0], generator=gen)[: int(max_samples)]
    return inputs[keep], targets[keep]


class _RegressionFit(Fitter):
    """Shared steps of the regression fitters (see the module docstring)."""

    name = "regression"

    def __init__(self, max_samples: int | None, val_fraction: float):
        if max_samples is not None and int(max_samples) < 2:
            raise ConfigError("fit.max_samples", f"is {max_samples}", "use None (all pairs) or at least 2.")
        if not 0 <= float(val_fraction) < 1:
            raise ConfigError("fit.val_fraction", f"is {val_fraction}; expected a value in [0, 1)", "e.g. 0.2.")
        self.max_samples = None if max_samples is None else int(max_samples)
        self.val_fraction = float(val_fraction)

    def targets(self, model, ts: TrajectorySet):  # pragma: no cover - abstract
        raise NotImplementedError

    def fit(self, model, train: TrajectorySet, val: TrajectorySet | None = None,
            ctx: FitContext | None = None) -> dict:
        """Fit ``model.closure`` in place on ``train`` (validation on ``val``); return diagnostics.

        Returns:
            plain floats: ``train_error``, ``val_error`` (relative RMS errors of the
            targets; NaN with no validation pairs), ``fit_seconds``, ``n_samples``,
            ``n_val_samples`` and the closure's own diagnostics.

        Raises:
            ConfigError: a closure with memory, or sizes that do not match the data.
            DataError: unusable trajectories.
            FitDiverged: non-finite predictions after fitting.
        """
        ctx = ctx if ctx is not None else FitContext()
        closure = _memoryless_closure(model, type(self).__name__)
        gen = torch.Generator().manual_seed(int(ctx.seed))
        start = time.perf_counter()
        inputs, targets = self.targets(model, train)
        _check_in_dim(closure, inputs, train, type(self).__name__)
        inputs, targets = _subsample(inputs, targets, self.max_samples, gen)
        if val is not None:
            val_inputs, val_targets = self.targets(model, val)
            val_inputs, val_targets = _subsample(val_inputs, val_targets, self.max_samples, gen)
        elif self.val_fraction > 0 and inputs.shape[0] >= 4:
            perm = torch.randperm(inputs.shape[0], generator=gen)
            n_val = max(1, int(round(self.val_fraction * inputs.shape[0])))
            val_inputs, val_targets = inputs[perm[:n_val]], targets[perm[:n_val]]
            inputs, targets = inputs[perm[n_val:]], targets[perm[n_val:]]
        else:
            val_inputs = val_targets = None
        target_seconds = time.perf_counter() - start
        if inputs.shape[0] < 2:
            raise DataError(f"{type(self).__name__} training data", f"give {inputs.shape[0]} usable pair(s)",
                            "use longer or more trajectories.")
        set_scaling(closure, inputs, targets)

        writer = getattr(ctx, "writer", None)
        tag = ctx.name

        def log(name, value, step):
            if writer is not None:
                writer.add_scalar(f"{tag}/{name}", float(value), int(step))

        fit_start = time.perf_counter()
        info = closure.fit_regression(inputs, targets, generator=gen, val_inputs=val_inputs,
                                      val_targets=val_targets, progress=bool(ctx.progress), log=log)
        fit_seconds = time.perf_counter() - fit_start
        train_pred = _predict(closure, inputs)
        if not bool(torch.isfinite(train_pred).all()):
            raise FitDiverged(f"{type(self).__name__} of {type(closure).__name__}", "the fitted closure gives "
                              "non-finite corrections on its training data",
                              "regularise more (ridge, noise_floor, weight_decay) or subsample less.")
        result = {
            "train_error": relative_error(train_pred, targets),
            "val_error": math.nan if val_inputs is None else relative_error(_predict(closure, val_inputs),
                                                                            val_targets),
            "fit_seconds": fit_seconds,
            "target_seconds": target_seconds,
            "n_samples": float(inputs.shape[0]),
            "n_val_samples": 0.0 if val_inputs is None else float(val_inputs.shape[0]),
        }
        for key, value in (info or {}).items():
            if isinstance(value, (int, float, np.floating, np.integer)) and key not in result:
                result[key] = float(value)
        if writer is not None:
            for key in ("train_error", "val_error", "fit_seconds"):
                if math.isfinite(result[key]):
                    writer.add_scalar(f"{tag}/{self.name}/{key}", result[key], 0)
            writer.flush()
        return result


class DerivativeFit(_RegressionFit):
    """Fit a memoryless closure of a continuous hybrid model to ``ẋ̂ − f0(x)``.

    Args:
        scheme: finite-difference stencil (a :data:`mnemode.data.FD_SCHEMES` name).
        max_samples: use at most this many (random) pairs; ``None`` uses all.
        val_fraction: share of training pairs held out for validation when no
            ``val`` trajectories are given (0 for none).

    The model must be a :class:`~mnemode.hybrid.HybridField` (its physics gives
    ``f0``; ``None`` physics fits a data-only model). Sparse observations make
    finite differences poor: use :class:`FlowMapFit` then.
    """

    name = "derivative_regression"

    def __init__(self, scheme: str = "central4", max_samples: int | None = None, val_fraction: float = 0.2):
        super().__init__(max_samples, val_fraction)
        if scheme not in FD_SCHEMES:
            raise ConfigError("fit.scheme", f"{scheme!r} is not one of {sorted(FD_SCHEMES)}",
                              "pick one of the listed stencils.")
        self.scheme = scheme

    def targets(self, model, ts):
        if not isinstance(model, HybridField):
            raise ConfigError("DerivativeFit model", f"is a {type(model).__name__}; derivative targets "
                              "correct a vector field", "use FlowMapFit for a HybridFlowMap.")
        return derivative_targets(ts, model.physics, self.scheme)


class FlowMapFit(_RegressionFit):
    """Fit a memoryless closure to flow-map targets ``(x_{n+1} − Ψ0(x_n)) / Δt``.

    Args:
        psi0_step: RK4 step of Ψ0 for a :class:`~mnemode.hybrid.HybridField`
            (default ``min(Δt/10, 0.005)``); a :class:`~mnemode.hybrid.HybridFlowMap`
            uses its own Ψ0, so that the targets match the model it will run in.
        max_samples: use at most this many (random) pairs; ``None`` uses all.
        val_fraction: share of training pairs held out when ``val`` is ``None``.
        target: ``'auto'`` (continuous targets for a HybridField, discrete for a
            HybridFlowMap), ``'discrete'`` or ``'continuous'`` (see :mod:`.targets`).

    Raises:
        ConfigError: an unknown ``target``; a HybridFlowMap whose Δt differs from the
            data's; a HybridFlowMap with forcing (it takes none).
    """

    name = "flow_map_regression"
    TARGETS = ("auto", "discrete", "continuous")

    def __init__(self, psi0_step: float | None = None, max_samples: int | None = None,
                 val_fraction: float = 0.2, target: str = "auto"):
        super().__init__(max_samples, val_fraction)
        if psi0_step is not None and not float(psi0_step) > 0:
            raise ConfigError("fit.psi0_step", f"is {psi0_step}; expected a positive step", "e.g. 0.001.")
        if target not in self.TARGETS:
            raise ConfigError("fit.target", f"{target!r} is not one of {self.TARGETS}", "pick one of those.")
        self.psi0_step = None if psi0_step is None else float(psi0_step)
        self.target = target

    def flow_map_for(self, model, dt: float) -> FlowMap | None:
        """Ψ0 over ``dt`` for ``model`` (its own for a HybridFlowMap)."""
        if isinstance(model, HybridFlowMap):
            if abs(model.dt - dt) > 1e-9 * max(1.0, dt):
                raise ConfigError("FlowMapFit model", f"steps Δt = {model.dt} but the data are sampled "
                                  f"every {dt}", "build the HybridFlowMap with the data's sampling interval.")
            return model.flow_map
        if not isinstance(model, HybridField):
            raise ConfigError("FlowMapFit model", f"is a {type(model).__name__}",
                              "give a HybridField or a HybridFlowMap.")
        if model.physics is None:
            return None
        step = self.psi0_step if self.psi0_step is not None else min(dt / 10.0, 0.005)
        return FlowMap(model.physics, dt, RK4(step))

    def targets(self, model, ts):
        if isinstance(model, HybridFlowMap) and ts.forcing is not None:
            raise ConfigError("FlowMapFit model", "a HybridFlowMap takes no forcing inputs",
                              "fit a HybridField (continuous targets) for forced systems.")
        flow_map = self.flow_map_for(model, ts.dt)
        continuous = self.target == "continuous" or (self.target == "auto" and isinstance(model, HybridField))
        # a continuous model integrates f0 at true times; a discrete model's Ψ0 is autonomous
        return flow_map_targets(ts, flow_map, continuous=continuous, true_time=isinstance(model, HybridField))
