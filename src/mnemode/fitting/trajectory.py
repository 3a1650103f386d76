"""Trajectory fitting: backpropagate the forecast error of warm-up + free-running unrolls.

Each optimiser step draws a batch of random windows from the training
trajectories. A window is ``n_warm`` observation intervals of history followed by
``n_f`` intervals of forecast:

1. **warm-up** — the hidden state starts from the closure's initial state and is
   driven by the observed history (:func:`mnemode.hybrid.warm_up`, as in
   assessment); only the last ``warm_up_grad`` of it keeps a graph (truncated
   backpropagation: earlier history still sets the state, it just isn't
   differentiated through);
2. **forecast** — the hybrid model free-runs from ``(x_obs, r)``
   (:func:`mnemode.hybrid.simulate`), optionally re-forced to the observed ``x``
   every ``reforce_every`` intervals (``r`` carries on);
3. **loss** — mean squared forecast error, each component divided by its
   training standard deviation::

       L = mean_{n, b, i} ((x̂_{n,b,i} − x_{n,b,i}) / s_i)²

The forecast length grows linearly from ``horizon[0]`` to ``horizon[1]`` over the
first ``curriculum`` fraction of the budget; the learning rate follows a cosine
from ``lr`` to ``lr_final`` over the budget; gradients are clipped to norm
``clip``. Every ``val_every`` steps the model forecasts fixed validation windows
(same warm-up) and the median validity time (normalised error
``‖x̂ − x‖ / RMS(x) > gamma``) decides the best model, which the fit returns:
forecast losses are heavy-tailed once forecasts pass a few Lyapunov times, so the
best loss is a poor guide.

Before training, the closure's scaling is set from the data (inputs by the
training mean/std; outputs by the mean/std of the finite-difference residual
``ẋ̂ − f0(x)``, so the readout starts at the missing term's mean), and a linear
readout is optionally initialised by ridge regression
(:class:`~mnemode.fitting.ReadoutRidgeFit`), which backpropagation then fine-tunes.

Budgets: ``steps`` optimiser updates (deterministic: a resumed fit ends with the
same weights, bit for bit, as an uninterrupted one) and/or ``max_seconds`` of wall
time (progress, schedule and curriculum then follow elapsed time, which is not
reproducible). Checkpoints (:mod:`mnemode.fitting.checkpoint`) are taken every
``checkpoint_every`` steps and at the end.

References:
    P. J. Werbos, Proc. IEEE 78 (1990) 1550–1560 (backpropagation through time);
    D. P. Kingma, J. Ba, ICLR 2015 (Adam); I. Loshchilov, F. Hutter, ICLR 2017
    (cosine schedule); R. T. Q. Chen et al., NeurIPS 2018 (adjoint method).
"""

from __future__ import annotations

import copy
import logging
import math
import time
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
import torch

from ..forecasting import choose_starts, model_dtype
from ..validity import validity_times
from ..data import TrajectorySet, take_windows
from ..closures.base import LinearReadout, Memory
from .base import Fitter
from ..errors import CheckpointError, ConfigError, DataError, FitDiverged
from ..hybrid import Forcing, HybridField, HybridFlowMap, simulate, warm_up
from .checkpoint import has_checkpoint, load_checkpoint, load_state_checked, save_checkpoint
from .readout import ReadoutRidgeFit, residual_targets
from .regression import set_scaling

__all__ = ["TrajectoryFit"]

log = logging.getLogger("mnemode")

_UNITS = ("time", "steps", "lyapunov")
_READOUT_INIT = ("auto", "ridge", "offset")
# consecutive non-finite gradients tolerated (skipped) before the fit is declared diverged
_MAX_BAD_GRADIENTS = 20
# default learning rates: from scratch, and for fine-tuning a ridge-initialised readout (a larger
# first step undoes the ridge solution before the forecast loss can improve on it)
_LR_FROM_SCRATCH, _LR_AFTER_RIDGE = 5e-3, 1e-3


#: version of the fit-settings record stored in checkpoints (1: every attribute of the fitter)
SETTINGS_VERSION = 2
#: the settings that define a fit; a resume under different values is refused, except for
#: :data:`RESUME_OVERRIDABLE`, which change only how the rest of the fit proceeds
SETTINGS_FIELDS = ("steps", "max_seconds", "batch_size", "lr", "lr_final", "weight_decay", "horizon",
                   "curriculum", "unit", "warm_up_grad", "reforce_every", "clip", "val_every", "val_windows",
                   "val_horizon", "gamma", "patience", "checkpoint_every", "readout_init", "ridge", "scheme",
                   "divergence_retries", "divergence_lr_factor")
RESUME_OVERRIDABLE = ("lr", "lr_final", "divergence_retries", "divergence_lr_factor", "max_seconds")


def _state_copy(module) -> dict:
    return {k: (v.detach().clone() if isinstance(v, torch.Tensor) else copy.deepcopy(v))
            for k, v in module.state_dict().items()}


@dataclass
class _Problem:
    """What the fit works on, prepared once: data tensors, window sizes, validation windows."""

    states: torch.Tensor
    forcing: torch.Tensor | None
    times: torch.Tensor  # (T, B) true sample times, float64: the physics' clock along each window
    x_std: torch.Tensor
    dt: float
    solver: object
    n_traj: int
    n_times: int
    n_warm: int
    n_grad: int
    h0: int
    h1: int
    val: dict
    rank: int = 0
    world: int = 1
    ddp: object = None  # DistributedDataParallel over the window loss when fitting data-parallel


class _WindowLoss(torch.nn.Module):
    """The loss of a batch of windows as a module, so DistributedDataParallel can average its gradients."""

    def __init__(self, fitter: "TrajectoryFit", model, prob: _Problem):
        super().__init__()
        self.model, self._fitter, self._prob = model, fitter, prob

    def forward(self, traj: torch.Tensor, start: torch.Tensor, n_f: int) -> torch.Tensor:
        p = self._prob
        pred, truth = self._fitter._run_windows(self.model, p.states, p.forcing, traj, start, p.n_warm, p.n_grad,
                                                n_f, p.dt, p.solver, self._fitter.reforce_every, p.times)
        return (((pred - truth) / p.x_std) ** 2).mean()


@dataclass
class _Best:
    """The best model so far, by validation score (higher is better)."""

    score: tuple
    step: int
    error: float
    model: dict


@dataclass
class _Progress:
    """The fit's counters: everything a checkpoint needs beyond the tensors."""

    step: int = 0
    elapsed_before: float = 0.0
    resumed_from: int | None = None
    bad_grads: int = 0
    patience_left: int | None = None
    recent: list = field(default_factory=list)
    best: _Best | None = None
    lr_scale: float = 1.0
    recoveries: int = 0
    started: float = field(default_factory=time.perf_counter)

    def elapsed(self) -> float:
        return self.elapsed_before + time.perf_counter() - self.started

    def counters(self) -> dict:
        b = self.best
        return {"elapsed": self.elapsed(), "patience_left": self.patience_left, "recent": list(self.recent),
                "bad_gradients": self.bad_grads, "lr_scale": self.lr_scale, "recoveries": self.recoveries,
                "best_score": None if b is None else list(b.score), "best_step": None if b is None else b.step,
                "best_error": None if b is None else b.error}


class _Diverged(Exception):
    """Internal: this update produced a non-finite loss, gradient or parameter."""

    def __init__(self, what: str):
        super().__init__(what)
        self.what = what


class TrajectoryFit(Fitter):
    """Fit a hybrid model's closure through warm-up + forecast unrolls (module docstring).

    Args:
        steps: budget in optimiser updates (``None``: only ``max_seconds``).
        max_seconds: wall-time budget (``None``: only ``steps``).
        batch_size: windows per update.
        lr, lr_final: cosine learning-rate schedule of Adam, start and end; by
            default 1e-3 after a ridge initialisation (fine-tuning), else 5e-3, and
            ``lr_final = lr / 50``.
        weight_decay: Adam's L2 penalty.
        horizon: forecast length ``(start, end)`` of the curriculum, or one number.
        curriculum: fraction of the budget over which the horizon grows.
        unit: unit of ``horizon``, ``val_horizon`` and ``warm_up_grad``:
            ``'time'`` (time units), ``'steps'`` (observation intervals) or
            ``'lyapunov'`` (Lyapunov times, from ``ctx.lyapunov_time``).
        warm_up_grad: the last part of the warm-up that is differentiated through
            (``None``: all of it).
        reforce_every: reset the forecast's ``x`` to the data every this many
            observation intervals (``None``: never).
        clip: gradient-norm clipping threshold.
        val_every: validate (and possibly keep the best model) every this many steps.
        val_windows: number of validation forecasts.
        val_horizon: validation forecast length (validity times are censored there).
        gamma: validity threshold on the normalised error.
        patience: stop after this many validations in a row without improvement (``None``: never).
        checkpoint_every: take a checkpoint every this many steps (and at the end).
        readout_init: ``'ridge'`` (fit a linear readout by ridge first), ``'offset'``
            (only the data scalings, whose output offset is the mean residual) or
            ``'auto'`` (ridge when the closure's readout allows it).
        ridge: penalty(ies) for the ridge initialisation (see ReadoutRidgeFit);
            ``None``: 1e-8, 1e-6 and 1e-4, chosen on validation data. On the demo
            the smallest wins (median validity 14.8 against 11.1 with 1e-4, oracle
            14.9): the ridge start is then near the truth, and fine-tuning, which
            its large cancelling weights make delicate, mostly keeps it (the best
            model by validation validity is returned either way).
        scheme: finite-difference scheme for the residual used by the scalings.
        divergence_retries: on a non-finite loss, gradient or parameter, restore the
            last good state (taken at every validation), multiply the learning rate by
            ``divergence_lr_factor`` and go on, at most this many times; then stop.

    ``fit`` returns ``train_error`` (mean training loss, the normalised squared
    forecast error, over the last ``val_every`` steps), ``val_error`` (validation
    normalised squared error over the final horizon, best model), ``val_validity``
    (median validation validity time, best model), ``best_step``, ``steps``,
    ``stop_reason``, ``resumed_from``, ``recoveries``, ``improved`` (whether any
    update beat the starting point), ``fit_seconds``, and ``note`` when the fit never
    improved on its start.

    The best model is chosen by the validation score ``(median validity, mean
    validity, −normalised squared error)``, compared in that order: the error term
    keeps ranking models when every validation forecast is censored at
    ``val_horizon`` (validity times then all equal the horizon).

    Raises:
        ConfigError: bad settings, or a model it cannot fit.
        DataError: trajectories too short for warm-up plus horizon.
        CheckpointError: an existing checkpoint without ``resume``, or one that
            does not match the model or the settings.
        FitDiverged: the loss, gradients or parameters stayed non-finite after
            ``divergence_retries`` recoveries.
    """

    def __init__(self, steps: int | None = 2000, max_seconds: float | None = None, batch_size: int = 32,
                 lr: float | None = None, lr_final: float | None = None, weight_decay: float = 0.0,
                 horizon: float | Sequence[float] = (0.5, 4.0), curriculum: float = 0.6, unit: str = "time",
                 warm_up_grad: float | None = 2.0, reforce_every: int | None = None, clip: float = 1.0,
                 val_every: int = 100, val_windows: int = 64, val_horizon: float = 25.0, gamma: float = 0.5,
                 patience: int | None = None, checkpoint_every: int = 100, readout_init: str = "auto",
                 ridge: float | Sequence[float] | None = None, scheme: str = "central4",
                 divergence_retries: int = 3, divergence_lr_factor: float = 0.3):
        if steps is None and max_seconds is None:
            raise ConfigError("fit.steps", "and fit.max_seconds are both null: the fit has no budget",
                              "set steps (reproducible) and/or max_seconds.")
        for name, v in (("steps", steps), ("batch_size", batch_size), ("val_every", val_every),
                        ("val_windows", val_windows), ("checkpoint_every", checkpoint_every),
                        ("patience", patience)):
            if v is not None and int(v) < 1:
                raise ConfigError(f"fit.{name}", f"is {v}; expected a positive integer", f"set fit.{name} ≥ 1.")
        if max_seconds is not None and not float(max_seconds) > 0:
            raise ConfigError("fit.max_seconds", f"is {max_seconds}; expected > 0", "set a positive wall time.")
        if any(v is not None and not float(v) > 0 for v in (lr, lr_final)):
            raise ConfigError("fit.lr", f"lr={lr}, lr_final={lr_final}; both must be > 0 (or null for the default)",
                              "use e.g. 5e-3 and 1e-4.")
        if unit not in _UNITS:
            raise ConfigError("fit.unit", f"is {unit!r}; expected one of {_UNITS}", f"set fit.unit to one of {_UNITS}.")
        if readout_init not in _READOUT_INIT:
            raise ConfigError("fit.readout_init", f"is {readout_init!r}; expected one of {_READOUT_INIT}",
                              f"set fit.readout_init to one of {_READOUT_INIT}.")
        hz = [float(horizon)] * 2 if isinstance(horizon, (int, float)) else [float(h) for h in horizon]
        if len(hz) != 2 or min(hz) <= 0:
            raise ConfigError("fit.horizon", f"is {horizon!r}; expected a positive length or [start, end]",
                              "write e.g. horizon: [0.5, 4.0].")
        if not 0 <= float(curriculum) <= 1:
            raise ConfigError("fit.curriculum", f"is {curriculum}; expected a fraction in [0, 1]",
                              "use e.g. 0.6.")
        if reforce_every is not None and int(reforce_every) < 1:
            raise ConfigError("fit.reforce_every", f"is {reforce_every}; expected ≥ 1 or null",
                              "set a positive number of observation intervals or null.")
        if not float(clip) > 0:
            raise ConfigError("fit.clip", f"is {clip}; expected > 0", "use e.g. clip: 1.0.")
        if int(divergence_retries) < 0 or not 0 < float(divergence_lr_factor) < 1:
            raise ConfigError("fit.divergence_retries / fit.divergence_lr_factor",
                              f"are {divergence_retries} and {divergence_lr_factor}; expected an integer ≥ 0 and a "
                              "factor in (0, 1)", "use e.g. divergence_retries: 3, divergence_lr_factor: 0.3.")
        self.steps = None if steps is None else int(steps)
        self.max_seconds = None if max_seconds is None else float(max_seconds)
        self.batch_size = int(batch_size)
        self.lr = None if lr is None else float(lr)
        self.lr_final = None if lr_final is None else float(lr_final)
        self.weight_decay = float(weight_decay)
        self.horizon, self.curriculum, self.unit = (hz[0], hz[1]), float(curriculum), unit
        self.warm_up_grad = None if warm_up_grad is None else float(warm_up_grad)
        self.reforce_every = None if reforce_every is None else int(reforce_every)
        self.clip, self.val_every, self.val_windows = float(clip), int(val_every), int(val_windows)
        self.val_horizon, self.gamma = float(val_horizon), float(gamma)
        self.patience = None if patience is None else int(patience)
        self.checkpoint_every, self.readout_init = int(checkpoint_every), readout_init
        self.ridge = ridge if ridge is None or isinstance(ridge, (int, float)) \
            else [float(a) for a in ridge]
        self.scheme = scheme
        self.divergence_retries, self.divergence_lr_factor = int(divergence_retries), float(divergence_lr_factor)

    # -- settings ---------------------------------------------------------------------
    def settings(self) -> dict:
        """The fitter's settings record: plain data, versioned, stored in checkpoints.

        Only the fields listed in :data:`SETTINGS_FIELDS` belong to the record, so an
        attribute added to the class later does not silently change what a resume
        accepts.
        """
        record = {}
        for name in SETTINGS_FIELDS:
            value = getattr(self, name)
            record[name] = list(value) if isinstance(value, tuple) else value
        return {"version": SETTINGS_VERSION, **record}

    def _to_intervals(self, value: float, dt: float, ctx) -> int:
        if self.unit == "steps":
            return int(round(value))
        if self.unit == "lyapunov":
            if not ctx.lyapunov_time:
                raise ConfigError("fit.unit", "is 'lyapunov' but the system's Lyapunov time is unknown",
                                  "give windows in 'time' or 'steps', or a system with a known exponent.")
            value = value * float(ctx.lyapunov_time)
        return int(round(value / dt))

    def _progress(self, step: int, elapsed: float) -> float:
        p = 0.0
        if self.steps is not None:
            p = max(p, step / self.steps)
        if self.max_seconds is not None:
            p = max(p, elapsed / self.max_seconds)
        return p

    def _rates(self, from_ridge: bool) -> tuple[float, float]:
        """(start, end) learning rates; the defaults depend on whether the readout starts from ridge."""
        lr = self.lr if self.lr is not None else (_LR_AFTER_RIDGE if from_ridge else _LR_FROM_SCRATCH)
        lr_final = self.lr_final if self.lr_final is not None else lr / 50
        return lr, lr_final

    @staticmethod
    def _lr(progress: float, lr: float, lr_final: float) -> float:
        p = min(1.0, progress)
        return lr_final + 0.5 * (lr - lr_final) * (1.0 + math.cos(math.pi * p))

    def _horizon(self, progress: float, h0: int, h1: int) -> int:
        frac = 1.0 if self.curriculum == 0 else min(1.0, progress / self.curriculum)
        return max(1, int(round(h0 + (h1 - h0) * frac)))

    # -- unrolls --------------------------------------------------------------------
    def _forecast(self, model, win: torch.Tensor, n_warm: int, n_grad: int, n_f: int, dt: float, solver,
                  reforce: int | None, forcing: Forcing | None = None, time_origin=None) -> torch.Tensor:
        """Warm up on ``win[:n_warm+1]``, forecast ``n_f`` intervals; returns ``(n_f, B, D)`` predictions.

        The window's clock reads 0 at its first sample; ``time_origin`` ``(B,)`` is that
        sample's true time, which the physics adds (:func:`mnemode.hybrid.simulate`).
        """
        r = None
        if model.hidden_size:
            n_free = n_warm - n_grad
            if n_free > 0:
                with torch.no_grad():
                    r = warm_up(model, win[:n_free + 1], dt, solver, t0=0.0, forcing=forcing)
            r = warm_up(model, win[n_free:n_warm + 1], dt, solver, r0=r, t0=n_free * dt, forcing=forcing)
        preds, pos, left = [], n_warm, n_f
        while left > 0:
            k = left if reforce is None else min(left, reforce)
            xs, rs = simulate(model, win[pos], k, dt, solver, r0=r, t0=pos * dt, return_hidden=True,
                              forcing=forcing, time_origin=time_origin)
            preds.append(xs[1:])
            if model.hidden_size:
                r = rs[-1]
            pos, left = pos + k, left - k
        return torch.cat(preds)

    def _run_windows(self, model, states, forcing, traj, start, n_warm, n_grad, n_f, dt, solver, reforce, times):
        win = take_windows(states, traj, start, n_warm + n_f + 1)
        u = origin = None
        if isinstance(model, HybridField):
            if forcing is not None:
                u = Forcing(0.0, dt, take_windows(forcing, traj, start, n_warm + n_f + 1))
            origin = times[torch.as_tensor(start, dtype=torch.long), torch.as_tensor(traj, dtype=torch.long)]
        pred = self._forecast(model, win, n_warm, n_grad, n_f, dt, solver, reforce, u, origin)
        return pred, win[n_warm + 1:]

    # -- validation -----------------------------------------------------------------
    @staticmethod
    def _val_starts(n_traj: int, n_times: int, n_before: int, n_after: int, n: int):
        starts = choose_starts(n_times, n_traj, n_before, n_after, n, what="validation data",
                               fix="shorten fit.val_horizon or warm_up, or use longer validation trajectories.")
        return torch.as_tensor(starts.trajectory), torch.as_tensor(starts.index - n_before)

    def _validate(self, model, v) -> tuple[float, float, float]:
        """(median validity, mean validity, normalised squared error over the final horizon)."""
        with torch.no_grad():
            try:
                pred, truth = self._run_windows(model, v["states"], v["forcing"], v["traj"], v["start"],
                                                v["n_warm"], 0, v["n_after"], v["dt"], v["solver"], None, v["times"])
                pred = pred.to(torch.float64).numpy()
            except (RuntimeError, AssertionError, FloatingPointError, OverflowError):
                # a forecast that makes the solver fail is a model with no skill, not a crash
                return 0.0, 0.0, float("inf")
            truth = truth.to(torch.float64).numpy()
        pred = np.where(np.isfinite(pred), pred, np.inf)
        times, _ = validity_times(pred, truth, v["dt"], self.gamma, scale=v["scale"])
        times = times + v["dt"]  # predictions start one interval after the forecast's initial state
        n_h = v["n_loss"]
        err = ((pred[:n_h] - truth[:n_h]) / v["x_std"]) ** 2
        err = float(np.mean(err)) if np.all(np.isfinite(err)) else float("inf")
        return float(np.median(times)), float(np.mean(times)), err

    # -- the fit ----------------------------------------------------------------------
    def fit(self, model: HybridField | HybridFlowMap, train: TrajectorySet, val: TrajectorySet | None, ctx) -> dict:
        """Fit ``model``'s closure in place; returns plain diagnostics (class docstring)."""
        t_enter = time.perf_counter()
        params = self._trainable(model, ctx)
        prob = self._prepare(model, train, val, ctx)
        self._data_parallel(model, prob)
        settings = self._run_settings(model, prob, ctx)
        lr0, lr1 = self._rates(self._uses_ridge(model.closure))
        optimiser = torch.optim.Adam(params, lr=lr0, weight_decay=self.weight_decay)
        gen = torch.Generator().manual_seed(int(ctx.seed))
        progress = _Progress(patience_left=self.patience)
        finished = self._start_or_resume(model, train, val, ctx, settings, optimiser, gen, progress)
        if finished is not None:
            return finished
        self._check_finite(params, "initial parameters", progress.step, ctx)
        progress.started = time.perf_counter()
        if progress.best is None:
            self._validate_and_keep(model, prob, progress, ctx)
        good = self._snapshot(model, optimiser, gen, progress)
        stop_reason = self._train(model, params, prob, optimiser, gen, progress, (lr0, lr1), settings, ctx, good)
        if progress.step % self.val_every != 0 and progress.step > 0:
            self._validate_and_keep(model, prob, progress, ctx)
        model.load_state_dict(progress.best.model)
        diagnostics = self._diagnostics(progress, stop_reason, ctx, t_enter)
        if len(getattr(model.closure, "time_constant_candidates", ())) > 1:
            diagnostics["time_constants"] = list(model.closure.time_constants)  # the range the ridge start kept
        if prob.rank == 0:
            self._checkpoint(model, optimiser, gen, progress, settings, ctx, finished=True, diagnostics=diagnostics)
        return diagnostics

    # -- steps of the fit ---------------------------------------------------------------
    @staticmethod
    def _trainable(model, ctx) -> list:
        """The closure's trainable parameters, after checking the model can be fitted this way."""
        closure = model.closure
        params = [p for p in (closure.parameters() if closure is not None else []) if p.requires_grad]
        if closure is None or not params:
            raise ConfigError("fit", f"TrajectoryFit needs a closure with trainable parameters; got "
                              f"{type(closure).__name__ if closure is not None else 'no closure'}",
                              "choose a learnable closure, or a ridge/regression fitter for this one.")
        if isinstance(model, HybridField) and ctx.solver is None:
            raise ConfigError("solver", "is missing", "give the fit context a solver, e.g. RK4(0.02).")
        if isinstance(closure, Memory) and closure.initial_hidden_mode == "warm_up" and ctx.warm_up <= 0:
            raise ConfigError("warm_up", f"is {ctx.warm_up} but the closure's initial_hidden is 'warm_up'",
                              "set warm_up > 0 (e.g. 5 time units), or initial_hidden='zeros'/'learned'.")
        return params

    def _prepare(self, model, train: TrajectorySet, val: TrajectorySet | None, ctx) -> _Problem:
        """Window sizes in observation intervals, data tensors and the fixed validation windows."""
        dtype = model_dtype(model)
        dt = train.dt
        if val is not None and abs(val.dt - dt) > 1e-9 * dt:
            raise DataError("validation data", f"sampled every {val.dt}, training data every {dt}",
                            "sample both on the same grid.")
        n_warm = int(round(ctx.warm_up / dt)) if model.hidden_size else 0
        n_grad = n_warm if self.warm_up_grad is None else min(n_warm, self._to_intervals(self.warm_up_grad, dt, ctx))
        h0 = max(1, self._to_intervals(self.horizon[0], dt, ctx))
        h1 = max(1, self._to_intervals(self.horizon[1], dt, ctx))
        n_val = max(1, self._to_intervals(self.val_horizon, dt, ctx))
        if n_warm + max(h0, h1) + 1 > train.n_times:
            raise DataError("training data", f"trajectories of {train.n_times} samples are shorter than a warm-up "
                            f"of {n_warm} plus a forecast of {max(h0, h1)} intervals",
                            "shorten warm_up or fit.horizon, or use longer trajectories.")
        flat = train.states.reshape(-1, train.dim)
        x_std_np = np.maximum(flat.std(0), 1e-12)
        scale = float(np.sqrt(((flat - flat.mean(0)) ** 2).sum(-1).mean()))
        vset = val if val is not None else train
        vt, vs = self._val_starts(vset.n_trajectories, vset.n_times, n_warm, n_val, self.val_windows)
        states = train.tensor(dtype)  # one copy, shared by validation when it runs on the training data
        v = dict(states=states if vset is train else vset.tensor(dtype), traj=vt, start=vs, n_warm=n_warm, n_after=n_val, dt=dt,
                 solver=ctx.solver, forcing=None if vset.forcing is None else torch.as_tensor(vset.forcing, dtype=dtype),
                 scale=scale, x_std=x_std_np, n_loss=min(n_val, h1),
                 times=torch.as_tensor(vset.absolute_times(), dtype=torch.float64))
        return _Problem(states=states,
                        forcing=None if train.forcing is None else torch.as_tensor(train.forcing, dtype=dtype),
                        times=torch.as_tensor(train.absolute_times(), dtype=torch.float64),
                        x_std=torch.as_tensor(x_std_np, dtype=dtype), dt=dt, solver=ctx.solver,
                        n_traj=train.n_trajectories, n_times=train.n_times, n_warm=n_warm, n_grad=n_grad,
                        h0=h0, h1=h1, val=v)

    def _data_parallel(self, model, prob: _Problem) -> None:
        """Inside a ``torch.distributed`` process group: shard each batch over the processes (module docstring)."""
        from .. import distributed

        prob.world, prob.rank = distributed.world_size(), distributed.rank()
        if prob.world == 1:
            return
        if self.batch_size % prob.world:
            raise ConfigError("fit.batch_size", f"is {self.batch_size}, not a multiple of the {prob.world} processes "
                              "fitting data-parallel", f"set fit.batch_size to a multiple of {prob.world}.")
        from torch.nn.parallel import DistributedDataParallel

        # some parameters (e.g. a learned initial state under truncated warm-up) may get no gradient in a step
        prob.ddp = DistributedDataParallel(_WindowLoss(self, model, prob), find_unused_parameters=True)

    def _run_settings(self, model, prob: _Problem, ctx) -> dict:
        """The record a checkpoint stores and a resume must match: fitter settings plus run settings."""
        return {"fitter": self.settings(), "warm_up": float(ctx.warm_up), "seed": int(ctx.seed),
                "dt": float(prob.dt), "dtype": str(model_dtype(model)).replace("torch.", "")}

    def _start_or_resume(self, model, train, val, ctx, settings, optimiser, gen, progress: _Progress) -> dict | None:
        """Initialise a new fit, or restore a checkpointed one; the diagnostics if it had finished."""
        ckpt_dir = ctx.checkpoint_dir
        if has_checkpoint(ckpt_dir) and not ctx.resume:
            raise CheckpointError(str(ckpt_dir), "already holds a checkpoint of an earlier fit",
                                  "resume that fit (mnemode resume RUN_DIR) or start a new run directory; "
                                  "nothing was overwritten.")
        if not has_checkpoint(ckpt_dir):
            self._initialise(model, train, val, ctx)
            return None
        state = load_checkpoint(ckpt_dir)
        self._check_settings(state, settings, ckpt_dir)
        load_state_checked(model, state["model"], f"{ckpt_dir}/state.pt model")
        if state["finished"]:
            out = dict(state.get("diagnostics", {}))
            out["resumed_from"] = int(state["step"])
            return out
        try:
            optimiser.load_state_dict(state["optimiser"])
            gen.set_state(state["generator"])
            torch.set_rng_state(state["torch_rng"])
        except (KeyError, ValueError, RuntimeError, TypeError) as exc:
            raise CheckpointError(f"{ckpt_dir}/state.pt", f"optimiser or generator state does not fit ({exc})",
                                  "the file is damaged or from another model; delete it to refit.") from None
        c = state["counters"]
        progress.step = progress.resumed_from = int(state["step"])
        progress.elapsed_before = float(c["elapsed"])
        progress.patience_left, progress.bad_grads = c["patience_left"], int(c["bad_gradients"])
        progress.recent = list(c["recent"])
        progress.lr_scale, progress.recoveries = float(c.get("lr_scale", 1.0)), int(c.get("recoveries", 0))
        if c["best_score"] is not None:
            progress.best = _Best(tuple(c["best_score"]), int(c["best_step"]), float(c["best_error"]),
                                  state["best_model"])
        return None

    def _train(self, model, params, prob: _Problem, optimiser, gen, progress: _Progress, rates, settings, ctx,
               good: dict) -> str:
        """The optimiser loop; returns why it stopped (``budget``, ``time`` or ``early_stop``)."""
        bar = None
        if ctx.progress and self.steps is not None and prob.rank == 0:
            from tqdm.auto import tqdm
            bar = tqdm(total=self.steps, initial=progress.step, desc=f"fitting {ctx.name}", unit="step", leave=False)
        try:
            while True:
                if self.patience is not None and progress.patience_left is not None and progress.patience_left <= 0:
                    return "early_stop"
                p = self._progress(progress.step, progress.elapsed())
                if p >= 1.0:
                    return "budget" if self.steps is not None and progress.step >= self.steps else "time"
                try:
                    loss_value = self._update(model, params, prob, optimiser, gen, progress, p, rates, ctx, bar)
                except _Diverged as exc:
                    self._recover(model, optimiser, gen, progress, good, exc.what, ctx, bar)
                    continue
                progress.recent = (progress.recent + [loss_value])[-self.val_every:]
                if progress.step % self.val_every == 0:
                    self._validate_and_keep(model, prob, progress, ctx)
                    good.update(self._snapshot(model, optimiser, gen, progress))
                if progress.step % self.checkpoint_every == 0 and prob.rank == 0:
                    self._checkpoint(model, optimiser, gen, progress, settings, ctx, finished=False)
        finally:
            if bar is not None:
                bar.close()

    def _update(self, model, params, prob: _Problem, optimiser, gen, progress: _Progress, p: float, rates, ctx,
                bar) -> float:
        """One optimiser update on a random batch of windows; returns its loss."""
        lr = self._lr(p, *rates) * progress.lr_scale
        for group in optimiser.param_groups:
            group["lr"] = lr
        n_f = self._horizon(p, prob.h0, prob.h1)
        hi = prob.n_times - (prob.n_warm + n_f)
        traj = torch.randint(0, prob.n_traj, (self.batch_size,), generator=gen)
        start = torch.randint(0, hi, (self.batch_size,), generator=gen)
        nfe_counter = prob.solver if hasattr(prob.solver, "nfe") else None  # only Adaptive counts evaluations
        nfe0 = nfe_counter.nfe if nfe_counter is not None else 0
        optimiser.zero_grad(set_to_none=True)
        if prob.ddp is None:
            pred, truth = self._run_windows(model, prob.states, prob.forcing, traj, start, prob.n_warm, prob.n_grad,
                                            n_f, prob.dt, prob.solver, self.reforce_every, prob.times)
            loss = (((pred - truth) / prob.x_std) ** 2).mean()
            batch_loss = loss.detach()
        else:  # this process's share of the same batch; DDP averages the gradients over the shares
            shard = slice(prob.rank, None, prob.world)
            loss = prob.ddp(traj[shard], start[shard], n_f)
            batch_loss = loss.detach().clone()
            torch.distributed.all_reduce(batch_loss)
            batch_loss /= prob.world
        # backward before the check: a data-parallel forward must be followed by its backward on every process
        loss.backward()
        loss_value = float(batch_loss)
        if not math.isfinite(loss_value):
            raise _Diverged(f"the forecast loss is {loss_value} (forecast of {n_f * prob.dt:g} time units)")
        grad_norm = float(torch.nn.utils.clip_grad_norm_(params, self.clip))
        if math.isfinite(grad_norm):
            optimiser.step()
            progress.bad_grads = 0
        else:
            progress.bad_grads += 1
            if progress.bad_grads > _MAX_BAD_GRADIENTS:
                progress.bad_grads = 0
                raise _Diverged(f"{_MAX_BAD_GRADIENTS + 1} consecutive non-finite gradients")
        if not all(bool(torch.isfinite(q).all()) for q in params):
            raise _Diverged("the parameters became non-finite")
        writer, tag, step = (ctx.writer if prob.rank == 0 else None), ctx.name, progress.step
        if writer is not None:
            writer.add_scalar(f"{tag}/train/loss", loss_value, step)
            writer.add_scalar(f"{tag}/train/grad_norm", grad_norm, step)
            writer.add_scalar(f"{tag}/train/lr", lr, step)
            writer.add_scalar(f"{tag}/train/horizon", n_f * prob.dt, step)
            if nfe_counter is not None:
                writer.add_scalar(f"{tag}/train/nfe", nfe_counter.nfe - nfe0, step)
        progress.step += 1
        if bar is not None:
            bar.update(1)
            bar.set_postfix(loss=f"{loss_value:.3g}", horizon=f"{n_f * prob.dt:.2g}")
        return loss_value

    @staticmethod
    def _snapshot(model, optimiser, gen, progress: _Progress) -> dict:
        """The last good state a divergence returns to (finite by construction: taken after checks)."""
        return {"model": _state_copy(model), "optimiser": copy.deepcopy(optimiser.state_dict()),
                "generator": gen.get_state(), "step": progress.step, "recent": list(progress.recent),
                "bad_grads": progress.bad_grads}

    def _recover(self, model, optimiser, gen, progress: _Progress, good: dict, what: str, ctx, bar) -> None:
        """Return to the last good state with a lower learning rate, or stop with a clear message."""
        where = f"trajectory fit of {ctx.name}, step {progress.step}"
        if progress.recoveries >= self.divergence_retries:
            lr_now = self._rates(self._uses_ridge(model.closure))[0] * progress.lr_scale
            raise FitDiverged(where, f"{what}, after {progress.recoveries} recoveries that each lowered the "
                              f"learning rate ×{self.divergence_lr_factor:g} (start rate now {lr_now:.3g})",
                              f"resume with a lower rate (mnemode resume RUN_DIR fit.lr={lr_now / 10:.2g}), shorten "
                              f"fit.horizon (now up to {self.horizon[1]:g} {self.unit}), or use a smaller solver step.")
        model.load_state_dict(good["model"])
        optimiser.load_state_dict(copy.deepcopy(good["optimiser"]))
        gen.set_state(good["generator"])
        progress.step, progress.recent, progress.bad_grads = good["step"], list(good["recent"]), good["bad_grads"]
        progress.recoveries += 1
        progress.lr_scale *= self.divergence_lr_factor
        if bar is not None:
            bar.n = progress.step
            bar.refresh()
        log.warning(
            "%s: %s; restored the state of step %d and lowered the learning rate ×%g (recovery %d of %d)",
            where, what, progress.step, self.divergence_lr_factor, progress.recoveries, self.divergence_retries)
        if ctx.writer is not None:
            ctx.writer.add_scalar(f"{ctx.name}/train/recoveries", progress.recoveries, progress.step)

    def _validate_and_keep(self, model, prob: _Problem, progress: _Progress, ctx) -> None:
        """Score the model on the validation windows; keep it if it is the best so far."""
        med, mean, err = self._validate(model, prob.val)
        if ctx.writer is not None and prob.rank == 0:
            at = max(0, progress.step - 1)
            ctx.writer.add_scalar(f"{ctx.name}/val/validity_median", med, at)
            ctx.writer.add_scalar(f"{ctx.name}/val/validity_mean", mean, at)
            ctx.writer.add_scalar(f"{ctx.name}/val/error", err if math.isfinite(err) else float("nan"), at)
        score = (med, mean, -err)
        if progress.best is None or score > _padded(progress.best.score):
            progress.best = _Best(score, progress.step, err, _state_copy(model))
            progress.patience_left = self.patience
        elif progress.patience_left is not None:
            progress.patience_left -= 1

    def _checkpoint(self, model, optimiser, gen, progress: _Progress, settings, ctx, *, finished: bool,
                    diagnostics: dict | None = None) -> None:
        """Write the fit's state for an exact resume (tensors and plain data only)."""
        if ctx.checkpoint_dir is None:
            return
        state = {"step": progress.step, "finished": finished, "settings": settings, "model": model.state_dict(),
                 "optimiser": optimiser.state_dict(), "generator": gen.get_state(),
                 "torch_rng": torch.get_rng_state(), "counters": progress.counters(),
                 "best_model": None if progress.best is None else progress.best.model}
        if diagnostics is not None:
            state["diagnostics"] = diagnostics
        save_checkpoint(ctx.checkpoint_dir, state)
        if ctx.writer is not None:
            ctx.writer.flush()

    def _diagnostics(self, progress: _Progress, stop_reason: str, ctx, t_enter: float) -> dict:
        best = progress.best
        out = {
            "train_error": float(np.mean(progress.recent)) if progress.recent else float("nan"),
            "val_error": float(best.error),
            "val_validity": float(best.score[0]),
            "val_validity_mean": float(best.score[1]),
            "best_step": int(best.step),
            "steps": int(progress.step),
            "stop_reason": stop_reason,
            "resumed_from": progress.resumed_from,
            "recoveries": int(progress.recoveries),
            "improved": bool(best.step > 0),
            "warm_up": float(ctx.warm_up),
            "fit_seconds": float(progress.elapsed() if progress.resumed_from is not None
                                 else time.perf_counter() - t_enter),
        }
        if best.step == 0:
            start = "ridge-fitted readout" if self.readout_init != "offset" else "initial model"
            out["note"] = (f"no update improved on the {start} it started from (validation score); the cheaper "
                           "fit alone (fit=readout_ridge for a linear readout, fit=derivative for a memoryless "
                           "closure) gives the same model in seconds")
        return out

    # -- helpers ------------------------------------------------------------------------
    def _uses_ridge(self, closure) -> bool:
        return self.readout_init == "ridge" or (
            self.readout_init == "auto" and isinstance(closure, LinearReadout) and closure.has_linear_readout)

    def _initialise(self, model, train, val, ctx):
        closure = model.closure
        if self._uses_ridge(closure):
            out = ReadoutRidgeFit(ridge=self.ridge, scheme=self.scheme, val_windows=self.val_windows,
                                  val_horizon=self._to_intervals(self.val_horizon, train.dt, ctx) * train.dt,
                                  gamma=self.gamma).fit(model, train, val, ctx)
            if "time_constants" in out:
                log.info("%s: time constants %s kept of the ranges tried (median validation validity %s)",
                         ctx.name, out["time_constants"], out["time_constant_scores"])
        else:
            _, inputs, rho = residual_targets(model, train, self.scheme)
            set_scaling(closure, inputs.reshape(-1, inputs.shape[-1]), rho.reshape(-1, rho.shape[-1]))

    @staticmethod
    def _check_finite(params, what, step, ctx):
        for p in params:
            if not bool(torch.isfinite(p).all()):
                raise FitDiverged(f"trajectory fit of {ctx.name}, step {step}", f"{what} became non-finite",
                                  "check the data for extreme values (the closure is scaled from them), shorten "
                                  "fit.horizon, or use a smaller solver step.")

    @staticmethod
    def _check_settings(state, settings, ckpt_dir):
        saved = state.get("settings", {})
        for key in ("warm_up", "seed", "dt", "dtype"):
            if saved.get(key) != settings[key]:
                raise CheckpointError(f"{ckpt_dir}/state.pt", f"was written with {key}={saved.get(key)!r}, "
                                      f"now {key}={settings[key]!r}",
                                      "resume with the settings of the interrupted run, or start a new run.")
        old, new = saved.get("fitter", {}), settings["fitter"]
        if old.get("version", 1) != SETTINGS_VERSION:
            # version 1 stored every attribute; compare the fields both versions know
            old = {k: v for k, v in old.items() if k in SETTINGS_FIELDS}
            new = {k: v for k, v in new.items() if k in old}
        for key in sorted(set(old) | set(new)):
            if key == "version" or key in RESUME_OVERRIDABLE:
                continue
            if old.get(key) != new.get(key):
                raise CheckpointError(f"{ckpt_dir}/state.pt", f"was written with fit.{key}={old.get(key)!r}, "
                                      f"now fit.{key}={new.get(key)!r}",
                                      "resume with the settings of the interrupted run, or start a new run.")


def _padded(score: tuple) -> tuple:
    """A stored score as a 3-tuple (checkpoints of version 1 held (median, mean) only)."""
    return tuple(score) + (-math.inf,) * (3 - len(score))
