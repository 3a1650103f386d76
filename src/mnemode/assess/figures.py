"""Assessment figures: forecast traces, error growth, validity times, invariant densities, ACFs,
training curves and hidden-state traces.

Each function returns a :class:`matplotlib.figure.Figure` built without pyplot
(no global state, no interactive backend: rendering goes through Agg when saved),
so the same object can be written as PNG and sent to TensorBoard. Lines take
their colour and dash pattern from :mod:`mnemode.assess.palette` by role (truth,
physics-only, references, learned models); axes carry units (the system's state
units and time unit); legends sit outside the data, below the panels; censored
forecasts and models that blew up are marked. Systems with many components show
at most ``max_components`` panels; ring systems show the pooled statistics of
their identical sites.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

from . import palette

__all__ = ["model_colours", "forecast_traces_figure", "error_growth_figure", "validity_figure",
           "density_figure", "acf_figure", "training_curves_figure", "hidden_state_figure", "save_figure",
           "assessment_figures", "figure_numbers", "log_figures", "CAPTIONS", "read_training_curves"]

CAPTIONS = {
    "forecast_traces": "Forecasts from one test start",
    "error_growth": "Forecast error growth",
    "validity_times": "Validity times",
    "invariant_densities": "Invariant densities",
    "autocorrelation": "Autocorrelation functions",
    "training_curves": "Training curves",
    "hidden_states": "Hidden-state traces of the memory models",
}

_BLOWN = dict(marker="X", ms=8, mec="black", mew=0.6, ls="none")   # a model left the finite numbers here


def model_colours(names) -> dict[str, palette.LineStyle]:
    """The line style of each model name, by role (:func:`mnemode.assess.palette.line_styles`)."""
    return palette.line_styles(list(names))


def _style(name: str, styles: dict) -> palette.LineStyle:
    s = styles.get(name)
    if isinstance(s, palette.LineStyle):
        return s
    return palette.line_styles([name])[name]


_NO_DIMENSION = ("1", "-", "dimensionless")


def _with_unit(label: str, unit: str | None) -> str:
    if unit in _NO_DIMENSION:
        return f"{label} (dimensionless)"
    return f"{label} ({unit})" if unit else f"{label} (no unit given)"


def _time_label(what: str, time_unit: str) -> str:
    return f"{what} ({time_unit or 'time units'})"


def _units(units, n: int) -> list[str]:
    units = list(units) if units is not None else []
    return [units[i] if i < len(units) else "" for i in range(n)]


def _panels(n: int, height: float = 2.2, width: float = 8.0, sharex: bool = True):
    fig = Figure(figsize=(width, 1.2 + height * n), layout="constrained")
    axes = fig.subplots(n, 1, sharex=sharex, squeeze=False)[:, 0]
    return fig, axes


def _legend_outside(fig: Figure, axes, ncol: int | None = None) -> None:
    """One legend for the figure, below the panels (outside every data area, clear of the title)."""
    handles, labels, seen = [], [], set()
    for ax in np.atleast_1d(axes):
        for h, lab in zip(*ax.get_legend_handles_labels()):
            if lab not in seen and not lab.startswith("_"):
                seen.add(lab)
                handles.append(h)
                labels.append(lab)
    if handles:
        fig.legend(handles, labels, loc="outside lower center", ncol=ncol or min(4, len(handles)), fontsize=8,
                   frameon=False)


def _last_finite(x: np.ndarray) -> int | None:
    """Index of the last row before the first non-finite one (``None`` if all rows are finite)."""
    bad = ~np.isfinite(x).all(axis=-1)
    if not bad.any():
        return None
    return max(int(np.argmax(bad)) - 1, 0)


def forecast_traces_figure(t, truth, forecasts: dict, names, colours: dict, *, history_t=None, history=None,
                           validity: dict | None = None, max_components: int = 4, time_unit: str = "",
                           title: str = "", units=None, horizon: float | None = None,
                           fade_after: float = 0.5) -> Figure:
    """Truth and every model's forecast from one start, one panel per component.

    Args:
        t: ``(T,)`` times since the forecast start.
        truth: ``(T, D)`` observed truth.
        forecasts: name → ``(T, D)`` forecast (NaN where a model blew up).
        names: component names; ``units`` their units.
        history_t, history: the warm-up history (drawn grey, ``t ≤ 0``), all of it.
        validity: name → validity time of this forecast. A model's line is drawn
            full up to its validity time plus ``fade_after`` of the horizon's
            remainder and faint after, so the traces stay readable late in the
            forecast; a forecast still valid at the horizon gets a ▶ (censored).
        horizon: forecast horizon (default ``t[-1]``).
    Models that blew up get an ✕ at their last finite state.
    """
    d = min(len(names), max_components)
    units = _units(units, d)
    horizon = float(t[-1]) if horizon is None else float(horizon)
    fig, axes = _panels(d)
    for i, ax in enumerate(axes):
        if history is not None:
            ax.plot(history_t, history[:, i], label="warm-up history (observed)", **palette.HISTORY.kw())
        ax.plot(t, truth[:, i], label="truth (test data)", **palette.TRUTH.kw())
        for name, x in forecasts.items():
            st = _style(name, colours)
            v = None if not validity else validity.get(name)
            cut = len(t)
            if v is not None and np.isfinite(v):
                t_cut = v + fade_after * max(horizon - v, 0.0)
                cut = int(np.searchsorted(t, t_cut, side="right"))
            ax.plot(t[:cut], x[:cut, i], label=name, **st.kw())
            if cut < len(t):
                ax.plot(t[cut - 1:], x[cut - 1:, i], alpha=0.25, **{**st.kw(), "lw": 0.8})
            if v is not None and np.isfinite(v):
                if v >= horizon - 1e-9:
                    ax.plot([horizon], [x[-1, i]], marker=">", ms=7, color=st.color, ls="none")
                else:
                    ax.axvline(v, color=st.color, ls=":", lw=0.9)
            k = _last_finite(x)
            if k is not None:
                ax.plot([t[k]], [x[k, i]], color=st.color, **_BLOWN)
        lo, hi = np.nanmin(truth[:, i]), np.nanmax(truth[:, i])
        if history is not None:
            lo, hi = min(lo, np.nanmin(history[:, i])), max(hi, np.nanmax(history[:, i]))
        pad = 0.35 * (hi - lo) + 1e-12
        ax.set_ylim(lo - pad, hi + pad)  # a model that runs away must not flatten the truth
        ax.set_ylabel(_with_unit(names[i], units[i]))
        ax.axvline(0.0, **palette.GUIDE.kw())
    axes[-1].set_xlabel(_time_label("time since forecast start", time_unit))
    # marker legend entries, once
    grey = palette.THRESHOLD.color
    axes[0].plot([], [], color=grey, ls=":", lw=0.9, label="validity time (dotted)")
    axes[0].plot([], [], color=grey, marker=">", ls="none", label="valid at horizon (censored)")
    axes[0].plot([], [], color=grey, **_BLOWN, label="blew up (last finite state)")
    fig.suptitle(title or "Forecasts from one test start: warm-up on observations, then free run", fontsize=10)
    _legend_outside(fig, axes)
    return fig


def error_growth_figure(t, median_errors: dict, colours: dict, gamma: float, time_unit: str = "") -> Figure:
    """Median normalised error ``‖x̂ − x‖ / RMS(x)`` over all starts against time, log scale.

    A curve that stops (non-finite errors: the model blew up) ends in an ✕.
    """
    fig = Figure(figsize=(8, 5), layout="constrained")
    ax = fig.subplots()
    for name, e in median_errors.items():
        st = _style(name, colours)
        e = np.asarray(e, dtype=np.float64)
        bad = ~np.isfinite(e)
        ax.plot(t, np.where(~bad & (e > 0), e, np.nan), label=name, **st.kw())
        if bad.any() and not bad.all():
            k = max(int(np.argmax(bad)) - 1, 0)
            ax.plot([t[k]], [e[k]], color=st.color, **_BLOWN)
    ax.axhline(gamma, label=f"validity threshold γ = {gamma:g}", **palette.THRESHOLD.kw())
    ax.set_yscale("log")
    ax.set_xlabel(_time_label("forecast time", time_unit))
    ax.set_ylabel("median normalised error ‖x̂ − x‖ / RMS(x) (dimensionless)")
    fig.suptitle("Forecast error growth (median over starts; ✕: blew up)", fontsize=10)
    _legend_outside(fig, [ax])
    return fig


def validity_figure(validity: dict, colours: dict, horizon: float, lyapunov_exponent: float | None = None,
                    time_unit: str = "", blew_up: dict | None = None) -> Figure:
    """Validity times per model: box plot with every forecast drawn as a point.

    Points at the horizon are censored forecasts (drawn ▲, counted above the box),
    so a model whose forecasts are all censored shows as a row of triangles rather
    than a box of zero height; models that blew up are marked under their name.
    """
    names = list(validity)
    fig = Figure(figsize=(max(5.5, 1.4 * len(names) + 2), 5), layout="constrained")
    ax = fig.subplots()
    data = [np.asarray(validity[n], dtype=np.float64) for n in names]
    bp = ax.boxplot([v[np.isfinite(v)] for v in data], patch_artist=True, widths=0.55,
                    medianprops={"color": "black"}, showfliers=False)
    labels = []
    for j, (patch, n, v) in enumerate(zip(bp["boxes"], names, data), start=1):
        st = _style(n, colours)
        patch.set_facecolor(st.color)
        patch.set_alpha(0.45)
        v = v[np.isfinite(v)]
        cens = v >= horizon - 1e-9
        # fixed, evenly spread offsets: the same picture every time
        off = np.linspace(-0.18, 0.18, max(len(v), 1))[: len(v)]
        ax.plot(j + off[~cens], v[~cens], "o", ms=3, color=st.color, mec="black", mew=0.3)
        ax.plot(j + off[cens], np.full(cens.sum(), horizon), "^", ms=5, color=st.color, mec="black", mew=0.3)
        ax.text(j, 1.02 * horizon, f"{int(cens.sum())}/{len(v)} censored", ha="center", va="bottom", fontsize=7)
        labels.append(n + ("\n(blew up)" if blew_up and blew_up.get(n) else ""))
    ax.set_xticks(range(1, len(names) + 1), labels, rotation=15)
    ax.axhline(horizon, label="horizon: forecasts still valid there are censored (▲)", **palette.THRESHOLD.kw())
    ax.set_ylabel(_time_label("validity time", time_unit))
    ax.set_ylim(0, 1.12 * horizon)
    if lyapunov_exponent:
        lam = float(lyapunov_exponent)
        sec = ax.secondary_yaxis("right", functions=(lambda v: v * lam, lambda v: v / lam))
        sec.set_ylabel("validity time (Lyapunov times)")
    fig.suptitle("Validity time over all forecast starts (box: quartiles; line: median)", fontsize=10)
    _legend_outside(fig, [ax], ncol=1)
    return fig


def density_figure(edges_list, truth_counts, model_counts: dict, colours: dict, labels, *,
                   floor_counts=None, max_components: int = 4, units=None,
                   blew_up: list[str] | None = None) -> Figure:
    """Densities of the 1-D marginals: truth (test data), each model, the independent truth run.

    ``edges_list[i]`` are the inner bin edges of panel ``i``; counts arrays hold
    ``[underflow, inner..., overflow]`` (only inner bins are drawn). Models listed
    in ``blew_up`` have no free run to draw and are named in the title.
    """
    d = min(len(edges_list), max_components)
    units = _units(units, d)
    fig, axes = _panels(d, height=2.4, sharex=False)  # components differ in range
    for i, ax in enumerate(axes):
        edges = edges_list[i]
        width = np.diff(edges)

        def density(c):
            c = np.asarray(c, dtype=np.float64)
            return c[1:-1] / max(c.sum(), 1.0) / width

        ax.stairs(density(truth_counts[i]), edges, fill=False, label="truth (test data)", **palette.TRUTH.kw())
        if floor_counts is not None:
            ax.stairs(density(floor_counts[i]), edges, label="independent truth run", **palette.FLOOR.kw())
        for name, counts in model_counts.items():
            if counts is not None:
                ax.stairs(density(counts[i]), edges, label=name, **_style(name, colours).kw())
        ax.set_xlabel(_with_unit(labels[i], units[i]))
        dimensional = units[i] and units[i] not in _NO_DIMENSION
        ax.set_ylabel(f"density (1/{units[i]})" if dimensional else "density (per unit of x)")
    title = "Invariant measure: 1-D marginal densities of long free runs"
    if blew_up:
        title += f"\n(no free run: {', '.join(blew_up)} blew up)"
    fig.suptitle(title, fontsize=10)
    _legend_outside(fig, axes)
    return fig


def acf_figure(lag_t, truth_acf, model_acfs: dict, colours: dict, labels, *, floor_acf=None,
               max_components: int = 4, time_unit: str = "", blew_up: list[str] | None = None) -> Figure:
    """Autocorrelation functions ``(K + 1, C)`` of truth, models and the independent truth run."""
    d = min(truth_acf.shape[1], max_components)
    fig, axes = _panels(d)
    for i, ax in enumerate(axes):
        ax.plot(lag_t, truth_acf[:, i], label="truth (test data)", **palette.TRUTH.kw())
        if floor_acf is not None:
            ax.plot(lag_t, floor_acf[:, i], label="independent truth run", **palette.FLOOR.kw())
        for name, a in model_acfs.items():
            if a is not None:
                ax.plot(lag_t, a[:, i], label=name, **_style(name, colours).kw())
        ax.axhline(0.0, **palette.GUIDE.kw())
        ax.set_ylabel(f"ACF of {labels[i]} (dimensionless)")
    axes[-1].set_xlabel(_time_label("lag", time_unit))
    title = "Autocorrelation of long free runs"
    if blew_up:
        title += f" (no free run: {', '.join(blew_up)} blew up)"
    fig.suptitle(title, fontsize=10)
    _legend_outside(fig, axes)
    return fig


# -- figures of the fit --------------------------------------------------------------

def read_training_curves(tb_dir: str | Path) -> dict[str, dict[str, tuple[np.ndarray, np.ndarray]]]:
    """Scalar series of a run's TensorBoard events: model → tag → (steps, values).

    Tags are ``<model>/<rest>``; every point is kept (``size_guidance`` 0).
    """
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    acc = EventAccumulator(str(tb_dir), size_guidance={"scalars": 0})
    acc.Reload()
    out: dict[str, dict] = {}
    for tag in acc.Tags().get("scalars", []):
        model, _, rest = tag.partition("/")
        if not rest or model == "assess":
            continue
        ev = acc.Scalars(tag)
        steps = np.array([e.step for e in ev], dtype=np.int64)
        vals = np.array([e.value for e in ev], dtype=np.float64)
        order = np.argsort(steps, kind="stable")
        out.setdefault(model, {})[rest] = (steps[order], vals[order])
    return out


def training_curves_figure(curves: dict, colours: dict, time_unit: str = "",
                           fit_errors: dict | None = None) -> Figure:
    """Training loss and validation validity against optimiser step, one line per model.

    Args:
        curves: model → tag → (steps, values), as :func:`read_training_curves` gives.
        fit_errors: model → (train error, its label) for fits in closed form
            (one number, no curve), listed under the panels.
    """
    fig = Figure(figsize=(8, 6.2), layout="constrained")
    ax_loss, ax_val = fig.subplots(2, 1, sharex=True)
    drawn = False
    for name, tags in curves.items():
        st = _style(name, colours)
        if "train/loss" in tags:
            s, v = tags["train/loss"]
            ax_loss.plot(s, np.where(v > 0, v, np.nan), label=name, **st.kw())
            drawn = True
        if "val/validity_median" in tags:
            s, v = tags["val/validity_median"]
            ax_val.plot(s, v, marker="o", ms=3, label=name, **st.kw())
    ax_loss.set_yscale("log")
    ax_loss.set_ylabel("training loss: squared forecast error\n(units of each component's std², dimensionless)",
                       fontsize=8)
    ax_val.set_ylabel(_time_label("validation validity median", time_unit), fontsize=8)
    ax_val.set_xlabel("optimiser step (count)")
    if not drawn:
        ax_loss.text(0.5, 0.5, "no model was trained by backpropagation in this run", transform=ax_loss.transAxes,
                     ha="center", va="center", fontsize=9)
    title = "Training curves"
    if fit_errors:
        title += "\n(fitted in closed form, no curve: " + "; ".join(
            f"{n}, train error {v:.3g}" for n, (v, _) in fit_errors.items()) + ")"
    fig.suptitle(title, fontsize=10)
    _legend_outside(fig, [ax_loss, ax_val])
    return fig


def hidden_state_figure(t, hidden: dict, colours: dict, time_unit: str = "", max_states: int = 6) -> Figure:
    """Hidden states ``r(t)`` of each memory model: driven by observations (``t ≤ 0``), then free-running.

    Args:
        t: ``(T,)`` times relative to the forecast start.
        hidden: model → ``(T, H)`` hidden states; the ``max_states`` components
            that vary most are drawn, in the model's colour with alternating dashes.
    """
    names = [n for n, h in hidden.items() if h is not None and h.size]
    fig, axes = _panels(max(len(names), 1), height=2.3)
    for ax, name in zip(axes, names):
        h = np.asarray(hidden[name], dtype=np.float64)
        st = _style(name, colours)
        spread = np.nanstd(h, axis=0)
        keep = np.argsort(-np.nan_to_num(spread), kind="stable")[:max_states]
        for j, k in enumerate(sorted(keep)):
            ax.plot(t, h[:, k], color=st.color, lw=1.0, ls=palette.MODEL_DASHES[j % len(palette.MODEL_DASHES)],
                    label=f"{name}: r{k + 1}")
        ax.axvline(0.0, **palette.GUIDE.kw())
        ax.set_ylabel(f"{name}: hidden state r\n(model's internal units)", fontsize=8)
    if not names:
        axes[0].text(0.5, 0.5, "no model with memory in this run", transform=axes[0].transAxes, ha="center")
    axes[-1].set_xlabel(_time_label("time since forecast start (warm-up before 0)", time_unit))
    fig.suptitle(f"Hidden-state traces (the {max_states} most varying components per model)", fontsize=10)
    _legend_outside(fig, axes, ncol=6)
    return fig


def save_figure(fig: Figure, path: str | Path, dpi: int = 110) -> Path:
    """Write ``fig`` as PNG (parent folders created)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=dpi, format="png")
    return path


# -- the assessment's figures and their numbers ------------------------------------------

def assessment_figures(result, plots, floor_plot, reference, ref_acf, test, starts, n_warm, n_h, dt, system,
                       settings) -> dict[str, Figure]:
    """The five assessment figures from what :func:`mnemode.assess.assess_models` computed.

    Same arguments as the assessment's figure step; the forecast traces show the
    whole warm-up, axes carry the system's state units and time unit.
    """
    names = list(plots)
    styles = model_colours(names)
    unit = system.time_unit
    state_units = list(getattr(system, "state_units", []) or [])
    t = np.arange(n_h + 1) * dt
    b0, s0 = int(starts.trajectory[0]), int(starts.index[0])
    n_hist = min(n_warm, s0)
    pooled = bool(result["pooled"])
    labels = ["x (pooled over ring sites)"] if pooled else list(test.names)
    stat_units = ([state_units[0]] if state_units else None) if pooled else state_units
    blew = {n: bool(m.get("blew_up")) for n, m in result.get("models", {}).items()}
    no_run = [n for n, p in plots.items() if p["counts"] is None and n != "oracle"]
    return {
        "forecast_traces": forecast_traces_figure(
            t, test.states[s0: s0 + n_h + 1, b0], {n: p["forecast"][:, 0] for n, p in plots.items()},
            list(test.names), styles, history_t=np.arange(-n_hist, 1) * dt,
            history=test.states[s0 - n_hist: s0 + 1, b0],
            validity={n: float(p["validity"][0]) for n, p in plots.items()},
            max_components=settings.max_components, time_unit=unit, units=state_units, horizon=result["horizon"]),
        "error_growth": error_growth_figure(t, {n: p["median_error"] for n, p in plots.items()}, styles,
                                            settings.gamma, unit),
        "validity_times": validity_figure({n: p["validity"] for n, p in plots.items()}, styles,
                                          result["horizon"], result["lyapunov_exponent"], unit, blew_up=blew),
        "invariant_densities": density_figure(
            reference.edges, reference.reference_counts,
            {n: p["counts"] for n, p in plots.items() if p["counts"] is not None}, styles, labels,
            floor_counts=floor_plot["counts"], max_components=settings.max_components, units=stat_units,
            blew_up=[n for n in no_run if blew.get(n)]),
        "autocorrelation": acf_figure(
            np.arange(ref_acf.shape[0]) * dt, ref_acf,
            {n: p["acf"] for n, p in plots.items() if p["acf"] is not None}, styles, labels,
            floor_acf=floor_plot["acf"], max_components=settings.max_components, time_unit=unit,
            blew_up=[n for n in no_run if blew.get(n)]),
    }


def figure_numbers(result: dict) -> dict[str, dict[str, float]]:
    """The headline numbers behind the assessment figures, as TensorBoard scalar tags → values.

    ``validity_times``: each model's median and quartiles (time units) and its
    censored share; ``invariant_densities``: KL(truth ‖ model) in nats;
    ``autocorrelation``: the ACF error. Models without a value (blew up) are left out.
    """
    out: dict[str, dict[str, float]] = {"validity_times": {}, "invariant_densities": {}, "autocorrelation": {}}
    for name, m in result.get("models", {}).items():
        for key in ("validity_time_median", "validity_time_q25", "validity_time_q75", "censored_fraction"):
            if m.get(key) is not None:
                out["validity_times"][f"{key}/{name}"] = float(m[key])
        if m.get("kl_invariant") is not None:
            out["invariant_densities"][f"kl_invariant/{name}"] = float(m["kl_invariant"])
        if m.get("acf_error") is not None:
            out["autocorrelation"][f"acf_error/{name}"] = float(m["acf_error"])
    floor = result.get("floor") or {}
    if floor.get("kl_invariant") is not None:
        out["invariant_densities"]["kl_invariant/floor"] = float(floor["kl_invariant"])
    if floor.get("acf_error") is not None:
        out["autocorrelation"]["acf_error/floor"] = float(floor["acf_error"])
    return out


def log_figures(writer, figures: dict[str, Figure], numbers: dict | None = None,
                series: dict | None = None, step: int = 0) -> None:
    """Send figures to TensorBoard under ``assess/<key>`` with their numbers as scalars.

    Args:
        numbers: figure key → {tag: value}, logged as ``assess/<key>/<tag>`` at ``step``.
        series: figure key → {tag: (xs, values)}, logged point by point with the
            index as step (e.g. an error-growth curve).
    """
    for key, fig in figures.items():
        writer.add_figure(f"assess/{key}", fig, global_step=step, close=True)
    for key, tags in (numbers or {}).items():
        for tag, value in tags.items():
            writer.add_scalar(f"assess/{key}/{tag}", float(value), global_step=step)
    for key, tags in (series or {}).items():
        for tag, values in tags.items():
            for i, v in enumerate(np.asarray(values, dtype=np.float64)):
                if np.isfinite(v):
                    writer.add_scalar(f"assess/{key}/{tag}", float(v), global_step=i)
