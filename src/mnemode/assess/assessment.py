"""Assess several models on one shared test set: forecast skill and long-run statistics.

:func:`assess_models` takes fitted models (it only simulates them, never refits),
the test trajectories and the system, and measures for every model

* **validity time** — from ``n_starts`` starts spread along the test trajectories,
  each model's hidden state warmed up on the preceding ``warm_up`` time units of
  observations, then free-run for ``horizon``: the time until
  ``‖x̂ − x‖ / RMS(x) > γ`` (median and quartiles; also in Lyapunov times);
* **invariant-measure KL** — KL(truth ‖ model) of the 1-D marginals of long
  free runs against the test data (:mod:`mnemode.assess.statistics`);
* **autocorrelation error** — RMS difference of the ACFs up to ``acf_max_lag``;

next to the physics-only model (added if missing), the oracle (the truth from
perturbed true full states) and the floor (an independent truth run scored the
same way). It returns plain, JSON-ready data and optionally writes PNG figures,
``report.md`` and TensorBoard figures.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields
from pathlib import Path

import numpy as np

from ..data import TrajectorySet, validate
from ..errors import ConfigError
from ..hybrid import HybridField, HybridFlowMap
from ..solvers import RK4, Solver
from ..systems.base import System
from . import figures as figs
from .baselines import (oracle_forecasts, oracle_noise_level, oracle_unavailable, physics_only_model,
                        resolve_lyapunov, truth_run)
from .forecasts import RunOutcome, Starts, choose_starts, run_forecasts
from .metrics import normalised_error, rms_scale, summarise_validity, validity_times
from .report import metrics_table, write_report
from .statistics import MarginalHistograms, acf_error, mean_autocorrelation

__all__ = ["ModelEntry", "AssessSettings", "assess_models", "metrics_table", "RESERVED_NAMES"]

RESERVED_NAMES = ("oracle",)


@dataclass
class ModelEntry:
    """A model to assess and the solver that integrates it (``None`` for a discrete flow map)."""

    model: HybridField | HybridFlowMap
    solver: Solver | None = None


@dataclass
class AssessSettings:
    """How the assessment is run. Times are in the system's time units.

    Attributes:
        gamma: validity threshold on the normalised error ``‖x̂ − x‖ / RMS(x)``.
        warm_up: observed history driving each model's hidden state before a forecast.
        horizon: forecast length; forecasts still valid then are censored.
        n_starts: forecast starts spread along the test trajectories.
        free_run_length: length of each long free run for invariant statistics.
        free_run_starts: number of free runs (each from the end of a warm-up).
        transient: time discarded at the start of each free run.
        n_bins: inner histogram bins per component for the invariant measure.
        acf_max_lag: largest autocorrelation lag.
        oracle_noise: oracle start perturbation relative to each component's std;
            ``None``: the data's noise level, or 1e-4 for clean data.
        seed: seeds the oracle perturbation, the floor run and the Lyapunov estimate.
        progress: show a progress bar.
        pseudo_count: added to every histogram bin before normalising.
        truth_step: RK4 step limit for truth runs (oracle, floor, Lyapunov estimate).
        lyapunov_duration: averaging time of the Lyapunov estimate when the system states none.
        solver: for continuous models given without one (and the added physics-only
            model); ``None``: the first solver among the entries, else ``RK4(min(dt, 0.01))``.
        batch_size: forecasts run together (all at once when ``None``).
        max_components: panels per figure for systems with many components.
    """

    gamma: float = 0.5
    warm_up: float = 5.0
    horizon: float = 25.0
    n_starts: int = 50
    free_run_length: float = 500.0
    free_run_starts: int = 8
    transient: float = 10.0
    n_bins: int = 50
    acf_max_lag: float = 5.0
    oracle_noise: float | None = None
    seed: int = 0
    progress: bool = False
    pseudo_count: float = 0.5
    truth_step: float = 0.005
    lyapunov_duration: float = 100.0
    solver: Solver | None = None
    batch_size: int | None = None
    max_components: int = 4

    def check(self) -> None:
        """Raise :class:`ConfigError` naming the first setting out of range."""
        positive = ("gamma", "horizon", "n_starts", "free_run_length", "free_run_starts", "n_bins",
                    "acf_max_lag", "truth_step", "lyapunov_duration", "max_components")
        for name in positive:
            v = getattr(self, name)
            if not isinstance(v, (int, float)) or not math.isfinite(v) or v <= 0:
                raise ConfigError(f"assess.{name}", f"is {v!r}; it must be a positive number",
                                  f"set assess.{name} to a value > 0.")
        for name in ("warm_up", "transient", "pseudo_count"):
            v = getattr(self, name)
            if not isinstance(v, (int, float)) or not math.isfinite(v) or v < 0:
                raise ConfigError(f"assess.{name}" if name != "warm_up" else "warm_up",
                                  f"is {v!r}; it must be a number ≥ 0", "set it to a value ≥ 0.")
        if self.oracle_noise is not None and not (math.isfinite(self.oracle_noise) and self.oracle_noise >= 0):
            raise ConfigError("assess.oracle_noise", f"is {self.oracle_noise!r}; it must be ≥ 0 or null",
                              "set it to e.g. 1e-4, or null for the data's noise level.")
        if self.batch_size is not None and self.batch_size < 1:
            raise ConfigError("assess.batch_size", f"is {self.batch_size!r}; it must be ≥ 1 or null",
                              "set it to a positive integer or null.")

    def to_dict(self) -> dict:
        """Plain-data copy (the solver as its ``repr``)."""
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        d["solver"] = None if self.solver is None else repr(self.solver)
        return d


# -- helpers ------------------------------------------------------------------------

def _plain(obj):
    """JSON-ready copy: numpy scalars → Python, non-finite floats → ``None``."""
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if math.isfinite(obj) else None
    if isinstance(obj, np.ndarray):
        return _plain(obj.tolist())
    return obj


def _steps(duration: float, dt: float) -> int:
    return int(round(duration / dt))


def _entries(models: dict, system: System, settings: AssessSettings, dt: float, notes: list) -> dict:
    """Validated ``name → ModelEntry`` with ``physics_only`` first and a solver for each continuous model."""
    if not isinstance(models, dict):
        raise ConfigError("models", f"is a {type(models).__name__}; expected a dict name → ModelEntry",
                          "pass e.g. {'memory': ModelEntry(model, RK4(0.02))}.")
    entries: dict[str, ModelEntry] = {}
    for name, e in models.items():
        if name in RESERVED_NAMES:
            raise ConfigError(f"models[{name!r}]", f"uses the reserved name {name!r} (a built-in baseline)",
                              "rename the model.")
        if isinstance(e, (HybridField, HybridFlowMap)):
            e = ModelEntry(e, None)
        if not isinstance(e, ModelEntry) or not isinstance(e.model, (HybridField, HybridFlowMap)):
            raise ConfigError(f"models[{name!r}]", f"is a {type(e).__name__}; expected a ModelEntry holding a "
                              "HybridField or HybridFlowMap", "wrap the model: ModelEntry(model, solver).")
        if e.model.dim != system.dim:
            raise ConfigError(f"models[{name!r}]", f"acts on {e.model.dim} components but the system observes "
                              f"{system.dim}", "assess models built for this system.")
        if isinstance(e.model, HybridFlowMap) and abs(e.model.dt - dt) > 1e-9 * max(1.0, dt):
            raise ConfigError(f"models[{name!r}]", f"is a flow map over Δt = {e.model.dt} but the test data are "
                              f"sampled every {dt}", "assess it on data with its own sampling interval.")
        entries[str(name)] = e
    default = settings.solver or next((e.solver for e in entries.values() if e.solver is not None), None) \
        or RK4(min(dt, 0.01))
    for name, e in entries.items():
        if isinstance(e.model, HybridField) and e.solver is None:
            entries[name] = ModelEntry(e.model, default)
            notes.append(f"{name} was given without a solver; it was integrated with {default!r}.")
    if "physics_only" not in entries:
        entries = {"physics_only": ModelEntry(physics_only_model(system), default), **entries}
    return entries


def _free_run_plan(test: TrajectorySet, starts: Starts, settings: AssessSettings, n_warm: int, dt: float,
                   notes: list) -> tuple[Starts, int, int]:
    """Starts, transient steps and recorded steps of the long free runs."""
    n_tr, n_free = _steps(settings.transient, dt), _steps(settings.free_run_length, dt)
    if test.forcing is None:
        return starts.subset(settings.free_run_starts), n_tr, n_free
    # Forced data: runs can only be driven as far as the recorded forcing reaches.
    k = min(settings.free_run_starts, test.n_trajectories)
    total = test.n_times - 1 - n_warm
    n_tr = min(n_tr, total // 2)
    notes.append(f"The data are forced, so free runs follow the recorded forcing of {k} test trajectories "
                 f"({(total - n_tr) * dt:g} time units each after the transient) instead of "
                 f"{settings.free_run_length:g}.")
    return Starts(np.arange(k), np.full(k, n_warm)), n_tr, total - n_tr


def _median_error(outcome_states, truth, scale) -> np.ndarray:
    return np.median(normalised_error(outcome_states, truth, scale), axis=1)


# -- the assessment -------------------------------------------------------------------

def assess_models(models: dict, test: TrajectorySet, system: System, settings: AssessSettings | None = None,
                  out_dir: str | Path | None = None, writer=None) -> dict:
    """Score every model and the baselines on one test set; optionally write figures and a report.

    Args:
        models: name → :class:`ModelEntry` (a bare hybrid model is accepted as
            ``ModelEntry(model, None)``). ``physics_only`` is added if missing.
        test: test trajectories ``(T, B, D)``; ``test.hidden`` enables the oracle.
        system: the system (nominal physics, truth if known, Lyapunov exponent, ring).
        settings: :class:`AssessSettings` (defaults when ``None``).
        out_dir: if given, PNG figures go to ``out_dir/figures/`` and the report
            to ``out_dir/report.md`` (``metrics.json`` is the caller's).
        writer: a TensorBoard ``SummaryWriter``; figures are added with ``add_figure``.

    Returns:
        Plain JSON-ready dict: ``gamma``, ``lyapunov_time``, ``lyapunov_exponent``,
        ``lyapunov_source``, ``warm_up``, ``horizon``, ``n_starts``, ``dt``,
        ``scale``, ``models`` (name → ``validity_time_median``, ``_q25``, ``_q75``,
        their ``_lyapunov`` versions, ``censored_fraction``, ``censored_count``,
        ``kl_invariant``, ``acf_error``, ``blew_up``, ``validity_times``, ...),
        ``floor`` (``kl_invariant``, ``acf_error``, ``source``), ``notes``,
        ``settings``, ``figures`` and ``report`` (paths relative to ``out_dir``).
        Non-finite numbers (a model that blew up) appear as ``None``.

    Raises:
        ConfigError: bad settings or model entries.
        DataError: a test set that is invalid or too short for warm-up plus horizon.
    """
    settings = settings or AssessSettings()
    settings.check()
    validate(test, "test set", expected_dim=system.dim)
    dt = test.dt
    notes: list[str] = []
    entries = _entries(models, system, settings, dt, notes)
    pooled = bool(system.ring)

    n_warm, n_h = _steps(settings.warm_up, dt), _steps(settings.horizon, dt)
    if n_h < 1:
        raise ConfigError("assess.horizon", f"is {settings.horizon}, shorter than one sample interval ({dt})",
                          "make the horizon at least a few sample intervals.")
    starts = choose_starts(test.n_times, test.n_trajectories, n_warm, n_h, settings.n_starts)
    if len(starts) < settings.n_starts:
        notes.append(f"Only {len(starts)} distinct forecast starts fit in the test set "
                     f"({settings.n_starts} requested).")
    truth_windows = np.stack([test.states[s: s + n_h + 1, b] for b, s in zip(starts.trajectory, starts.index)],
                             axis=1)                                      # (n_h + 1, N, D)
    scale = rms_scale(test.states)
    fr_starts, n_tr, n_free = _free_run_plan(test, starts, settings, n_warm, dt, notes)
    seg = min(test.n_times, n_free + 1)
    n_lag = _steps(settings.acf_max_lag, dt)
    if not 1 <= n_lag < seg:
        raise ConfigError("assess.acf_max_lag", f"is {settings.acf_max_lag}, i.e. {n_lag} samples, but the ACF "
                          f"segments hold {seg} samples", "choose a lag between one sample interval and a "
                          "fraction of the test trajectories' and free runs' length.")

    lam, lam_source = resolve_lyapunov(system, duration=settings.lyapunov_duration, step=settings.truth_step,
                                       seed=settings.seed)
    if lam_source == "not chaotic":
        notes.append("The Lyapunov estimate on the truth was not positive; no Lyapunov-time units.")

    reference = MarginalHistograms(test.states, settings.n_bins, pooled, pseudo_count=settings.pseudo_count)
    ref_acf = mean_autocorrelation(test.states, n_lag, seg, pooled)

    oracle_reason = oracle_unavailable(system, test)
    use_truth_floor = system.truth is not None and test.forcing is None
    total = len(entries) * (len(starts) + len(fr_starts)) + (0 if oracle_reason else len(starts)) \
        + (len(fr_starts) if use_truth_floor else 0)
    bar = _progress(total, settings.progress)

    per_model: dict[str, dict] = {}
    plots: dict[str, dict] = {}
    try:
        for name, e in entries.items():
            bar.set_postfix_str(f"{name}: forecasts")
            fc = run_forecasts(e.model, e.solver, test.states, starts, n_warm, n_h, dt, test.forcing,
                               settings.batch_size, bar.update)
            bar.set_postfix_str(f"{name}: free run")
            fr = run_forecasts(e.model, e.solver, test.states, fr_starts, n_warm, n_tr + n_free, dt,
                               test.forcing, settings.batch_size, bar.update)
            per_model[name], plots[name] = _score(name, fc, fr, n_tr, truth_windows, dt, scale, settings, lam,
                                                  reference, ref_acf, n_lag, seg, pooled, notes)
            per_model[name].update(kind="model" if name in models else "baseline",
                                   hidden_size=int(e.model.hidden_size),
                                   form="flow map" if isinstance(e.model, HybridFlowMap) else "vector field")

        oracle_level = oracle_noise_level(test, settings.oracle_noise)
        if oracle_reason:
            notes.append(oracle_reason[0].upper() + oracle_reason[1:] + ".")
        else:
            bar.set_postfix_str("oracle")
            fc = oracle_forecasts(system, test, starts, n_h, oracle_level, settings.truth_step, settings.seed)
            bar.update(len(starts))
            t, c = validity_times(fc.states, truth_windows, dt, settings.gamma, scale)
            m = summarise_validity(t, c, lam)
            m.update(validity_times=t, kl_invariant=None, acf_error=None, blew_up=not fc.finite,
                     kind="baseline", hidden_size=system.truth_dim - system.dim, form="truth equations",
                     start_perturbation=oracle_level)
            per_model["oracle"] = m
            plots["oracle"] = dict(forecast=fc.states, median_error=_median_error(fc.states, truth_windows, scale),
                                   validity=t, counts=None, acf=None)

        bar.set_postfix_str("floor")
        floor, floor_plot = _floor(system, test, settings, use_truth_floor, fr_starts, n_free, dt, reference,
                                   ref_acf, n_lag, seg, pooled)
        bar.update(len(fr_starts) if use_truth_floor else 0)
        if "oracle" in per_model and use_truth_floor:
            # The oracle integrates the truth equations: its long-run statistics are the floor run's.
            per_model["oracle"].update(kl_invariant=floor["kl_invariant"], acf_error=floor["acf_error"])
    finally:
        bar.close()

    result = {
        "gamma": settings.gamma, "lyapunov_time": None if lam is None else 1.0 / lam,
        "lyapunov_exponent": lam, "lyapunov_source": lam_source, "warm_up": settings.warm_up,
        "horizon": n_h * dt, "n_starts": len(starts), "dt": dt, "scale": scale,
        "time_unit": system.time_unit, "oracle_noise": None if oracle_reason else oracle_level,
        "pooled": pooled, "acf_segment_length": (seg - 1) * dt,
        "test_set": {"n_trajectories": test.n_trajectories, "n_times": test.n_times, "dt": dt,
                     "duration": test.duration},
        "models": per_model, "floor": floor, "notes": notes,
        "settings": settings.to_dict(), "figures": {}, "report": None,
    }
    result = _plain(result)
    if out_dir is not None or writer is not None:
        made = _figures(result, plots, floor_plot, reference, ref_acf, test, starts, n_warm, n_h, dt, system,
                        settings, out_dir, writer)
        if out_dir is not None:
            result["figures"] = made
            write_report(result, out_dir, {_CAPTIONS[k]: v for k, v in made.items()})
            result["report"] = "report.md"
    return result


def _progress(total: int, enabled: bool):
    from tqdm.auto import tqdm

    return tqdm(total=total, desc="assessing", unit="run", disable=not enabled, leave=False)


def _score(name, fc: RunOutcome, fr: RunOutcome, n_tr, truth_windows, dt, scale, settings, lam,
           reference: MarginalHistograms, ref_acf, n_lag, seg, pooled, notes) -> tuple[dict, dict]:
    """Validity summary and long-run statistics of one model."""
    t, c = validity_times(fc.states, truth_windows, dt, settings.gamma, scale)
    m = summarise_validity(t, c, lam)
    m["validity_times"] = t
    bad_fc = int((~np.isfinite(fc.states).all(axis=(0, 2))).sum())
    plot = dict(forecast=fc.states, median_error=_median_error(fc.states, truth_windows, scale), validity=t,
                counts=None, acf=None)
    runs = fr.states[n_tr:]
    blew_up = bad_fc > 0 or not fr.finite
    if fr.finite:
        m["kl_invariant"], m["kl_per_component"] = reference.kl(runs)
        model_acf = mean_autocorrelation(runs, n_lag, seg, pooled)
        m["acf_error"] = acf_error(ref_acf, model_acf)
        plot.update(counts=reference.counts(runs), acf=model_acf)
    else:
        m["kl_invariant"], m["kl_per_component"], m["acf_error"] = None, None, None
    m["blew_up"] = blew_up
    if blew_up:
        why = fc.failure or fr.failure
        where = []
        if bad_fc:
            where.append(f"{bad_fc} of {fc.states.shape[1]} forecasts")
        if not fr.finite:
            where.append("the long free run")
        note = f"{name} blew up (non-finite states in {' and '.join(where)})" + (f": {why}" if why else "")
        if not fr.finite:
            note += "; it gets no long-run statistics"
        notes.append(note + ".")
    return m, plot


def _floor(system, test, settings, use_truth, fr_starts, n_free, dt, reference, ref_acf, n_lag, seg, pooled):
    """Truth-vs-truth scores: an independent truth run, or one half of the test set against the other."""
    if use_truth:
        runs = truth_run(system, len(fr_starts), n_free * dt, dt, settings.truth_step, settings.seed + 1)
        kl, per = reference.kl(runs)
        acf = mean_autocorrelation(runs, n_lag, seg, pooled)
        floor = {"kl_invariant": kl, "kl_per_component": per, "acf_error": acf_error(ref_acf, acf),
                 "source": "independent truth run"}
        return floor, dict(counts=reference.counts(runs), acf=acf)
    # No truth generator: split the test data (by trajectory, else by time) and compare the halves.
    s = test.states
    if test.n_trajectories >= 2:
        a, b = s[:, : test.n_trajectories // 2], s[:, test.n_trajectories // 2:]
        how = "test set: first half of the trajectories vs the second half"
    else:
        h = test.n_times // 2
        a, b = s[:h], s[h: 2 * h]
        how = "test set: first half in time vs the second half"
    half_ref = MarginalHistograms(a, reference.edges[0].size - 1, pooled, pseudo_count=reference.pseudo_count)
    kl, per = half_ref.kl(b)
    seg_h = min(seg, a.shape[0])
    if n_lag >= seg_h:
        acf_err, acf_b = None, None
    else:
        acf_b = mean_autocorrelation(b, n_lag, seg_h, pooled)
        acf_err = acf_error(mean_autocorrelation(a, n_lag, seg_h, pooled), acf_b)
    return ({"kl_invariant": kl, "kl_per_component": per, "acf_error": acf_err, "source": how},
            dict(counts=None, acf=None))


_CAPTIONS = {
    "forecast_traces": "Forecasts from one test start",
    "error_growth": "Forecast error growth",
    "validity_times": "Validity times",
    "invariant_densities": "Invariant densities",
    "autocorrelation": "Autocorrelation functions",
}


def _figures(result, plots, floor_plot, reference, ref_acf, test, starts, n_warm, n_h, dt, system, settings,
             out_dir, writer) -> dict[str, str]:
    """Draw, save and log every figure; returns key → path relative to ``out_dir``."""
    names = list(plots)
    colours = figs.model_colours(names)
    unit = system.time_unit
    t = np.arange(n_h + 1) * dt
    b0, s0 = int(starts.trajectory[0]), int(starts.index[0])
    n_hist = min(n_warm, max(1, n_h // 5))
    labels = ["pooled over ring sites"] if result["pooled"] else list(test.names)
    built = {
        "forecast_traces": figs.forecast_traces_figure(
            t, test.states[s0: s0 + n_h + 1, b0], {n: p["forecast"][:, 0] for n, p in plots.items()},
            list(test.names), colours, history_t=np.arange(-n_hist, 1) * dt,
            history=test.states[s0 - n_hist: s0 + 1, b0],
            validity={n: float(p["validity"][0]) for n, p in plots.items()},
            max_components=settings.max_components, time_unit=unit),
        "error_growth": figs.error_growth_figure(t, {n: p["median_error"] for n, p in plots.items()}, colours,
                                                 settings.gamma, unit),
        "validity_times": figs.validity_figure({n: p["validity"] for n, p in plots.items()}, colours,
                                               result["horizon"], result["lyapunov_exponent"], unit),
        "invariant_densities": figs.density_figure(
            reference.edges, reference.reference_counts,
            {n: p["counts"] for n, p in plots.items() if p["counts"] is not None}, colours, labels,
            floor_counts=floor_plot["counts"], max_components=settings.max_components),
        "autocorrelation": figs.acf_figure(
            np.arange(ref_acf.shape[0]) * dt, ref_acf,
            {n: p["acf"] for n, p in plots.items() if p["acf"] is not None}, colours, labels,
            floor_acf=floor_plot["acf"], max_components=settings.max_components, time_unit=unit),
    }
    made = {}
    for key, fig in built.items():
        if out_dir is not None:
            figs.save_figure(fig, Path(out_dir) / "figures" / f"{key}.png")
            made[key] = f"figures/{key}.png"
        if writer is not None:
            writer.add_figure(f"assess/{key}", fig, global_step=0, close=True)
    return made
