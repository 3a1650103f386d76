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
(:class:`~mnemode.fitting.ReadoutRidge`), which backpropagation then fine-tunes.

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

import math
import time
from typing import Sequence

import numpy as np
import torch

from ..forecasting import choose_starts, model_dtype
from ..validity import validity_times
from ..data import TrajectorySet, take_windows
from ..errors import CheckpointError, ConfigError, DataError, FitDiverged
from ..hybrid import Forcing, HybridField, HybridFlowMap, simulate, warm_up
from .checkpoint import has_checkpoint, load_checkpoint, load_state_checked, save_checkpoint
from .readout import ReadoutRidge, residual_targets
from .regression import set_scaling

__all__ = ["TrajectoryFit"]

_UNITS = ("time", "steps", "lyapunov")
_READOUT_INIT = ("auto", "ridge", "offset")
# consecutive non-finite gradients tolerated (skipped) before the fit is declared diverged
_MAX_BAD_GRADIENTS = 20
# default learning rates: from scratch, and for fine-tuning a ridge-initialised readout (a larger
# first step undoes the ridge solution before the forecast loss can improve on it)
_LR_FROM_SCRATCH, _LR_AFTER_RIDGE = 5e-3, 1e-3


def _state_copy(module: torch.nn.Module) -> dict:
    return {k: v.detach().clone() for k, v in module.state_dict().items()}


class TrajectoryFit:
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
        ridge_alpha: penalty(ies) for the ridge initialisation (see ReadoutRidge). The
            default 1e-4 keeps the readout weights O(1): the smallest-error
            penalties give large cancelling weights, which amplify every change of
            the hidden field and make fine-tuning fragile.
        scheme: finite-difference scheme for the residual used by the scalings.

    ``fit`` returns ``train_error`` (mean loss over the last ``val_every`` steps),
    ``val_error`` (validation normalised squared error over the final horizon, best
    model), ``val_validity`` (median validation validity time, best model),
    ``best_step``, ``steps``, ``stop_reason``, ``resumed_from`` and ``fit_seconds``.

    Raises:
        ConfigError: bad settings, or a model it cannot fit.
        DataError: trajectories too short for warm-up plus horizon.
        CheckpointError: an existing checkpoint without ``resume``, or one that
            does not match the model or the settings.
        FitDiverged: the loss or the parameters became non-finite.
    """

    def __init__(self, steps: int | None = 2000, max_seconds: float | None = None, batch_size: int = 32,
                 lr: float | None = None, lr_final: float | None = None, weight_decay: float = 0.0,
                 horizon: float | Sequence[float] = (0.5, 4.0), curriculum: float = 0.6, unit: str = "time",
                 warm_up_grad: float | None = 2.0, reforce_every: int | None = None, clip: float = 1.0,
                 val_every: int = 100, val_windows: int = 64, val_horizon: float = 25.0, gamma: float = 0.5,
                 patience: int | None = None, checkpoint_every: int = 100, readout_init: str = "auto",
                 ridge_alpha: float | Sequence[float] | None = 1e-4, scheme: str = "central4"):
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
        self.ridge_alpha = ridge_alpha if ridge_alpha is None or isinstance(ridge_alpha, (int, float)) \
            else [float(a) for a in ridge_alpha]
        self.scheme = scheme

    # -- settings -------------------------------------------------------------------
    def settings(self) -> dict:
        """The fitter's settings as plain data (stored in checkpoints, compared on resume)."""
        return {k: (list(v) if isinstance(v, tuple) else v) for k, v in vars(self).items()}

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
                  reforce: int | None) -> torch.Tensor:
        """Warm up on ``win[:n_warm+1]``, forecast ``n_f`` intervals; returns ``(n_f, B, D)`` predictions."""
        r = None
        if model.hidden_size:
            n_free = n_warm - n_grad
            if n_free > 0:
                with torch.no_grad():
                    r = warm_up(model, win[:n_free + 1], dt, solver, t0=0.0)
            r = warm_up(model, win[n_free:n_warm + 1], dt, solver, r0=r, t0=n_free * dt)
        preds, pos, left = [], n_warm, n_f
        while left > 0:
            k = left if reforce is None else min(left, reforce)
            xs, rs = simulate(model, win[pos], k, dt, solver, r0=r, t0=pos * dt, return_hidden=True)
            preds.append(xs[1:])
            if model.hidden_size:
                r = rs[-1]
            pos, left = pos + k, left - k
        return torch.cat(preds)

    def _run_windows(self, model, states, forcing, traj, start, n_warm, n_grad, n_f, dt, solver, reforce):
        win = take_windows(states, traj, start, n_warm + n_f + 1)
        saved = getattr(model, "forcing", None)
        if forcing is not None and isinstance(model, HybridField):
            model.forcing = Forcing(0.0, dt, take_windows(forcing, traj, start, n_warm + n_f + 1))
        try:
            pred = self._forecast(model, win, n_warm, n_grad, n_f, dt, solver, reforce)
        finally:
            if isinstance(model, HybridField):
                model.forcing = saved
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
                                                v["n_warm"], 0, v["n_after"], v["dt"], v["solver"], None)
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
        t_enter = time.perf_counter()
        closure = getattr(model, "closure", None)
        params = [p for p in (closure.parameters() if closure is not None else []) if p.requires_grad]
        if closure is None or not params:
            raise ConfigError("fit", f"TrajectoryFit needs a closure with trainable parameters; got "
                              f"{type(closure).__name__ if closure is not None else 'no closure'}",
                              "choose a learnable closure, or a ridge/regression fitter for this one.")
        if isinstance(model, HybridField) and ctx.solver is None:
            raise ConfigError("solver", "is missing", "give the fit context a solver, e.g. RK4(0.02).")
        if getattr(closure, "initial_hidden_mode", None) == "warm_up" and ctx.warm_up <= 0:
            raise ConfigError("warm_up", f"is {ctx.warm_up} but the closure's initial_hidden is 'warm_up'",
                              "set warm_up > 0 (e.g. 5 time units), or initial_hidden='zeros'/'learned'.")
        dtype = model_dtype(model)
        dt = train.dt
        if val is not None and abs(val.dt - dt) > 1e-9 * dt:
            raise DataError("validation data", f"sampled every {val.dt}, training data every {dt}",
                            "sample both on the same grid.")
        solver = ctx.solver
        n_warm = int(round(ctx.warm_up / dt)) if model.hidden_size else 0
        n_grad = n_warm if self.warm_up_grad is None else min(n_warm, self._to_intervals(self.warm_up_grad, dt, ctx))
        h0 = max(1, self._to_intervals(self.horizon[0], dt, ctx))
        h1 = max(1, self._to_intervals(self.horizon[1], dt, ctx))
        n_val = max(1, self._to_intervals(self.val_horizon, dt, ctx))
        if n_warm + max(h0, h1) + 1 > train.n_times:
            raise DataError("training data", f"trajectories of {train.n_times} samples are shorter than a warm-up "
                            f"of {n_warm} plus a forecast of {max(h0, h1)} intervals",
                            "shorten warm_up or fit.horizon, or use longer trajectories.")
        states = train.tensor(dtype)
        forcing = None if train.forcing is None else torch.as_tensor(train.forcing, dtype=dtype)
        flat = train.states.reshape(-1, train.dim)
        x_std_np = np.maximum(flat.std(0), 1e-12)
        x_std = torch.as_tensor(x_std_np, dtype=dtype)
        scale = float(np.sqrt(((flat - flat.mean(0)) ** 2).sum(-1).mean()))
        vset = val if val is not None else train
        vt, vs = self._val_starts(vset.n_trajectories, vset.n_times, n_warm, n_val, self.val_windows)
        v = dict(states=vset.tensor(dtype), traj=vt, start=vs, n_warm=n_warm, n_after=n_val, dt=dt, solver=solver,
                 forcing=None if vset.forcing is None else torch.as_tensor(vset.forcing, dtype=dtype),
                 scale=scale, x_std=x_std_np, n_loss=min(n_val, h1))
        writer, tag = ctx.writer, ctx.name
        settings = {"fitter": self.settings(), "warm_up": float(ctx.warm_up), "seed": int(ctx.seed),
                    "dt": float(dt), "dtype": str(dtype).replace("torch.", "")}

        lr0, lr1 = self._rates(self._uses_ridge(closure))
        optimiser = torch.optim.Adam(params, lr=lr0, weight_decay=self.weight_decay)
        gen = torch.Generator().manual_seed(int(ctx.seed))
        ckpt_dir = ctx.checkpoint_dir
        step, elapsed_before, resumed_from, bad_grads = 0, 0.0, None, 0
        best, patience_left, recent = None, self.patience, []
        if has_checkpoint(ckpt_dir) and not ctx.resume:
            raise CheckpointError(str(ckpt_dir), "already holds a checkpoint of an earlier fit",
                                  "resume that fit (mnemode resume RUN_DIR) or start a new run directory; "
                                  "nothing was overwritten.")
        if has_checkpoint(ckpt_dir):
            state = load_checkpoint(ckpt_dir)
            self._check_settings(state, settings, ckpt_dir)
            where = f"{ckpt_dir}/state.pt model"
            if state["finished"]:
                load_state_checked(model, state["model"], where)
                out = dict(state.get("diagnostics", {}))
                out["resumed_from"] = int(state["step"])
                return out
            load_state_checked(model, state["model"], where)
            try:
                optimiser.load_state_dict(state["optimiser"])
                gen.set_state(state["generator"])
                torch.set_rng_state(state["torch_rng"])
            except (KeyError, ValueError, RuntimeError, TypeError) as exc:
                raise CheckpointError(f"{ckpt_dir}/state.pt", f"optimiser or generator state does not fit ({exc})",
                                      "the file is damaged or from another model; delete it to refit.") from None
            c = state["counters"]
            step, elapsed_before, resumed_from = int(state["step"]), float(c["elapsed"]), int(state["step"])
            patience_left, bad_grads = c["patience_left"], int(c["bad_gradients"])
            recent = list(c["recent"])
            if c["best_score"] is not None:
                best_model = state["best_model"]
                best = {"score": tuple(c["best_score"]), "step": int(c["best_step"]), "error": float(c["best_error"]),
                        "model": best_model}
        else:
            self._initialise(model, train, val, ctx)
        self._check_finite(params, "initial parameters", step, ctx)

        t_start = time.perf_counter()

        def elapsed() -> float:
            return elapsed_before + time.perf_counter() - t_start

        def validate_and_keep():
            nonlocal best, patience_left
            med, mean, err = self._validate(model, v)
            if writer is not None:
                at = max(0, step - 1)
                writer.add_scalar(f"{tag}/val/validity_median", med, at)
                writer.add_scalar(f"{tag}/val/validity_mean", mean, at)
                writer.add_scalar(f"{tag}/val/error", err if math.isfinite(err) else float("nan"), at)
            if best is None or (med, mean) > best["score"]:
                best = {"score": (med, mean), "step": step, "error": err, "model": _state_copy(model)}
                patience_left = self.patience
            elif patience_left is not None:
                patience_left -= 1

        def checkpoint(finished: bool, diagnostics: dict | None = None):
            if ckpt_dir is None:
                return
            state = {"step": step, "finished": finished, "settings": settings, "model": model.state_dict(),
                     "optimiser": optimiser.state_dict(), "generator": gen.get_state(),
                     "torch_rng": torch.get_rng_state(),
                     "counters": {"elapsed": elapsed(), "patience_left": patience_left, "recent": list(recent),
                                  "bad_gradients": bad_grads,
                                  "best_score": None if best is None else list(best["score"]),
                                  "best_step": None if best is None else best["step"],
                                  "best_error": None if best is None else best["error"]},
                     "best_model": None if best is None else best["model"]}
            if diagnostics is not None:
                state["diagnostics"] = diagnostics
            save_checkpoint(ckpt_dir, state)
            if writer is not None:
                writer.flush()

        if best is None:
            validate_and_keep()
        bar = None
        if ctx.progress and self.steps is not None:
            from tqdm.auto import tqdm
            bar = tqdm(total=self.steps, initial=step, desc=f"fitting {tag}", unit="step", leave=False)
        n_traj = train.n_trajectories
        stop_reason = "budget"
        nfe_counter = solver if hasattr(solver, "nfe") else None
        try:
            while True:
                if self.patience is not None and patience_left is not None and patience_left <= 0:
                    stop_reason = "early_stop"
                    break
                progress = self._progress(step, elapsed())
                if progress >= 1.0:
                    stop_reason = "budget" if self.steps is not None and step >= self.steps else "time"
                    break
                lr = self._lr(progress, lr0, lr1)
                for group in optimiser.param_groups:
                    group["lr"] = lr
                n_f = self._horizon(progress, h0, h1)
                hi = train.n_times - (n_warm + n_f)
                traj = torch.randint(0, n_traj, (self.batch_size,), generator=gen)
                start = torch.randint(0, hi, (self.batch_size,), generator=gen)
                nfe0 = nfe_counter.nfe if nfe_counter is not None else 0
                pred, truth = self._run_windows(model, states, forcing, traj, start, n_warm, n_grad, n_f, dt,
                                                solver, self.reforce_every)
                loss = (((pred - truth) / x_std) ** 2).mean()
                if not bool(torch.isfinite(loss)):
                    raise FitDiverged(f"trajectory fit of {tag}, step {step}",
                                      f"the forecast loss is {float(loss.detach())} "
                                      f"(forecast of {n_f * dt:g} time units)",
                                      f"lower fit.lr (now {lr0:g}), shorten fit.horizon (now up to "
                                      f"{self.horizon[1]:g} {self.unit}), or use a smaller solver step.")
                optimiser.zero_grad(set_to_none=True)
                loss.backward()
                loss_value = float(loss.detach())
                grad_norm = float(torch.nn.utils.clip_grad_norm_(params, self.clip))
                if math.isfinite(grad_norm):
                    optimiser.step()
                    bad_grads = 0
                else:
                    bad_grads += 1
                    if bad_grads > _MAX_BAD_GRADIENTS:
                        raise FitDiverged(f"trajectory fit of {tag}, step {step}",
                                          f"{bad_grads} consecutive non-finite gradients",
                                          f"lower fit.lr (now {lr0:g}), shorten fit.horizon, or use a "
                                          "smaller solver step.")
                self._check_finite(params, "parameters", step, ctx)
                recent = (recent + [loss_value])[-self.val_every:]
                if writer is not None:
                    writer.add_scalar(f"{tag}/train/loss", loss_value, step)
                    writer.add_scalar(f"{tag}/train/grad_norm", grad_norm, step)
                    writer.add_scalar(f"{tag}/train/lr", lr, step)
                    writer.add_scalar(f"{tag}/train/horizon", n_f * dt, step)
                    if nfe_counter is not None:
                        writer.add_scalar(f"{tag}/train/nfe", nfe_counter.nfe - nfe0, step)
                step += 1
                if bar is not None:
                    bar.update(1)
                    bar.set_postfix(loss=f"{loss_value:.3g}", horizon=f"{n_f * dt:.2g}")
                if step % self.val_every == 0:
                    validate_and_keep()
                if step % self.checkpoint_every == 0:
                    checkpoint(False)
        finally:
            if bar is not None:
                bar.close()
        if step % self.val_every != 0 and step > 0:
            validate_and_keep()
        model.load_state_dict(best["model"])
        diagnostics = {
            "train_error": float(np.mean(recent)) if recent else float("nan"),
            "val_error": float(best["error"]),
            "val_validity": float(best["score"][0]),
            "val_validity_mean": float(best["score"][1]),
            "best_step": int(best["step"]),
            "steps": int(step),
            "stop_reason": stop_reason,
            "resumed_from": resumed_from,
            "warm_up": float(ctx.warm_up),
            "fit_seconds": float(elapsed() if resumed_from is not None else time.perf_counter() - t_enter),
        }
        checkpoint(True, diagnostics)
        return diagnostics

    # -- helpers ------------------------------------------------------------------------
    def _uses_ridge(self, closure) -> bool:
        return self.readout_init == "ridge" or (
            self.readout_init == "auto" and getattr(closure, "has_linear_readout", False)
            and hasattr(closure, "readout_features"))

    def _initialise(self, model, train, val, ctx):
        closure = model.closure
        if self._uses_ridge(closure):
            ReadoutRidge(alpha=self.ridge_alpha, scheme=self.scheme).fit(model, train, val, ctx)
        else:
            _, inputs, rho = residual_targets(model, train, self.scheme)
            set_scaling(closure, inputs.reshape(-1, inputs.shape[-1]), rho.reshape(-1, rho.shape[-1]))

    @staticmethod
    def _check_finite(params, what, step, ctx):
        for p in params:
            if not bool(torch.isfinite(p).all()):
                raise FitDiverged(f"trajectory fit of {ctx.name}, step {step}", f"{what} became non-finite",
                                  "lower fit.lr, shorten fit.horizon, or use a smaller solver step.")

    @staticmethod
    def _check_settings(state, settings, ckpt_dir):
        saved = state.get("settings", {})
        for key in ("warm_up", "seed", "dt", "dtype"):
            if saved.get(key) != settings[key]:
                raise CheckpointError(f"{ckpt_dir}/state.pt", f"was written with {key}={saved.get(key)!r}, "
                                      f"now {key}={settings[key]!r}",
                                      "resume with the settings of the interrupted run, or start a new run.")
        old, new = saved.get("fitter", {}), settings["fitter"]
        for key in sorted(set(old) | set(new)):
            if old.get(key) != new.get(key):
                raise CheckpointError(f"{ckpt_dir}/state.pt", f"was written with fit.{key}={old.get(key)!r}, "
                                      f"now fit.{key}={new.get(key)!r}",
                                      "resume with the settings of the interrupted run, or start a new run.")
