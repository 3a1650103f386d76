"""What each number mnemode reports measures, and in which units.

One table for the report, the command's summary, ``mnemode runs`` and the README
script, so a metric is described the same way everywhere. ``train_error`` and
``val_error`` mean different quantities for different fitters; :func:`fit_error_label`
says which, from the fitter's class name recorded with the fit (a fitter that
states its own label in its diagnostics as ``train_error_label`` /
``val_error_label`` takes precedence).
"""

from __future__ import annotations

__all__ = ["MetricLabel", "ASSESSMENT_METRICS", "FIT_ERRORS", "fit_error_label", "metric_label", "metrics_labels",
           "versions"]


class MetricLabel(tuple):
    """``(what it measures, unit)``; ``unit`` is ``""`` for a pure number."""

    __slots__ = ()

    def __new__(cls, what: str, unit: str = ""):
        return super().__new__(cls, (what, unit))

    @property
    def what(self) -> str:
        return self[0]

    @property
    def unit(self) -> str:
        return self[1]

    def __str__(self) -> str:
        return f"{self.what} [{self.unit}]" if self.unit else self.what


TIME = "time units"

ASSESSMENT_METRICS: dict[str, MetricLabel] = {
    "validity_time_median": MetricLabel("median validity time: time until ‖x̂ − x‖ / RMS(x) first exceeds γ", TIME),
    "validity_time_q25": MetricLabel("lower quartile of the validity time", TIME),
    "validity_time_q75": MetricLabel("upper quartile of the validity time", TIME),
    "validity_time_median_lyapunov": MetricLabel("median validity time", "Lyapunov times"),
    "censored_fraction": MetricLabel("share of forecasts still valid at the horizon (validity censored there)",
                                     "fraction"),
    "kl_invariant": MetricLabel("KL(truth ‖ model) of the invariant 1-D marginals of long free runs", "nats"),
    "acf_error": MetricLabel("RMS difference of the autocorrelation functions over lags",
                             "autocorrelation, dimensionless"),
    "gamma": MetricLabel("validity threshold on the normalised error ‖x̂ − x‖ / RMS(x)", "dimensionless"),
    "lyapunov_time": MetricLabel("one Lyapunov time 1/λ", TIME),
    "fit_seconds": MetricLabel("wall time of the fit", "s"),
    "warm_up": MetricLabel("observed history driving the hidden state before each forecast", TIME),
}

_REL = "relative RMS error of the {what} (0: perfect; 1: no better than their mean)"
_TRAJ_TRAIN = ("mean training loss over the last validation interval: squared forecast error per component, "
               "in units of each component's spread (std), averaged over windows and times")
_TRAJ_VAL = ("validation forecast error of the kept (best) model: squared error per component in units of "
             "each component's spread, averaged over the final horizon")

# fitter class name -> (train_error, val_error) labels
FIT_ERRORS: dict[str, tuple[MetricLabel, MetricLabel]] = {
    "DerivativeFit": (
        MetricLabel(_REL.format(what="derivative residual targets ẋ̂ − f0(x) on the training data"), "ratio"),
        MetricLabel(_REL.format(what="derivative residual targets on the validation data"), "ratio")),
    "FlowMapFit": (
        MetricLabel(_REL.format(what="flow-map residual targets (x_{n+1} − Ψ0(x_n)) / Δt on the training data"),
                    "ratio"),
        MetricLabel(_REL.format(what="flow-map residual targets on the validation data"), "ratio")),
    "ReadoutRidgeFit": (
        MetricLabel(_REL.format(what="residual targets (derivative residual for a vector field, flow-map "
                                     "residual for a flow map) on the training data"), "ratio"),
        MetricLabel(_REL.format(what="residual targets on the validation data"), "ratio")),
    "TrajectoryFit": (MetricLabel(_TRAJ_TRAIN, "squared std units"), MetricLabel(_TRAJ_VAL, "squared std units")),
}


def fit_error_label(fitter: str | None, key: str = "train_error", diagnostics: dict | None = None) -> MetricLabel:
    """What ``train_error`` or ``val_error`` of a fit by ``fitter`` (class name) measures.

    A label the fitter recorded itself (``diagnostics[key + '_label']``) wins; an
    unknown fitter gets a label saying the meaning is the fitter's own.
    """
    own = (diagnostics or {}).get(f"{key}_label")
    if own:
        return MetricLabel(str(own), str((diagnostics or {}).get(f"{key}_unit", "")))
    pair = FIT_ERRORS.get(str(fitter))
    if pair is None:
        return MetricLabel(f"{key.replace('_', ' ')} as defined by {fitter or 'the fitter'}")
    return pair[0] if key == "train_error" else pair[1]


def metric_label(key: str) -> MetricLabel:
    """The label of an assessment metric (``validity_time_median``, ``kl_invariant``, ...)."""
    return ASSESSMENT_METRICS.get(key, MetricLabel(key.replace("_", " ")))


def metrics_labels(fit: dict | None = None) -> dict:
    """The ``labels`` section of metrics.json: what each number measures and its unit.

    ``{"assessment": {key: {"measures", "unit"}}, "fit": {model: {"train_error": {...},
    "val_error": {...}}}}``, the fit part from each model's recorded fitter.
    """
    def plain(label: MetricLabel) -> dict:
        return {"measures": label.what, "unit": label.unit}

    return {
        "assessment": {k: plain(v) for k, v in ASSESSMENT_METRICS.items()},
        "fit": {name: {key: plain(fit_error_label(d.get("fitter"), key, d)) for key in ("train_error", "val_error")}
                for name, d in (fit or {}).items()},
    }


def versions() -> dict[str, str]:
    """Versions of mnemode, torch, numpy and Python in this process (torch only if already loaded
    or importable)."""
    import platform
    import sys

    from .version import __version__

    out = {"mnemode": __version__, "python": platform.python_version()}
    for name in ("torch", "numpy"):
        mod = sys.modules.get(name)
        if mod is None:
            try:
                mod = __import__(name)
            except ImportError:
                continue
        out[name] = str(getattr(mod, "__version__", "?"))
    return out
