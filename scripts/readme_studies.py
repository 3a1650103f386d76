"""Regenerate README's studies section from finished study sweeps, so its plots and numbers cannot drift.

    mnemode run -m experiment=study_scale_separation hydra/launcher=workstation
    mnemode run -m experiment=study_sampling hydra/launcher=workstation
    python scripts/readme_studies.py --scale SWEEP_DIR --sampling SWEEP_DIR
    python scripts/readme_studies.py --scale SWEEP_DIR --sampling SWEEP_DIR --check   # exit 1 if README differs

For each sweep it writes the study summary (``mnemode study``: table, points, plots,
into ``SWEEP_DIR/study``), copies the validity-time plot to ``docs/``, and replaces
the text between ``<!-- studies:begin -->`` and ``<!-- studies:end -->`` in
README.md with: how many jobs finished, how long the sweep took (first job's start
to last job's last update, read from the jobs' ``status.json``), the seeds-pooled
median validity time of every model at every swept value, the plot, and for the
scale-separation study the two checks of ``scripts/check_scale_separation.py``.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import math
import shutil
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "scripts"))

from check_scale_separation import KEY as TAU_KEY  # noqa: E402
from check_scale_separation import _validity  # noqa: E402
from readme_results import check_section, replace_section  # noqa: E402

BEGIN, END = "<!-- studies:begin -->", "<!-- studies:end -->"
STUDIES = {
    # name: (swept parameter, its label in the table, figure in docs/, title)
    "scale": (TAU_KEY, "τ", "docs/study_scale_separation.png",
              "Scale separation on the demo (`experiment=study_scale_separation`)"),
    "sampling": ("data.dt", "Δt", "docs/study_sampling.png",
                 "Sampling interval on Lorenz-63 (`experiment=study_sampling`)"),
}


def _time(stamp: str) -> dt.datetime:
    return dt.datetime.strptime(stamp, "%Y-%m-%dT%H:%M:%S%z")


def sweep_minutes(jobs) -> float | None:
    """Wall time of a sweep: the first job's start to the last job's last update, in minutes."""
    starts, ends = [], []
    for j in jobs:
        path = Path(j.path) / "status.json"
        if not path.exists():
            continue
        s = json.loads(path.read_text())
        try:
            starts.append(_time(s["started"]))
            ends.append(_time(s["updated"]))
        except (KeyError, ValueError):
            continue
    if not starts:
        return None
    return (max(ends) - min(starts)).total_seconds() / 60.0


def _unit_phrase(unit: str) -> str:
    """``s`` or ``time units`` as they are; a described unit as "units of the <description>"."""
    if unit == "dimensionless":
        return "time units (dimensionless)"
    return unit if unit == "time units" or len(unit.split()) == 1 else f"units of the {unit}"


def _models_in_order(points) -> list[str]:
    order = []
    for p in points:
        if p["model"] not in order:
            order.append(p["model"])
    return order


def _cell(points, key, model, value) -> str:
    for p in points:
        if (p["parameter"], p["metric"], p["model"], p["value"]) == (key, "validity_time", model, value):
            return f"{p['centre']:.3g} [{p['low']:.3g}, {p['high']:.3g}]"
    return "–"


def study_section(name: str, sweep: Path, jobs, points, figure: str) -> str:
    """One study's Markdown: jobs, wall time, pooled validity table, plot and (scale study) the checks."""
    key, label, _, title = STUDIES[name]
    finished = [j for j in jobs if j.finished]
    failed = [j for j in jobs if not j.finished]
    minutes = sweep_minutes(jobs)
    seeds = sorted({j.overrides.get("seed", "") for j in jobs})
    values = sorted({p["value"] for p in points if p["parameter"] == key}, key=float)
    models = _models_in_order([p for p in points if p["parameter"] == key])
    unit = next((j.time_unit for j in finished), "time units")
    took = f"{minutes:.0f} minutes" if minutes is not None else "time not recorded"
    lines = [f"**{title}.** {len(finished)} of {len(jobs)} jobs finished ({len(seeds)} seeds per setting); "
             f"the sweep took {took} on this project's 2-core machine with two jobs at a time "
             "(`hydra/launcher=workstation`, one torch thread each). Median validity time "
             f"[25th, 75th percentile] in {_unit_phrase(unit)}, all forecasts of all seeds pooled:", ""]
    lines.append(f"| {label} | " + " | ".join(models) + " |")
    lines.append("|---|" + "---|" * len(models))
    for v in values:
        lines.append(f"| {v} | " + " | ".join(_cell(points, key, m, v) for m in models) + " |")
    if failed:
        lines += ["", "Not finished: " + "; ".join(f"{Path(j.path).name} ({j.state}: {j.reason or 'no reason'})"
                                                  for j in failed) + "."]
    learned = [m for m in models if m not in ("physics_only", "oracle")]
    best = []
    for v in values:
        scores = {m: _validity(points, m, float(v), key) for m in learned}
        scores = {m: x for m, x in scores.items() if x is not None}
        if scores:
            top = max(scores, key=scores.get)
            oracle = _validity(points, "oracle", float(v), key)
            best.append((v, top, scores[top], oracle))
    if best:
        lines += ["", f"Best learned model at each {label}: "
                  + ", ".join(f"{v} {m} ({x:.3g})" for v, m, x, _ in best) + "."]
        if any(o is not None and x > o for _, _, x, o in best):
            lines.append("Where a learned model outlasts the oracle, that is the oracle's start: it integrates the "
                         "truth from a perturbed full state (`assess.oracle_noise`; 1e-4 of each component's spread "
                         "on noise-free data, as here), while the models start from the exact observed state.")
    lines += ["", f"![{title}: validity time against {label}]({figure})"]
    if name == "scale":
        wins = [v for v in values if (_validity(points, "memory", float(v)) or 0)
                > (_validity(points, "memoryless", float(v)) or math.inf)]
        if wins:
            lines += ["", f"The memory model's median first exceeds the memoryless model's at {label} = {wins[0]}; "
                          f"below that a memoryless closure does as well or better."]
        checks = [("τ = 0.01: memoryless / oracle", "memoryless", "oracle", 0.01, 0.8),
                  ("τ = 1: memory / memoryless", "memory", "memoryless", 1.0, 2.0)]
        out = []
        for text, num, den, tau, need in checks:
            a, b = _validity(points, num, tau), _validity(points, den, tau)
            if a is None or b is None or not b:
                out.append(f"{text}: missing")
                continue
            out.append(f"{text} = {a:.3g} / {b:.3g} = {a / b:.2f} (averaging theory asks ≥ {need}: "
                       f"{'holds' if a / b >= need else 'fails'})")
        lines += ["", "Checks (`scripts/check_scale_separation.py`): " + "; ".join(out) + "."]
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    from mnemode.study import pooled_points, read_jobs, summarise

    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--scale", type=Path, help="sweep directory of experiment=study_scale_separation")
    p.add_argument("--sampling", type=Path, help="sweep directory of experiment=study_sampling")
    p.add_argument("--readme", type=Path, default=ROOT / "README.md")
    p.add_argument("--check", action="store_true", help="change nothing; exit 1 if README differs from the sweeps")
    args = p.parse_args(argv)
    sweeps = {n: getattr(args, n) for n in STUDIES if getattr(args, n) is not None}
    if not sweeps:
        p.error("pass --scale and/or --sampling with a sweep directory")
    parts, copies = [], []
    for name, sweep in sweeps.items():
        key, _, figure, _ = STUDIES[name]
        jobs = read_jobs([sweep])
        points = pooled_points(jobs)
        parts.append(study_section(name, sweep, jobs, points, figure))
        if not args.check:
            summary = summarise([sweep], sweep / "study", overwrite=True)
            plot = next((f for f in summary.figures if f.name == f"validity_time_vs_{key}.png"), None)
            if plot is not None:
                copies.append((plot, args.readme.parent / figure))
    readme = args.readme.read_text()
    updated = replace_section(readme, "\n".join(parts), BEGIN, END)
    if args.check:
        return check_section(args.readme, readme, updated, "the sweeps", "scripts/readme_studies.py without --check")
    args.readme.write_text(updated)
    for source, target in copies:
        target.parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(source, target)
    print("README studies section regenerated from " + ", ".join(str(s) for s in sweeps.values()))
    return 0


if __name__ == "__main__":
    sys.exit(main())
