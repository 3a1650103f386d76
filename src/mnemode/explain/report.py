"""Write a correction reading as a short Markdown report, ``reading.json`` and figures.

Layout of the output folder (``RUN_DIR/correction/<model>/`` from the command)::

    report.md                 what the correction is, R² against targets, equations, memory, flow map
    reading.json              the same numbers as plain data
    along_targets.png  against_targets.png  partial_dependence.png  surrogate.png  [memory.png]

An existing non-empty folder is never written over unless ``overwrite`` is set.
"""

from __future__ import annotations

import math
from pathlib import Path

from ..errors import CheckpointError
from ..fileio import write_json, write_text
from .figures import (against_targets_figure, along_targets_figure, memory_figure, partial_dependence_figure,
                      rate_unit, save_png, surrogate_figure)

__all__ = ["reading_markdown", "write_reading"]


def _f(v, digits: int = 4) -> str:
    return "n/a" if v is None or (isinstance(v, float) and not math.isfinite(v)) else f"{v:.{digits}g}"


def _equation_block(fit, lhs) -> list[str]:
    return ["```", *fit.equations(lhs), "```"]


def reading_markdown(reading, figures: dict[str, str] | None = None) -> str:
    """The report text of a :class:`~mnemode.explain.reading.CorrectionReading`."""
    figures = figures or {}
    r = reading
    names = r.state_names
    discrete = r.form == "discrete"
    lhs = [f"m_{n}" + (" (per Δt, flow map)" if discrete else f" (in d{n}/dt)") for n in names]
    lines = [
        f"# Reading the learned correction: {r.model_name}",
        "",
        f"- closure: {r.closure} ({'memoryless' if not r.hidden_size else f'{r.hidden_size} hidden states'}), "
        f"{'flow-map (discrete)' if discrete else 'vector-field (continuous)'} form",
        f"- sampling interval Δt = {_f(r.dt)}" + ("" if r.time_unit in ("", "1", "dimensionless")
                                                 else f" {r.time_unit}"),
        "- units of the correction: " + ", ".join(f"m_{n}: {rate_unit(u, r.time_unit)}"
                                                  for n, u in zip(names, r.state_units)),
        "",
        "## What this correction is",
        "",
        r.statement,
        "",
        "## Against its regression targets (test data)",
        "",
        "R² = 1 − Σ(m − y)² / Σ(y − ȳ)² per component; y the target, m the learned correction.",
        "",
        "| target | n | " + " | ".join(f"R² {n}" for n in names) + " |",
        "|---|---|" + "---|" * len(names),
    ]
    for c in r.comparisons:
        lines.append(f"| {c.kind} | {c.target.shape[0]} | " + " | ".join(_f(v) for v in c.r2) + " |")
    lines.append("")
    quiet = [n for n, q in zip(names, r.surrogate.negligible) if q]
    if quiet:
        lines.append(f"Components below the noise floor ({', '.join(quiet)}: the learned correction is under "
                     f"{_f(100 * r.settings.get('noise_floor', 0.01), 3)} % of the physics there): their R² compares "
                     "small residual errors with each other and says little.")
        lines.append("")
    if discrete:
        lines.append("The derivative row compares this flow-map correction with the vector-field targets it is "
                     "*not* an estimate of; the gap between the rows is one sign of the discrete-versus-vector-"
                     "field difference (quantified below). At coarse sampling the finite-difference targets are "
                     "themselves inaccurate, so that row is only indicative.")
        lines.append("")
    for key, caption in (("along_targets", "correction along the first test trajectory"),
                         ("against_targets", "learned correction against targets")):
        if key in figures:
            lines += [f"![{caption}]({figures[key]})", ""]

    s = r.surrogate
    lines += [
        "## Sparse polynomial surrogate",
        "",
        f"Sequentially thresholded least squares (Brunton, Proctor & Kutz, PNAS 113 (2016) 3932) on "
        f"polynomials of degree ≤ {s.library.degree} in {', '.join(s.library.names[:len(r.input_names)])}"
        + (" and linear in the filtered hidden states r1…" if r.hidden_size else "")
        + f"; a term is dropped when its contribution is below {_f(100 * s.threshold, 3)} % of its component's "
        f"size. R² is the surrogate against the learned correction ({r.settings.get('n_points')} test samples).",
        "",
        *_equation_block(s, lhs),
        "",
    ]
    if "surrogate" in figures:
        lines += [f"![sparse surrogate]({figures['surrogate']})", ""]

    pd = r.partial
    lines += [
        "## Dependence on each input",
        "",
        "Partial dependence: the correction averaged over the test samples with one input set to each value of "
        "its training range" + (" (hidden states held as driven)" if r.hidden_size else "") +
        ". The table gives each curve's range (max − min).",
        "",
        "| input | " + " | ".join(f"m_{n}" for n in names) + " |",
        "|---|" + "---|" * len(names),
    ]
    for j, name in enumerate(pd.input_names):
        lines.append(f"| {name} | " + " | ".join(_f(float(pd.spread[j, i]), 3) for i in range(len(names))) + " |")
    lines.append("")
    if "partial_dependence" in figures:
        lines += [f"![partial dependence]({figures['partial_dependence']})", ""]

    if r.time_constants is not None:
        tc, h = r.time_constants, r.history
        unit = "" if r.time_unit in ("", "1", "dimensionless") else f" {r.time_unit}"
        taus = ", ".join(_f(float(t), 3) for t in tc.tau)
        periods = [float(p) for p in tc.period if math.isfinite(p)]
        lines += [
            "## Memory",
            "",
            f"Time constants of the hidden state ({'exact: the hidden field is linear' if tc.exact else 'from the Jacobian of the hidden dynamics averaged along the driven run'}"
            f"{'; discrete multipliers μ give τ = −Δt/ln|μ|' if tc.discrete else '; τ = −1/Re λ'}):",
            "",
            f"τ = {taus}{unit}",
            "",
        ]
        if periods:
            lines += [f"oscillating modes, periods: {', '.join(_f(p, 3) for p in periods)}{unit}", ""]
        lines += [
            f"What each input's history carries: the hidden state is driven again with that input frozen at its "
            f"training mean (the readout still sees its present value). 'carried' is the share of the "
            f"correction's variance lost; ΔR² the drop in R² against the {h.target_kind} targets "
            f"(full model: {_f(h.r2_full)}).",
            "",
            "| history frozen | carried | R² frozen | ΔR² |",
            "|---|---|---|---|",
        ]
        for n, c, f in zip(h.names, h.carried, h.r2_frozen):
            lines.append(f"| {n} | {_f(c, 3)} | {_f(f)} | {_f(h.r2_full - f, 3)} |")
        lines.append("")
        if "memory" in figures:
            lines += [f"![memory]({figures['memory']})", ""]

    if discrete:
        lines += ["## Flow map versus vector field", ""]
        if r.equivalent is not None:
            eq = r.equivalent
            lhs_c = [f"m_{n} (in d{n}/dt)" for n in names]
            lines += [
                "Equivalent vector-field term: the sparse polynomial m_c whose flow, added to the physics, "
                "reproduces the learned step Ψ0(x) + Δt·m(x) at the test states (Gauss–Newton with thresholded "
                "least squares through the integrated flow). R² here is the step of f0 + m_c against the learned "
                "step, per Δt.",
                "",
                *_equation_block(eq.fit, lhs_c),
                "",
                f"**Discrete-versus-vector-field difference**: rms‖m − m_c‖/rms‖m_c‖ = "
                f"{_f(100 * eq.overall_difference, 3)} % (per component, relative to rms‖m_c‖: "
                + ", ".join(f"{n}: {_f(100 * d, 3)} %" for n, d in zip(names, eq.difference)) + ").",
                "",
            ]
            rows = []
            for i, n in enumerate(names):
                for term, c, _ in eq.fit.terms(i):
                    d = r.surrogate.coefficient(term, i) if term in r.surrogate.library.term_names else 0.0
                    rows.append(f"| d{n}/dt | {term} | {_f(c)} | {_f(d)} | {_f(d / c if c else math.nan, 3)} |")
            if rows:
                lines += ["| equation | term | vector field | flow-map surrogate | ratio |", "|---|---|---|---|---|",
                          *rows, "",
                          "A ratio alone can mislead: the flow-map correction also spreads over terms the "
                          "vector-field term does not have (its surrogate above).", ""]
            if r.midpoint is not None:
                lines += [
                    "For comparison, the continuous (midpoint) form of the flow-map targets of the learned step "
                    "(second order in Δt, so biased at coarse sampling):",
                    "",
                    *_equation_block(r.midpoint, lhs_c),
                    "",
                ]
    for note in r.notes:
        lines += [f"Note: {note}", ""]
    return "\n".join(lines).rstrip() + "\n"


def write_reading(reading, out_dir, *, overwrite: bool = False, figures: bool = True) -> Path:
    """Write ``report.md``, ``reading.json`` and the figures of ``reading`` into ``out_dir``.

    Returns:
        the path of ``report.md``.

    Raises:
        CheckpointError: ``out_dir`` already holds files and ``overwrite`` is false.
    """
    out = Path(out_dir)
    if out.exists() and any(out.iterdir()) and not overwrite:
        raise CheckpointError(str(out), "already holds a reading of this correction; mnemode does not write over it",
                              "pass --overwrite (overwrite=True) to replace it, or move it away.")
    out.mkdir(parents=True, exist_ok=True)
    made: dict[str, str] = {}
    if figures:
        builders = {
            "against_targets": lambda: against_targets_figure(reading),
            "partial_dependence": lambda: partial_dependence_figure(reading),
        }
        if reading.trace is not None:
            builders["along_targets"] = lambda: along_targets_figure(reading, reading.trace)
        if reading.surrogate_points is not None:
            v, m = reading.surrogate_points
            builders["surrogate"] = lambda: surrogate_figure(reading, m, reading.surrogate.library(v)
                                                             @ reading.surrogate.coefficients)
        if reading.time_constants is not None:
            builders["memory"] = lambda: memory_figure(reading)
        for key, build in builders.items():
            save_png(build(), out / f"{key}.png")
            made[key] = f"{key}.png"
    write_json(out / "reading.json", reading.to_dict())
    path = out / "report.md"
    write_text(path, reading_markdown(reading, made))
    return path
