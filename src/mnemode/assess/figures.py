"""Assessment figures: forecast traces, error growth, validity times, invariant densities, ACFs.

Each function returns a :class:`matplotlib.figure.Figure` built without pyplot
(no global state, no interactive backend: rendering goes through Agg when saved),
so the same object can be written as PNG and sent to TensorBoard.
Systems with many components show at most ``max_components`` panels; ring systems
show the pooled statistics of their identical sites.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

__all__ = ["model_colours", "forecast_traces_figure", "error_growth_figure", "validity_figure",
           "density_figure", "acf_figure", "save_figure"]

TRUTH_COLOUR = "black"
FLOOR_COLOUR = "0.55"


def model_colours(names) -> dict[str, str]:
    """A stable colour per model name (matplotlib's ten-colour cycle, in order)."""
    cycle = [f"C{i}" for i in range(10)]
    return {n: cycle[i % len(cycle)] for i, n in enumerate(names)}


_DASHES = ("-", "--", "-.", (0, (1, 1.5)))


def _style(name: str, colours: dict) -> dict:
    """Colour and dash pattern of a model's line: models that coincide stay distinguishable."""
    i = list(colours).index(name) if name in colours else 0
    return {"color": colours.get(name, "C0"), "ls": _DASHES[i % len(_DASHES)]}


def _panels(n: int, height: float = 2.2, width: float = 8.0, sharex: bool = True):
    fig = Figure(figsize=(width, 0.6 + height * n), layout="constrained")
    axes = fig.subplots(n, 1, sharex=sharex, squeeze=False)[:, 0]
    return fig, axes


def forecast_traces_figure(t, truth, forecasts: dict, names, colours: dict, *, history_t=None, history=None,
                           validity: dict | None = None, max_components: int = 4, time_unit: str = "",
                           title: str = "") -> Figure:
    """Truth and every model's forecast from one start, one panel per component.

    Args:
        t: ``(T,)`` times since the forecast start.
        truth: ``(T, D)`` observed truth.
        forecasts: name → ``(T, D)`` forecast (NaN where a model blew up).
        names: component names.
        history_t, history: the end of the warm-up history (drawn grey, ``t < 0``).
        validity: name → validity time of this forecast (dotted marks).
    """
    d = min(len(names), max_components)
    fig, axes = _panels(d)
    for i, ax in enumerate(axes):
        if history is not None:
            ax.plot(history_t, history[:, i], color="0.6", lw=1.0, label="warm-up history" if i == 0 else None)
        ax.plot(t, truth[:, i], color=TRUTH_COLOUR, lw=1.8, label="truth (test data)" if i == 0 else None)
        for name, x in forecasts.items():
            ax.plot(t, x[:, i], lw=1.2, label=name if i == 0 else None, **_style(name, colours))
            if validity and validity.get(name) is not None:
                ax.axvline(validity[name], color=colours[name], ls=":", lw=0.9)
        lo, hi = np.nanmin(truth[:, i]), np.nanmax(truth[:, i])
        pad = 0.5 * (hi - lo) + 1e-12
        ax.set_ylim(lo - pad, hi + pad)  # a model that runs away must not flatten the truth
        ax.set_ylabel(names[i])
        ax.axvline(0.0, color="0.3", lw=0.6)
    axes[-1].set_xlabel(f"time since forecast start ({time_unit})" if time_unit else "time since forecast start")
    axes[0].legend(loc="upper left", fontsize=8, ncol=3)
    fig.suptitle(title or "Forecasts from one test start (dotted: each model's validity time)")
    return fig


def error_growth_figure(t, median_errors: dict, colours: dict, gamma: float, time_unit: str = "") -> Figure:
    """Median normalised error ``‖x̂ − x‖ / RMS(x)`` over all starts against time, log scale."""
    fig = Figure(figsize=(8, 4.5), layout="constrained")
    ax = fig.subplots()
    for name, e in median_errors.items():
        e = np.where(np.isfinite(e) & (e > 0), e, np.nan)
        ax.plot(t, e, label=name, **_style(name, colours))
    ax.axhline(gamma, color="0.3", ls="--", lw=1.0, label=f"γ = {gamma:g}")
    ax.set_yscale("log")
    ax.set_xlabel(f"forecast time ({time_unit})" if time_unit else "forecast time")
    ax.set_ylabel("median normalised error")
    ax.legend(fontsize=8)
    ax.set_title("Forecast error growth (median over starts)")
    return fig


def validity_figure(validity: dict, colours: dict, horizon: float, lyapunov_exponent: float | None = None,
                    time_unit: str = "") -> Figure:
    """Box plot of validity times per model; the horizon (censoring level) dashed."""
    fig = Figure(figsize=(max(5.0, 1.3 * len(validity) + 2), 4.5), layout="constrained")
    ax = fig.subplots()
    names = list(validity)
    bp = ax.boxplot([np.asarray(validity[n]) for n in names], patch_artist=True, widths=0.6,
                    medianprops={"color": "black"})
    ax.set_xticks(range(1, len(names) + 1), names, rotation=20)
    for patch, n in zip(bp["boxes"], names):
        patch.set_facecolor(colours[n])
        patch.set_alpha(0.55)
    ax.axhline(horizon, color="0.3", ls="--", lw=1.0, label="horizon (censored above)")
    ax.set_ylabel(f"validity time ({time_unit})" if time_unit else "validity time")
    ax.set_ylim(0, 1.08 * horizon)
    if lyapunov_exponent:
        lam = float(lyapunov_exponent)
        sec = ax.secondary_yaxis("right", functions=(lambda v: v * lam, lambda v: v / lam))
        sec.set_ylabel("Lyapunov times")
    ax.legend(fontsize=8, loc="upper left")
    ax.set_title("Validity time over all forecast starts")
    return fig


def density_figure(edges_list, truth_counts, model_counts: dict, colours: dict, labels, *,
                   floor_counts=None, max_components: int = 4) -> Figure:
    """Densities of the 1-D marginals: truth (test data), each model, the independent truth run.

    ``edges_list[i]`` are the inner bin edges of panel ``i``; counts arrays hold
    ``[underflow, inner..., overflow]`` (only inner bins are drawn).
    """
    d = min(len(edges_list), max_components)
    fig, axes = _panels(d, height=2.4, sharex=False)  # components differ in range
    for i, ax in enumerate(axes):
        edges = edges_list[i]
        width = np.diff(edges)

        def density(c):
            c = np.asarray(c, dtype=np.float64)
            return c[1:-1] / max(c.sum(), 1.0) / width

        ax.stairs(density(truth_counts[i]), edges, color=TRUTH_COLOUR, lw=1.8, fill=False, label="truth (test data)")
        if floor_counts is not None:
            ax.stairs(density(floor_counts[i]), edges, color=FLOOR_COLOUR, lw=1.2, ls="--",
                      label="independent truth run")
        for name, counts in model_counts.items():
            if counts is not None:
                ax.stairs(density(counts[i]), edges, lw=1.2, label=name, **_style(name, colours))
        ax.set_ylabel(f"density: {labels[i]}")
    axes[0].legend(fontsize=8, ncol=3)
    axes[-1].set_xlabel("value")
    fig.suptitle("Invariant measure: 1-D marginal densities of long free runs")
    return fig


def acf_figure(lag_t, truth_acf, model_acfs: dict, colours: dict, labels, *, floor_acf=None,
               max_components: int = 4, time_unit: str = "") -> Figure:
    """Autocorrelation functions ``(K + 1, C)`` of truth, models and the independent truth run."""
    d = min(truth_acf.shape[1], max_components)
    fig, axes = _panels(d)
    for i, ax in enumerate(axes):
        ax.plot(lag_t, truth_acf[:, i], color=TRUTH_COLOUR, lw=1.8, label="truth (test data)")
        if floor_acf is not None:
            ax.plot(lag_t, floor_acf[:, i], color=FLOOR_COLOUR, lw=1.2, ls="--", label="independent truth run")
        for name, a in model_acfs.items():
            if a is not None:
                ax.plot(lag_t, a[:, i], lw=1.2, label=name, **_style(name, colours))
        ax.axhline(0.0, color="0.8", lw=0.6)
        ax.set_ylabel(f"ACF: {labels[i]}")
    axes[-1].set_xlabel(f"lag ({time_unit})" if time_unit else "lag")
    axes[0].legend(fontsize=8, ncol=3)
    fig.suptitle("Autocorrelation of long free runs")
    return fig


def save_figure(fig: Figure, path: str | Path, dpi: int = 110) -> Path:
    """Write ``fig`` as PNG (parent folders created)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=dpi, format="png")
    return path
