"""Assessment: forecast validity time, invariant-measure KL, autocorrelation and stability against references (physics-only, oracle).

Forecast error and validity times of single forecasts live in :mod:`mnemode.validity`
(shared with fitting); this package summarises and compares them.
"""

from .assessment import ModelEntry, assess_models
from .metrics import summarise_validity
from .report import metrics_table, render_report, write_report
from .settings import AssessSettings
from .stability import Envelope, summarise_escapes
from .statistics import autocorrelation, acf_error, kl_divergence, marginal_kl

__all__ = [
    "AssessSettings", "ModelEntry", "assess_models", "metrics_table", "render_report", "write_report",
    "summarise_validity", "Envelope", "summarise_escapes",
    "autocorrelation", "acf_error", "kl_divergence", "marginal_kl",
]
