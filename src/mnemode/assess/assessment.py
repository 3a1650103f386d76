"""Assess several models on one shared test set: forecast skill, long-run statistics, stability.

:func:`assess_models` takes fitted models (it only simulates them, never refits),
the test trajectories and the system, and measures for every model

* **validity time** — from ``n_starts`` starts spread along the test trajectories,
  each model's hidden state warmed up on the preceding ``warm_up`` time units of
  observations, then free-run for ``horizon``: the time until
  ``‖x̂ − x‖ / RMS(x) > γ`` (median and quartiles, flagged as lower bounds where
  they rest on forecasts censored at the horizon; also in Lyapunov times and, with
  an oracle, in predictability times of the observed variables);
* **invariant-measure KL** — KL(truth ‖ model) of the 1-D marginals of long
  free runs against the test data (:mod:`mnemode.assess.statistics`);
* **autocorrelation error** — RMS difference of the ACFs up to ``acf_max_lag``;
* **stability** — the share of free runs of ``stability_length`` that leave the
  training envelope, and when (:mod:`mnemode.assess.stability`);

next to the physics-only model (added if missing), the oracle (the truth from
perturbed true full states; only when a truth model and its hidden components
are known) and the floor (an independent truth run, or one half of the test set
against the other, scored the same way). It returns plain, JSON-ready data and
optionally writes PNG figures, ``report.md`` and TensorBoard figures.

The steps, in order: :func:`_plan` (starts, windows, free-run lengths),
:func:`_references` (Lyapunov exponent, histograms, ACF, envelope),
:func:`_run_oracle`, :func:`_time_scales`, :func:`_score_model` for each model,
:func:`_floor`, :func:`_result`, :func:`_write_outputs`.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..data import TrajectorySet, validate
from ..errors import ConfigError
from ..forecasting import RunOutcome, Starts, choose_starts, run_forecasts
from ..hybrid import HybridField, HybridFlowMap
from ..solvers import RK4, Solver
from ..systems.base import System
from ..validity import normalised_error, rms_scale, validity_times
from . import figures as figs
from .references import (oracle_forecasts, oracle_noise_level, oracle_unavailable, physics_only_model,
                        resolve_lyapunov, truth_run)
from .metrics import error_doubling_time, summarise_validity
from .report import write_report
from .settings import AssessSettings
from .stability import Envelope, summarise_escapes
from .statistics import MarginalHistograms, acf_error, mean_autocorrelation

__all__ = ["ModelEntry", "assess_models", "RESERVED_NAMES", "DATA_TIME_UNIT"]

RESERVED_NAMES = ("oracle",)
DATA_TIME_UNIT = "time unit of the data"
# Doublings of the oracle's median error, below γ, that measure the observed variables' error growth.
_DOUBLINGS = 3
# λ·T_p above which the largest exponent is called faster than the observed variables' error growth.
_FAST_EXPONENT_RATIO = 2.0


@dataclass
class ModelEntry:
    """A model to assess and the solver that integrates it (``None`` for a discrete flow map)."""

    model: HybridField | HybridFlowMap
    solver: Solver | None = None


# -- state objects --------------------------------------------------------------------

@dataclass
class _FreeRuns:
    """Where the long free runs start and how their samples are used (counts of intervals)."""

    starts: Starts
    n_transient: int
    n_statistics: int
    n_total: int

    def statistics_window(self, states: np.ndarray) -> np.ndarray:
        return states[self.n_transient: self.n_transient + self.n_statistics + 1]


@dataclass
class _Plan:
    """What is run: the models, the forecast starts and truth windows, the free runs."""

    entries: dict
    dt: float
    n_warm: int
    n_horizon: int
    starts: Starts
    truth: np.ndarray                   # (n_horizon + 1, N, D) truth after each start
    scale: float
    free: _FreeRuns
    n_lag: int
    acf_segment: int                    # samples per ACF segment


@dataclass
class _References:
    """What models are compared with: time scale, invariant measure, ACF, envelope."""

    lyapunov_exponent: float | None
    lyapunov_source: str | None
    histograms: MarginalHistograms
    acf: np.ndarray
    pooled: bool
    envelope: Envelope


@dataclass
class _Curves:
    """Arrays one model contributes to the figures."""

    forecast: np.ndarray
    median_error: np.ndarray
    validity: np.ndarray
    counts: list | None = None
    acf: np.ndarray | None = None


@dataclass
class _Run:
    """Everything the steps share: inputs, plan, references, notes and the results so far."""

    test: TrajectorySet
    system: System
    settings: AssessSettings
    plan: _Plan
    refs: _References
    notes: list[str]
    bar: object = None
    time_scales: dict = field(default_factory=dict)
    metrics: dict[str, dict] = field(default_factory=dict)
    curves: dict[str, _Curves] = field(default_factory=dict)


# -- the assessment -------------------------------------------------------------------

def assess_models(models: dict, test: TrajectorySet, system: System, settings: AssessSettings | None = None,
                  out_dir: str | Path | None = None, writer=None, envelope: dict | None = None) -> dict:
    """Score every model and the references (physics-only, oracle) on one test set; optionally write figures and a report.

    Args:
        models: name → :class:`ModelEntry` (a bare hybrid model is accepted as
            ``ModelEntry(model, None)``). ``physics_only`` is added if missing.
        test: test trajectories ``(T, B, D)``; ``test.hidden`` enables the oracle.
        system: the system (nominal physics, truth if known, Lyapunov exponent, ring).
        settings: :class:`AssessSettings` (defaults when ``None``).
        out_dir: if given, PNG figures go to ``out_dir/figures/`` and the report
            to ``out_dir/report.md`` (``metrics.json`` is the caller's).
        writer: a TensorBoard ``SummaryWriter``; figures are added with ``add_figure``.
        envelope: the training data's per-component ``[min, max]`` (as
            :meth:`TrajectorySet.envelope` gives it); ``None``: the test set's range.

    Returns:
        Plain JSON-ready dict: ``gamma``, ``lyapunov_time``, ``lyapunov_exponent``,
        ``lyapunov_source``, ``lyapunov_scope``, ``predictability`` (the observed
        variables' error growth, or ``None``), ``warm_up``, ``horizon``,
        ``n_starts``, ``dt``, ``scale``, ``time_unit``, ``envelope``, ``models``
        (name → ``validity_time_median``, ``_q25``, ``_q75``, their
        ``_lyapunov``, ``_predictability`` and ``_lower_bound`` versions,
        ``censored_fraction``, ``censored_count``, ``kl_invariant``, ``acf_error``,
        ``blew_up``, ``escape_fraction``, ``escape`` (see
        :func:`mnemode.assess.stability.summarise_escapes`), ``validity_times``, ...),
        ``floor``, ``notes``, ``settings``, ``figures``, ``report`` and
        ``cost_seconds``. Non-finite numbers appear as ``None``.

    Raises:
        ConfigError: bad settings or model entries.
        DataError: a test set that is invalid or too short for warm-up plus horizon.
    """
    t0 = time.perf_counter()
    settings = settings or AssessSettings()
    settings.check()
    validate(test, "test set", expected_dim=system.dim)
    notes: list[str] = []
    plan = _plan(models, test, system, settings, notes)
    run = _Run(test, system, settings, plan, _references(test, system, settings, plan, envelope), notes)
    run.bar = _progress(_n_runs(run), settings.progress)
    try:
        _run_oracle(run)
        run.time_scales = _time_scales(run)
        for name, entry in plan.entries.items():
            _score_model(run, name, entry, kind="model" if name in models else "baseline")
        floor, floor_curves = _floor(run)
    finally:
        run.bar.close()
    _horizon_advice(run)
    result = _result(run, floor)
    result["cost_seconds"] = time.perf_counter() - t0
    if out_dir is not None or writer is not None:
        _write_outputs(run, result, floor_curves, out_dir, writer)
    return result


# -- step 1: plan -------------------------------------------------------------------

def _steps(duration: float, dt: float) -> int:
    return int(round(duration / dt))


def _plan(models: dict, test: TrajectorySet, system: System, settings: AssessSettings, notes: list) -> _Plan:
    """Model entries, forecast starts and truth windows, free-run lengths, ACF lags."""
    dt = test.dt
    entries = _entries(models, system, settings, dt, notes)
    n_warm, n_h = _steps(settings.warm_up, dt), _steps(settings.horizon, dt)
    if n_h < 1:
        raise ConfigError("assess.horizon", f"is {settings.horizon}, shorter than one sample interval ({dt})",
                          "make the horizon at least a few sample intervals.")
    starts = choose_starts(test.n_times, test.n_trajectories, n_warm, n_h, settings.n_starts)
    if len(starts) < settings.n_starts:
        notes.append(f"Only {len(starts)} distinct forecast starts fit in the test set "
                     f"({settings.n_starts} requested).")
    truth = starts.windows(test.states, n_h)
    free = _free_runs(test, starts, settings, n_warm, notes)
    seg = min(test.n_times, free.n_statistics + 1)
    n_lag = _steps(settings.acf_max_lag, dt)
    if not 1 <= n_lag < seg:
        raise ConfigError("assess.acf_max_lag", f"is {settings.acf_max_lag}, i.e. {n_lag} samples, but the ACF "
                          f"segments hold {seg} samples", "choose a lag between one sample interval and a "
                          "fraction of the test trajectories' and free runs' length.")
    return _Plan(entries, dt, n_warm, n_h, starts, truth, rms_scale(test.states), free, n_lag, seg)


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


def _free_runs(test: TrajectorySet, starts: Starts, settings: AssessSettings, n_warm: int, notes: list) -> _FreeRuns:
    """Starts and lengths of the long free runs (statistics window, then on to the stability length)."""
    dt = test.dt
    n_tr, n_stat = _steps(settings.transient, dt), _steps(settings.free_run_length, dt)
    if test.forcing is None:
        n_total = max(n_tr + n_stat, _steps(settings.stability_length, dt))
        return _FreeRuns(starts.subset(settings.free_run_starts), n_tr, n_stat, n_total)
    # Forced data: runs can only be driven as far as the recorded forcing reaches.
    k = min(settings.free_run_starts, test.n_trajectories)
    total = test.n_times - 1 - n_warm
    n_tr = min(n_tr, total // 2)
    notes.append(f"The data are forced, so free runs follow the recorded forcing of {k} test trajectories "
                 f"({(total - n_tr) * dt:g} time units each after the transient) instead of "
                 f"{settings.free_run_length:g}; stability is judged over the same {total * dt:g}.")
    return _FreeRuns(Starts(np.arange(k), np.full(k, n_warm)), n_tr, total - n_tr, total)


# -- step 2: references ---------------------------------------------------------------

def _references(test: TrajectorySet, system: System, settings: AssessSettings, plan: _Plan,
                envelope: dict | None) -> _References:
    """The truth's Lyapunov exponent, the test data's histograms and ACF, the training envelope."""
    lam, source = resolve_lyapunov(system, duration=settings.lyapunov_duration, step=settings.truth_step,
                                   seed=settings.seed)
    pooled = bool(system.ring)
    histograms = MarginalHistograms(test.states, settings.n_bins, pooled, pseudo_count=settings.pseudo_count)
    acf = mean_autocorrelation(test.states, plan.n_lag, plan.acf_segment, pooled)
    if envelope is not None:
        ranges = np.asarray([envelope[n] for n in test.names], dtype=np.float64)
        env = Envelope.from_ranges(ranges[:, 0], ranges[:, 1], settings.envelope_margin, "training data")
    else:
        env = Envelope.of_samples(test.states, settings.envelope_margin, "test data")
    return _References(lam, source, histograms, acf, pooled, env)


def _n_runs(run: _Run) -> int:
    p = run.plan
    oracle = 0 if oracle_unavailable(run.system, run.test) else len(p.starts)
    floor = len(p.free.starts) if _truth_floor(run) else 0
    return len(p.entries) * (len(p.starts) + len(p.free.starts)) + oracle + floor


def _truth_floor(run: _Run) -> bool:
    return run.system.truth is not None and run.test.forcing is None


def _progress(total: int, enabled: bool):
    from tqdm.auto import tqdm

    return tqdm(total=total, desc="assessing", unit="run", disable=not enabled, leave=False)


# -- step 3: oracle and time scales ---------------------------------------------------

def _run_oracle(run: _Run) -> None:
    """Forecasts of the truth from perturbed true full states, when a truth model and its hidden state are known."""
    reason = oracle_unavailable(run.system, run.test)
    if reason:
        run.notes.append(reason[0].upper() + reason[1:] + ".")
        return
    s, p = run.settings, run.plan
    level = oracle_noise_level(run.test, s.oracle_noise)
    run.bar.set_postfix_str("oracle")
    fc = oracle_forecasts(run.system, run.test, p.starts, p.n_horizon, level, s.truth_step, s.seed)
    run.bar.update(len(p.starts))
    times, censored = validity_times(fc.states, p.truth, p.dt, s.gamma, p.scale)
    run.metrics["oracle"] = {"validity_times": times, "_censored": censored, "kl_invariant": None, "acf_error": None,
                             "blew_up": not fc.finite, "kind": "baseline",
                             "hidden_size": run.system.truth_dim - run.system.dim, "form": "truth equations",
                             "start_perturbation": level}
    run.curves["oracle"] = _Curves(fc.states, _median_error(fc.states, p.truth, p.scale), times)


def _time_scales(run: _Run) -> dict:
    """Which exponent the Lyapunov units use, and the observed variables' predictability time.

    The predictability time ``T_p = T_2 / ln 2`` comes from the oracle's median
    error doubling time ``T_2`` over the last three doublings below ``γ``
    (:func:`mnemode.assess.metrics.error_doubling_time`).
    """
    system, refs = run.system, run.refs
    hidden = system.truth is not None and system.truth_dim > system.dim
    scope = None
    if refs.lyapunov_exponent is not None:
        scope = "full system, hidden components included" if hidden else "observed system"
    if refs.lyapunov_source == "not chaotic":
        run.notes.append("The Lyapunov estimate on the truth was not positive; no Lyapunov-time units.")
    out = {"lyapunov_scope": scope, "predictability": None}
    curves = run.curves.get("oracle")
    if curves is None:
        return out
    t2 = error_doubling_time(curves.median_error, run.plan.dt, run.settings.gamma, _DOUBLINGS)
    if t2 is None:
        if hidden:
            run.notes.append("The oracle's median error does not grow through the last three doublings below γ "
                             "within the horizon, so the observed variables' predictability time is not "
                             "measured; extend assess.horizon to measure it.")
        return out
    tp = t2 / math.log(2.0)
    out["predictability"] = {
        "time": tp, "rate": 1.0 / tp, "doubling_time": t2,
        "source": f"oracle forecasts: median normalised error from γ/{2 ** _DOUBLINGS:g} to γ",
    }
    lam = refs.lyapunov_exponent
    if lam is not None and lam * tp > _FAST_EXPONENT_RATIO:
        run.notes.append(
            f"The largest Lyapunov exponent ({lam:.3g}, {scope}) is set by dynamics faster than the observed "
            f"variables: their errors e-fold every {tp:.3g} time units near the threshold (oracle), against "
            f"1/λ = {1 / lam:.3g}. Validity in Lyapunov times overstates how long forecasts last in units of "
            "the observed dynamics; the predictability-time columns use T_p instead.")
    return out


# -- step 4: models -------------------------------------------------------------------

def _score_model(run: _Run, name: str, entry: ModelEntry, kind: str) -> None:
    """Forecasts and free runs of one model: validity, invariant statistics, stability."""
    p, s, test = run.plan, run.settings, run.test
    run.bar.set_postfix_str(f"{name}: forecasts")
    true_times = test.absolute_times()
    fc = run_forecasts(entry.model, entry.solver, test.states, p.starts, p.n_warm, p.n_horizon, p.dt,
                       test.forcing, s.batch_size, run.bar.update, times=true_times)
    run.bar.set_postfix_str(f"{name}: free runs")
    fr = run_forecasts(entry.model, entry.solver, test.states, p.free.starts, p.n_warm, p.free.n_total, p.dt,
                       test.forcing, s.batch_size, run.bar.update, times=true_times)
    times, censored = validity_times(fc.states, p.truth, p.dt, s.gamma, p.scale)
    m = {"validity_times": times, "_censored": censored}
    curves = _Curves(fc.states, _median_error(fc.states, p.truth, p.scale), times)
    window = p.free.statistics_window(fr.states)
    window_finite = bool(np.all(np.isfinite(window)))
    if window_finite:
        m["kl_invariant"], m["kl_per_component"] = run.refs.histograms.kl(window)
        curves.acf = mean_autocorrelation(window, p.n_lag, p.acf_segment, run.refs.pooled)
        curves.counts = run.refs.histograms.counts(window)
        m["acf_error"] = acf_error(run.refs.acf, curves.acf)
    else:
        m["kl_invariant"], m["kl_per_component"], m["acf_error"] = None, None, None
    escape = summarise_escapes(fr.states, run.refs.envelope, p.dt)
    m.update(escape=escape, escape_fraction=escape["escape_fraction"], kind=kind,
             hidden_size=int(entry.model.hidden_size),
             form="flow map" if isinstance(entry.model, HybridFlowMap) else "vector field")
    m["blew_up"] = _note_blow_up(run, name, fc, fr, window_finite)
    if escape["escaped_count"]:
        run.notes.append(f"{name} left the training envelope (margin {s.envelope_margin:g}) in "
                         f"{escape['escaped_count']} of {escape['n_runs']} free runs of {escape['run_length']:g} "
                         f"time units (first exit at median {escape['escape_time_median']:.4g}).")
    run.metrics[name] = m
    run.curves[name] = curves


def _note_blow_up(run: _Run, name: str, fc: RunOutcome, fr: RunOutcome, window_finite: bool) -> bool:
    """Whether a model blew up in its forecasts or free runs; if so, a note saying where and why."""
    bad_fc = int((~np.isfinite(fc.states).all(axis=(0, 2))).sum())
    if bad_fc == 0 and fr.finite:
        return False
    where = []
    if bad_fc:
        where.append(f"{bad_fc} of {fc.states.shape[1]} forecasts")
    if not fr.finite:
        where.append("the long free runs" + ("" if window_finite else ", within the statistics window"))
    why = fc.failure or fr.failure
    note = f"{name} blew up (non-finite states in {' and '.join(where)})" + (f": {why}" if why else "")
    if not window_finite:
        note += "; it gets no long-run statistics"
    run.notes.append(note + ".")
    return True


def _median_error(states, truth, scale) -> np.ndarray:
    return np.median(normalised_error(states, truth, scale), axis=1)


# -- step 5: floor --------------------------------------------------------------------

def _floor(run: _Run) -> tuple[dict, _Curves | None]:
    """Truth-vs-truth scores: an independent truth run, or one half of the test set against the other."""
    p, s, refs = run.plan, run.settings, run.refs
    run.bar.set_postfix_str("floor")
    if _truth_floor(run):
        states = truth_run(run.system, len(p.free.starts), p.free.n_statistics * p.dt, p.dt, s.truth_step,
                           s.seed + 1)
        run.bar.update(len(p.free.starts))
        kl, per = refs.histograms.kl(states)
        acf = mean_autocorrelation(states, p.n_lag, p.acf_segment, refs.pooled)
        # The truth run judged by the same envelope rule: how often the rule fires on the truth itself.
        floor = {"kl_invariant": kl, "kl_per_component": per, "acf_error": acf_error(refs.acf, acf),
                 "source": "independent truth run", "escape": summarise_escapes(states, refs.envelope, p.dt)}
        if "oracle" in run.metrics:
            # The oracle integrates the truth equations: its long-run statistics are the floor run's.
            run.metrics["oracle"].update(kl_invariant=floor["kl_invariant"], acf_error=floor["acf_error"])
        return floor, _Curves(states, np.empty(0), np.empty(0), refs.histograms.counts(states), acf)
    s_, test = run.test.states, run.test
    if test.n_trajectories >= 2:
        a, b = s_[:, : test.n_trajectories // 2], s_[:, test.n_trajectories // 2:]
        how = "test set: first half of the trajectories vs the second half"
    else:
        h = test.n_times // 2
        a, b = s_[:h], s_[h: 2 * h]
        how = "test set: first half in time vs the second half"
    half_ref = MarginalHistograms(a, refs.histograms.edges[0].size - 1, refs.pooled,
                                  pseudo_count=refs.histograms.pseudo_count)
    kl, per = half_ref.kl(b)
    seg = min(p.acf_segment, a.shape[0])
    acf_err = None
    if p.n_lag < seg:
        acf_err = acf_error(mean_autocorrelation(a, p.n_lag, seg, refs.pooled),
                            mean_autocorrelation(b, p.n_lag, seg, refs.pooled))
    return {"kl_invariant": kl, "kl_per_component": per, "acf_error": acf_err, "source": how}, None


# -- step 6: result -------------------------------------------------------------------

def _horizon_advice(run: _Run) -> None:
    """A note for every model whose median validity rests on forecasts censored at the horizon."""
    h = run.plan.n_horizon * run.plan.dt
    for name, m in run.metrics.items():
        times = np.asarray(m["validity_times"])
        censored = int(np.sum(m["_censored"]))
        if censored * 2 > times.size:
            run.notes.append(
                f"{name}: {censored} of {times.size} forecasts ({100 * censored / times.size:.0f} %) are still "
                f"valid at the horizon ({h:g} time units), so its median validity time is only a lower bound; "
                f"extend the horizon (e.g. `mnemode assess RUN_DIR assess.horizon={2 * h:g}`).")


def _result(run: _Run, floor: dict) -> dict:
    """The plain, JSON-ready result."""
    p, s, refs, test = run.plan, run.settings, run.refs, run.test
    lam = refs.lyapunov_exponent
    pred = run.time_scales.get("predictability")
    tp = pred["time"] if pred else None
    models = {}
    for name in [*p.entries, *(["oracle"] if "oracle" in run.metrics else [])]:
        m = dict(run.metrics[name])
        censored = m.pop("_censored")
        models[name] = {**summarise_validity(m["validity_times"], censored, lam, tp), **m}
    result = {
        "gamma": s.gamma, "lyapunov_time": None if lam is None else 1.0 / lam,
        "lyapunov_exponent": lam, "lyapunov_source": refs.lyapunov_source,
        "lyapunov_scope": run.time_scales.get("lyapunov_scope"), "predictability": pred,
        "warm_up": s.warm_up, "horizon": p.n_horizon * p.dt, "n_starts": len(p.starts), "dt": p.dt,
        "scale": p.scale, "time_unit": run.system.time_unit or DATA_TIME_UNIT,
        "oracle_noise": run.metrics.get("oracle", {}).get("start_perturbation"),
        "pooled": refs.pooled, "acf_segment_length": (p.acf_segment - 1) * p.dt,
        "envelope": {"source": refs.envelope.source, "margin": s.envelope_margin,
                     "lower": refs.envelope.lower, "upper": refs.envelope.upper},
        "free_runs": {"n_runs": len(p.free.starts), "transient": p.free.n_transient * p.dt,
                      "statistics_length": p.free.n_statistics * p.dt, "stability_length": p.free.n_total * p.dt},
        "test_set": {"n_trajectories": test.n_trajectories, "n_times": test.n_times, "dt": p.dt,
                     "duration": test.duration},
        "models": models, "floor": floor, "notes": run.notes,
        "settings": s.to_dict(), "figures": {}, "report": None,
    }
    return _plain(result)


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


# -- step 7: figures and report --------------------------------------------------------

def _write_outputs(run: _Run, result: dict, floor_curves: _Curves | None, out_dir, writer) -> None:
    """Draw, save and log every figure (with its numbers as TensorBoard scalars); write the report."""
    built = _figures(run, result, floor_curves)
    made = {}
    if out_dir is not None:
        for key, fig in built.items():
            figs.save_figure(fig, Path(out_dir) / "figures" / f"{key}.png")
            made[key] = f"figures/{key}.png"
    if writer is not None:
        figs.log_figures(writer, built, figs.figure_numbers(result),
                         {"error_growth": {f"median_error/{n}": c.median_error for n, c in run.curves.items()}})
    if out_dir is not None:
        result["figures"] = made
        write_report(result, out_dir, {figs.CAPTIONS[k]: v for k, v in made.items()})
        result["report"] = "report.md"


def _figures(run: _Run, result: dict, floor_curves: _Curves | None) -> dict:
    """The five assessment figures, keyed by file stem (drawn by :func:`figures.assessment_figures`)."""
    p = run.plan
    order = [n for n in [*p.entries, "oracle"] if n in run.curves]   # the oracle last
    plots = {n: {"forecast": run.curves[n].forecast, "median_error": run.curves[n].median_error,
                 "validity": run.curves[n].validity, "counts": run.curves[n].counts, "acf": run.curves[n].acf}
             for n in order}
    floor = {"counts": None if floor_curves is None else floor_curves.counts,
             "acf": None if floor_curves is None else floor_curves.acf}
    return figs.assessment_figures(result, plots, floor, run.refs.histograms, run.refs.acf, run.test, p.starts,
                                   p.n_warm, p.n_horizon, p.dt, run.system, run.settings)
