"""Regenerate README's results section from a real run, so the numbers there cannot drift.

    python scripts/readme_results.py                     # runs the demo main job (minutes), then updates
    python scripts/readme_results.py --run-dir RUN_DIR   # reads an existing run instead
    python scripts/readme_results.py --run-dir RUN_DIR --check   # exit 1 if README differs from the run

The section between ``<!-- results:begin -->`` and ``<!-- results:end -->`` in
README.md is replaced by: how long the run took and what it assessed, the table of
every model (validity median and quartiles, in Lyapunov times, censored share,
KL of the invariant measure, ACF error, all read from the run's metrics.json), the
validity figure (copied from the run to docs/) and the ratios the text quotes.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
BEGIN, END = "<!-- results:begin -->", "<!-- results:end -->"
FIGURE = "docs/demo_validity_times.png"


def _num(v, fmt: str = ".3g") -> str:
    return "–" if v is None else format(float(v), fmt)


def _minutes(status: dict) -> float | None:
    """Wall time of the run from its status record (started → last update), in minutes."""
    try:
        fmt = "%Y-%m-%dT%H:%M:%S%z"
        t0 = dt.datetime.strptime(status["started"], fmt)
        t1 = dt.datetime.strptime(status["updated"], fmt)
    except (KeyError, ValueError):
        return None
    return (t1 - t0).total_seconds() / 60.0


def _describe(name: str, fit: dict, a: dict) -> str:
    if name == "physics_only":
        return "physics_only (f0 alone, no correction)"
    if name == "oracle":
        return f"oracle (truth equations from a {_num(a.get('oracle_noise'), 'g')} perturbation of the full state)"
    d = fit.get(name, {})
    how = " by ".join(str(x) for x in (d.get("closure"), d.get("fitter")) if x)
    extra = ""
    if d.get("fitter") == "TrajectoryFit" and d.get("steps"):
        extra = f", {d['steps']} steps"
        if d.get("best_step") == 0:  # the fine-tuning never beat its start on validation: say which model this is
            extra += "; its ridge start kept" if d.get("note", "").find("ridge") >= 0 else "; its start kept"
    return f"{name} ({how}{extra})" if how else name


def results_section(metrics: dict, status: dict, figure: str = FIGURE, main: str | None = None) -> str:
    """The README results section (Markdown, without the markers) from a run's metrics and status.

    ``main`` names the run's main model (its config's ``model.name``); the closing
    sentence compares it with the physics alone, the best memoryless model and the oracle.
    """
    a = metrics["assessment"]
    fit = metrics.get("fit", {})
    models = a["models"]
    test = a.get("test_set", {})
    minutes = _minutes(status)
    took = ""
    if minutes is not None:
        if minutes < 3:  # short runs in seconds, to the nearest ten
            took = f"about {max(10, round(minutes * 6) * 10)} seconds in all; "
        else:
            n = round(minutes)
            took = f"about {n} minutes in all; "
    lines = [
        f"What it printed ({took}warm-up {_num(a.get('warm_up'), 'g')} time units, {a.get('n_starts')} forecast "
        f"starts on {test.get('n_trajectories')} independent test trajectories; regenerated from the run by "
        "`scripts/readme_results.py`):",
        "",
        "| model | validity median [q25, q75] (time units) | in Lyapunov times | censored at horizon "
        "| KL invariant (nats) | ACF error |",
        "|---|---|---|---|---|---|",
    ]
    floor = a.get("floor") or {}
    for name, m in models.items():
        kl = m.get("kl_invariant")
        kl_cell = _num(kl)
        if name == "oracle" and kl is not None and kl == floor.get("kl_invariant"):
            kl_cell = f"= floor {_num(kl)}"
        if m.get("blew_up"):
            kl_cell += " (blew up)"
        lines.append(
            f"| {_describe(name, fit, a)} | {_num(m.get('validity_time_median'))} [{_num(m.get('validity_time_q25'))}, "
            f"{_num(m.get('validity_time_q75'))}] | {_num(m.get('validity_time_median_lyapunov'))} "
            f"| {100 * float(m.get('censored_fraction') or 0):.0f} % | {kl_cell} | {_num(m.get('acf_error'))} |")
    lines += ["", f"![Validity time of each model over {a.get('n_starts')} forecast starts]({figure})", ""]
    med = {n: m.get("validity_time_median") for n, m in models.items()}
    main = main or next(iter(fit), None)
    memoryless = [n for n in fit if n != main and not models.get(n, {}).get("hidden_size") and med.get(n)]
    if main and med.get(main) and med.get("physics_only"):
        parts = [f"{med[main] / med['physics_only']:.0f}× longer than the physics alone"]
        if memoryless:
            best = max(memoryless, key=lambda n: med[n])
            parts.append(f"{med[main] / med[best]:.1f}× longer than the best memoryless correction ({best})")
        if med.get("oracle"):
            parts.append(f"{100 * med[main] / med['oracle']:.0f} % of the oracle's median validity time")
        lines.append(f"In this run the {main} model forecasts " + ", ".join(parts) + ".")
    return "\n".join(lines) + "\n"


def replace_section(readme: str, section: str, begin: str = BEGIN, end: str = END) -> str:
    """``readme`` with the text between the markers ``begin`` and ``end`` replaced by ``section``."""
    if begin not in readme or end not in readme:
        raise SystemExit(f"README has no {begin} ... {end} markers around this section; add them once.")
    head, rest = readme.split(begin, 1)
    _, tail = rest.split(end, 1)
    return f"{head}{begin}\n{section}{end}{tail}"


def check_section(path: Path, readme: str, updated: str, source: str, fix: str) -> int:
    """``--check``: 0 when README already holds what ``source`` gives, else 1 with the command to run."""
    if updated != readme:
        print(f"{path} differs from {source}; run {fix}")
        return 1
    print(f"{path} matches {source}")
    return 0


def run_demo(extra: list[str]) -> Path:
    """Run the demo main job (``mnemode run``) and return its run directory."""
    r = subprocess.run([sys.executable, "-m", "mnemode", "run", "progress=false", *extra], cwd=ROOT,
                       capture_output=True, text=True, env=dict(os.environ))
    sys.stderr.write(r.stderr[-2000:])
    if r.returncode != 0:
        raise SystemExit(f"mnemode run failed (exit {r.returncode})")
    line = next(s for s in r.stdout.splitlines() if s.startswith("run directory:"))
    return Path(line.split(":", 1)[1].strip())


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--run-dir", type=Path, help="read this run instead of running the demo")
    p.add_argument("--readme", type=Path, default=ROOT / "README.md")
    p.add_argument("--figure", default=FIGURE, help="where the validity figure goes, relative to the README")
    p.add_argument("--check", action="store_true", help="change nothing; exit 1 if README differs from the run")
    p.add_argument("overrides", nargs="*", help="overrides for the demo run (only without --run-dir)")
    args = p.parse_args(argv)
    run = args.run_dir or run_demo(args.overrides)
    metrics = json.loads((run / "metrics.json").read_text())
    status = json.loads((run / "status.json").read_text()) if (run / "status.json").exists() else {}
    main_model = None
    if (run / "config.yaml").exists():
        import yaml

        main_model = ((yaml.safe_load((run / "config.yaml").read_text()) or {}).get("model") or {}).get("name")
    readme = args.readme.read_text()
    updated = replace_section(readme, results_section(metrics, status, args.figure, main_model))
    if args.check:
        return check_section(args.readme, readme, updated, str(run),
                             f"scripts/readme_results.py --run-dir {run}")
    args.readme.write_text(updated)
    source = run / "figures" / "validity_times.png"
    if source.exists():
        target = args.readme.parent / args.figure
        target.parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(source, target)
    print(f"README results regenerated from {run}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
