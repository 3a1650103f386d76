"""The assessment as Markdown: one table of every model against the references, figures, settings, cautions."""

from __future__ import annotations

import json
from pathlib import Path

from ..fileio import write_text
from ..metric_labels import fit_error_label, metric_label
from .report_sections import stability_section, time_scale_section, validity_value

__all__ = ["metrics_table", "models_table", "render_report", "write_report"]

CAUTIONS = (
    "A learned correction is valid only inside its training envelope: the range of states, "
    "operating conditions and forcing seen in the training data (the exported simulator's manifest "
    "records it). Outside it the correction can be arbitrarily wrong while looking plausible. "
    "Scores here come from one test set drawn like the training data; they say nothing about "
    "conditions the data did not cover. Validate the corrected model independently, against "
    "measurements it was not trained on, before any use in control, protection or safety decisions. "
    "The codes, standards and licensed engineering practice of the application govern such use; "
    "this report does not replace them."
)


def _num(v, fmt: str = ".3g") -> str:
    return "–" if v is None else format(float(v), fmt)


def _validity_cell(m: dict, suffix: str = "") -> str:
    if m.get(f"validity_time_median{suffix}") is None:
        return "–"
    return (f"{validity_value(m, 'median', suffix)} [{validity_value(m, 'q25', suffix)}, "
            f"{validity_value(m, 'q75', suffix)}]")


def metrics_table(result: dict) -> str:
    """The assessment table in Markdown: one row per model, then the truth-vs-truth floor.

    Columns: validity time median [q25, q75] in time units and in Lyapunov times,
    the share of forecasts censored at the horizon, KL(truth ‖ model) of the
    invariant measure, and the autocorrelation error.
    """
    unit = "time units"
    head = (f"| model | validity median [q25, q75] ({unit}) | in Lyapunov times | censored at horizon "
            f"| KL invariant (truth ‖ model) ({metric_label('kl_invariant').unit}) "
            "| ACF error (RMS over lags) |")
    lines = [head, "|---|---|---|---|---|---|"]
    for name, m in result.get("models", {}).items():
        label = name + (" (blew up)" if m.get("blew_up") else "")
        n = m.get("n_forecasts")
        cens = (f"{m.get('censored_count', 0)}/{n} ({100 * m.get('censored_fraction', 0.0):.0f} %)"
                if n else "–")
        kl = m.get("kl_invariant")
        acf = m.get("acf_error")
        kl_cell = "∞ (blew up)" if kl is None and m.get("blew_up") else _num(kl)
        acf_cell = "– (blew up)" if acf is None and m.get("blew_up") else _num(acf)
        lines.append(f"| {label} | {_validity_cell(m)} | {_validity_cell(m, '_lyapunov')} | {cens} "
                     f"| {kl_cell} | {acf_cell} |")
    floor = result.get("floor") or {}
    if floor:
        lines.append(f"| *floor: {floor.get('source', 'truth vs truth')}* | – | – | – "
                     f"| {_num(floor.get('kl_invariant'))} | {_num(floor.get('acf_error'))} |")
    return "\n".join(lines) + "\n"


def _seconds(v) -> str:
    if v is None:
        return "–"
    v = float(v)
    return f"{v:.1f} s" if v < 120 else f"{v / 60:.1f} min"


def models_table(fit: dict, timing: dict | None = None, warm_up=None) -> str:
    """How each fitted model was made: closure, fitter, hidden size, fit time, warm-up, errors, versions.

    ``fit`` is the run's ``metrics.json["fit"]`` (model → diagnostics); ``timing``
    its ``metrics.json["timing"]["fit"]`` where fit times are kept apart. Below the
    table, what ``train_error`` and ``val_error`` mean for each fitter used.
    """
    timing = timing or {}
    lines = ["| model | closure | fitter | hidden size | fit time | warm-up (time units) | train error | "
             "validation error | versions |", "|---|---|---|---|---|---|---|---|---|"]
    fitters = {}
    for name, d in fit.items():
        secs = (timing.get(name) or {}).get("fit_seconds", d.get("fit_seconds"))
        w = d.get("warm_up", warm_up) if d.get("hidden_size") else None
        ver = d.get("versions") or {}
        ver_cell = ", ".join(f"{k} {v}" for k, v in ver.items()) if ver else "–"
        fitter = d.get("fitter")
        fitters.setdefault(fitter, d)
        lines.append(f"| {name} | {d.get('closure', '–')} | {fitter or '–'} | {d.get('hidden_size', '–')} "
                     f"| {_seconds(secs)} | {_num(w) if w is not None else 'none (no memory)'} | {_num(d.get('train_error'))} "
                     f"| {_num(d.get('val_error'))} | {ver_cell} |")
    lines.append("")
    for fitter, d in fitters.items():
        lines.append(f"- *{fitter}*: train error = {fit_error_label(fitter, 'train_error', d)}; "
                     f"validation error = {fit_error_label(fitter, 'val_error', d)}.")
    return "\n".join(lines) + "\n"


def _run_records(out_dir: Path | None) -> tuple[dict, dict]:
    """The fit records (``fit``) and fit times (``timing.fit``) of the run in ``out_dir``, if any."""
    if out_dir is None:
        return {}, {}
    try:
        m = json.loads((Path(out_dir) / "metrics.json").read_text())
    except (OSError, ValueError):
        return {}, {}
    return m.get("fit") or {}, (m.get("timing") or {}).get("fit") or {}


def render_report(result: dict, figures: dict[str, str] | None = None, fit: dict | None = None,
                  timing: dict | None = None, versions: dict | None = None) -> str:
    """The whole report as Markdown.

    Args:
        result: what :func:`mnemode.assess.assess_models` returned.
        figures: caption → path relative to the report.
        fit: model → fit diagnostics (closure, fitter, hidden size, errors,
            versions); adds the "How each model was made" section.
        timing: model → fit times, where they are kept apart from ``fit``.
        versions: versions of the assessing process (mnemode, torch, python).
    """
    s = result.get("settings", {})
    unit = "time units"
    lam, lt = result.get("lyapunov_exponent"), result.get("lyapunov_time")
    test = result.get("test_set", {})
    out = ["# Assessment", ""]
    out.append(
        "How much better does each model forecast than the physics alone, and how well does it reproduce "
        "the long-run statistics of the real system? Every model is scored on the same held-out test set "
        f"({test.get('n_trajectories', '?')} trajectories of {_num(test.get('duration'))} {unit}, sampled every "
        f"{_num(test.get('dt'))}). Forecasts start from {result.get('n_starts')} points spread along the test "
        f"trajectories; before each, a model with memory drives its hidden state with the preceding "
        f"{_num(result.get('warm_up'))} {unit} of observations. The **validity time** is the time until the "
        f"normalised error ‖x̂ − x‖ / RMS(x) first exceeds γ = {_num(result.get('gamma'))} "
        f"(RMS(x) = {_num(result.get('scale'))}, the size of x about its mean over the test set); forecasts "
        f"still valid at the horizon ({_num(result.get('horizon'))} {unit}) are censored there, so a median "
        "with half or more censored is a lower bound. The **invariant measure** and **autocorrelation** "
        "come from long free runs of each model; the floor row scores an independent truth run the same "
        "way, which is what a perfect model could reach with these sample sizes."
    )
    if result.get("time_unit"):
        out += ["", f"One time unit is: {result['time_unit']}."]
    out += ["", "## Results", "", metrics_table(result)]
    out.append("Validity times are in time units (and in Lyapunov times where λ is known); KL in nats "
               "(0: the model's long-run distribution matches the truth's); ACF error is the RMS "
               "difference of autocorrelations (dimensionless, 0 to 2).")
    out.append("")
    if lam is not None:
        src = {"system": "stated by the system", "estimated": "estimated on the truth equations"}.get(
            result.get("lyapunov_source"), result.get("lyapunov_source") or "")
        out.append(f"Largest Lyapunov exponent λ = {_num(lam, '.4g')} per unit time ({src}); "
                   f"one Lyapunov time 1/λ = {_num(lt, '.4g')} {unit}.")
    else:
        out.append("The largest Lyapunov exponent is not known for this system, so validity is given in "
                   "time units only.")
    out.append("")
    out += time_scale_section(result) + stability_section(result)
    if "oracle" in result.get("models", {}):
        out.append("The *oracle* is the truth system started from the true full state (hidden components "
                   f"included) perturbed by {_num(result.get('oracle_noise'))} of each component's spread: the "
                   "practical upper limit of forecast skill from these starts. Its long-run statistics are "
                   "those of the truth (see the floor row).")
        out.append("")
    notes = result.get("notes") or []
    if notes:
        out += ["### Notes", ""] + [f"- {n}" for n in notes] + [""]
    out += [
        "### How the statistics are computed", "",
        f"- Invariant measure: KL(truth ‖ model) = Σ p ln(p/q) of the 1-D marginals on {s.get('n_bins')} "
        "equal bins over the test data's range widened by 10 % each side, plus one underflow and one "
        f"overflow bin; a pseudo-count of {_num(s.get('pseudo_count'))} is added to every bin of both "
        "histograms before normalising, so empty bins stay finite. "
        + ("Components are identical ring sites, so their samples are pooled into one histogram."
           if result.get("pooled") else "The divergence is averaged over components."),
        f"- Autocorrelation: biased sample ACF (divisor N) up to {_num(s.get('acf_max_lag'))} {unit}, "
        f"averaged over segments of {_num(result.get('acf_segment_length'))} {unit} so that truth and models "
        "carry the same small-sample bias; the error is the RMS difference over lags, averaged over "
        "components" + (" (pooled over ring sites)." if result.get("pooled") else "."),
        f"- Free runs: {s.get('free_run_starts')} runs of {_num(s.get('free_run_length'))} {unit} after a "
        f"discarded transient of {_num(s.get('transient'))} {unit}, started at the ends of warm-ups. "
        "A run that leaves the finite numbers is marked *blew up* and gets no statistics.",
        "",
    ]
    if fit:
        out += ["## How each model was made", "", models_table(fit, timing, result.get("warm_up"))]
    if versions:
        out += ["Assessed with " + ", ".join(f"{k} {v}" for k, v in versions.items()) + ".", ""]
    if figures:
        out += ["## Figures", ""]
        for caption, path in figures.items():
            out += [f"**{caption}**", "", f"![{caption}]({path})", ""]
    out += ["## Settings", "", "| setting | value |", "|---|---|"]
    for k, v in s.items():
        out.append(f"| {k} | {v} |")
    out += ["", "## Cautions", "", CAUTIONS, ""]
    return "\n".join(out)


def write_report(result: dict, out_dir: str | Path, figures: dict[str, str] | None = None,
                 fit: dict | None = None, timing: dict | None = None) -> Path:
    """Write ``out_dir/report.md`` atomically and return its path.

    When ``fit`` is not given and ``out_dir`` is a run directory, the fit records
    and fit times are read from its ``metrics.json``.
    """
    from ..metric_labels import versions

    if fit is None:
        fit, found_timing = _run_records(Path(out_dir))
        timing = timing if timing is not None else found_timing
    path = Path(out_dir) / "report.md"
    write_text(path, render_report(result, figures, fit=fit, timing=timing, versions=versions()))
    return path
