"""Report sections for what the assessment adds to the main table: time scales and long-run stability.

Each function takes the assessment's result (plain data) and returns Markdown
lines, empty when there is nothing to say.
"""

from __future__ import annotations

__all__ = ["validity_value", "time_scale_section", "stability_section"]


def _num(v, fmt: str = ".3g") -> str:
    return "–" if v is None else format(float(v), fmt)


def validity_value(m: dict, key: str, suffix: str = "") -> str:
    """One validity statistic, ``key`` ∈ {median, q25, q75}, as ``≥ v`` when it is a censoring lower bound."""
    v = m.get(f"validity_time_{key}{suffix}")
    if v is None:
        return "–"
    return ("≥ " if m.get(f"validity_time_{key}_lower_bound") else "") + _num(v)


def time_scale_section(result: dict) -> list[str]:
    """Which exponent the Lyapunov units use and, with an oracle, validity in predictability times."""
    lam = result.get("lyapunov_exponent")
    pred = result.get("predictability")
    out: list[str] = []
    if lam is not None and result.get("lyapunov_scope"):
        out.append(f"The Lyapunov-time column uses the largest exponent of the {result['lyapunov_scope']}.")
    if pred:
        out.append(
            f"Predictability time of the observed variables: T_p = {_num(pred['time'], '.4g')} time units "
            f"(e-folding time of the observed error, from the error doubling time {_num(pred['doubling_time'], '.4g')}"
            f" of the {pred['source']}).")
        out += ["", "| model | validity median [q25, q75] (predictability times T_p) |", "|---|---|"]
        for name, m in result.get("models", {}).items():
            med = validity_value(m, "median", "_predictability")
            q25 = validity_value(m, "q25", "_predictability")
            q75 = validity_value(m, "q75", "_predictability")
            out.append(f"| {name} | {med} [{q25}, {q75}] |")
    return out + [""] if out else []


def stability_section(result: dict) -> list[str]:
    """Per model: free runs that left the training envelope, when, and the share of time outside."""
    rows = [(n, m["escape"]) for n, m in result.get("models", {}).items() if m.get("escape")]
    if not rows:
        return []
    env = result.get("envelope") or {}
    runs = result.get("free_runs") or {}
    out = ["### Long-run stability", "",
           f"Each model free-runs {_num(runs.get('n_runs'))} times for {_num(runs.get('stability_length'))} time "
           f"units from the ends of warm-ups. A run leaves the envelope at its first state outside the "
           f"{env.get('source', 'training data')}'s range per component widened by "
           f"{_num(env.get('margin'))} of that range (or at a non-finite state).", "",
           "| model | runs leaving the envelope | first exit (median) | exit times | share of time outside |",
           "|---|---|---|---|---|"]
    for name, e in rows:
        times = ", ".join(_num(t, ".4g") for t in e["escape_times"] if t is not None) or "–"
        out.append(f"| {name} | {e['escaped_count']}/{e['n_runs']} ({100 * e['escape_fraction']:.0f} %) "
                   f"| {_num(e.get('escape_time_median'), '.4g')} | {times} "
                   f"| {100 * e['outside_fraction']:.1f} % |")
    floor = (result.get("floor") or {}).get("escape")
    if floor:
        out.append(f"| *floor: truth run ({_num(floor['run_length'], '.4g')} time units)* "
                   f"| {floor['escaped_count']}/{floor['n_runs']} ({100 * floor['escape_fraction']:.0f} %) "
                   f"| {_num(floor.get('escape_time_median'), '.4g')} | – | {100 * floor['outside_fraction']:.1f} % |")
    return out + [""]
