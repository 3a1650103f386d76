"""Assessment: forecast validity time, invariant-measure KL and autocorrelation against baselines."""

from .assessment import AssessSettings, ModelEntry, assess_models
from .metrics import normalised_error, rms_scale, summarise_validity, validity_times
from .report import metrics_table, render_report, write_report
from .statistics import autocorrelation, acf_error, kl_divergence, marginal_kl

__all__ = [
    "AssessSettings", "ModelEntry", "assess_models", "metrics_table", "render_report", "write_report",
    "validity_times", "rms_scale", "normalised_error", "summarise_validity",
    "autocorrelation", "acf_error", "kl_divergence", "marginal_kl",
]
