"""Study summaries: a sweep (or any set of run directories) in one table and a few plots.

A study is a set of runs that differ in a few settings (the swept parameters, e.g.
the wall response time τ and the seed). :func:`read_jobs` reads each run's
``status.json``, ``metrics.json`` and the overrides that made it; :func:`summarise`
writes

- ``study.csv`` and ``study.md``: one row per job -- its swept settings, status
  (with the reason when it did not finish) and, per model, the validity time
  median and quartiles, the invariant-measure KL divergence and the ACF error;
- ``figures/<metric>_vs_<parameter>.png``: each headline metric against each swept
  parameter, one line per model, seeds pooled; ``study_points.csv`` holds the
  plotted values.

Pooling over seeds: validity times of all forecasts of all seeds at one setting are
pooled and their median drawn, with the band from their 25th to 75th percentile
(where a run's ``metrics.json`` lacks the per-forecast times, the medians and
quartiles of its seeds are averaged by their median instead). KL and ACF error are
one number per run: the line is their median over seeds, the band their quartiles
over seeds, and each seed's value is drawn as a dot.
"""

from __future__ import annotations

import csv
import io
import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import MnemodeError

__all__ = ["JobRecord", "StudySummary", "read_jobs", "swept_parameters", "summary_table", "pooled_points", "summarise",
           "SEED_KEYS", "HEADLINE_METRICS"]

SEED_KEYS = ("seed", "data.seed")
"""Swept keys that only change random draws: pooled in the plots, not drawn as an axis."""

HEADLINE_METRICS = ("validity_time_median", "validity_time_q25", "validity_time_q75", "kl_invariant", "acf_error")

# keys whose values are times: their axis is labelled with the system's time unit
_TIME_KEYS = ("dt", "wall_response_time", "duration", "test_duration", "horizon", "warm_up", "step",
              "solver_step", "spin_up")


@dataclass
class JobRecord:
    """One run directory of a study, as read from disk."""

    path: Path
    name: str
    state: str                          # finished | failed | running | unknown | no run
    reason: str = ""                    # why it did not finish ("" when finished)
    overrides: dict[str, str] = field(default_factory=dict)
    models: dict[str, dict] = field(default_factory=dict)   # model -> its assessment metrics
    time_unit: str = "time units"
    horizon: float | None = None        # forecast length: validity times are censored there
    config: dict | None = None
    overrides_recorded: bool = True     # False: inferred from how the configs differ

    @property
    def finished(self) -> bool:
        return self.state == "finished"


@dataclass
class StudySummary:
    """What :func:`summarise` wrote, and what it read."""

    jobs: list[JobRecord]
    parameters: list[str]
    table_csv: Path
    table_md: Path
    figures: list[Path]


# -- reading -------------------------------------------------------------------

def _natural_key(path: Path):
    return [int(t) if t.isdigit() else t for t in re.split(r"(\d+)", path.name)]


def _is_run(path: Path) -> bool:
    return (path / "config.yaml").exists() or (path / "status.json").exists()


def _looks_like_job(path: Path) -> bool:
    from .sweep import OVERRIDES_FILE

    return _is_run(path) or (path / "mnemode.log").exists() or (path / OVERRIDES_FILE).exists()


def _run_dirs(paths) -> list[Path]:
    found: list[Path] = []
    for p in map(Path, paths):
        if not p.is_dir():
            raise MnemodeError(str(p), "is not a directory",
                               "pass a sweep directory (holding job0, job1, ...) or run directories.")
        if _is_run(p):
            found.append(p)
            continue
        jobs = sorted((c for c in p.iterdir() if c.is_dir() and not c.name.startswith(".") and _looks_like_job(c)),
                      key=_natural_key)
        if not jobs:
            raise MnemodeError(str(p), "holds no mnemode run (no config.yaml or status.json here or one level below)",
                               "pass the sweep directory a `mnemode run -m` printed, or run directories.")
        found.extend(jobs)
    return found


def _last_error_line(log_path: Path) -> str:
    if not log_path.exists():
        return ""
    lines = [ln for ln in log_path.read_text(errors="replace").splitlines() if " ERROR] " in ln]
    return lines[-1].split(" ERROR] ", 1)[1] if lines else ""


def _read_overrides(path: Path) -> dict[str, str] | None:
    from omegaconf import OmegaConf

    from .sweep import OVERRIDES_FILE

    f = path / OVERRIDES_FILE
    if not f.exists():
        return None
    try:
        items = OmegaConf.to_container(OmegaConf.load(f)).get("overrides") or []
    except Exception:  # an unreadable file leaves the overrides to be inferred from the configs
        return None
    out = {}
    for item in items:
        key, _, value = str(item).partition("=")
        out[key.lstrip("+~")] = value
    return out


def _read_job(path: Path) -> JobRecord:
    job = JobRecord(path=path, name=path.name, state="no run")
    if not _is_run(path):
        job.reason = (_last_error_line(path / "mnemode.log")
                      or "no config.yaml: the job did not start a run (see its mnemode.log)")
        job.overrides = _read_overrides(path) or {}
        return job
    from .rundir import RunDir

    run = RunDir(path)
    status = run.status()
    job.state = str(status.get("state", "unknown"))
    if job.state == "failed":
        job.reason = str(status.get("error") or _last_error_line(path / "mnemode.log") or "failed (no reason recorded)")
    elif job.state == "running":
        job.reason = (f"running or interrupted (last update {status.get('updated', '?')}); "
                      f"continue it with `mnemode resume {path}`")
    elif job.state != "finished":
        job.reason = f"status {job.state!r}: no status.json or an unreadable one"
    if (path / "config.yaml").exists():
        try:
            from omegaconf import OmegaConf

            job.config = OmegaConf.to_container(OmegaConf.load(path / "config.yaml"))
        except Exception:  # reported through the missing settings; the summary still lists the job
            job.config = None
    overrides = _read_overrides(path)
    job.overrides = overrides if overrides is not None else {}
    job.overrides_recorded = overrides is not None
    try:
        metrics = run.metrics()
    except (json.JSONDecodeError, OSError):
        metrics = {}
        if job.finished:
            job.reason = "metrics.json is unreadable"
    assessment = metrics.get("assessment") or metrics
    job.models = dict(assessment.get("models") or {})
    job.time_unit = str(assessment.get("time_unit") or "time units")
    job.horizon = _as_float(assessment.get("horizon"))
    return job


def _flatten(d, prefix=""):
    out = {}
    if isinstance(d, dict):
        for k, v in d.items():
            out.update(_flatten(v, f"{prefix}{k}."))
    else:
        out[prefix[:-1]] = d
    return out


def read_jobs(paths) -> list[JobRecord]:
    """Every run under ``paths``: sweep directories (their job sub-directories) or run directories.

    Runs without a record of their overrides (runs not made by a sweep) get as
    overrides the config values in which they differ from the others.

    Raises:
        MnemodeError: a path is not a directory or holds no run.
    """
    jobs = [_read_job(p) for p in _run_dirs(paths)]
    inferred = [j for j in jobs if not j.overrides_recorded and j.config is not None]
    if len(inferred) > 1:
        flat = [_flatten(j.config) for j in inferred]
        keys = sorted(set().union(*flat))
        for key in keys:
            values = {json.dumps(f.get(key), sort_keys=True, default=str) for f in flat}
            if len(values) > 1:
                for j, f in zip(inferred, flat):
                    j.overrides[key] = _format_value(f.get(key))
    return jobs


def _format_value(v) -> str:
    return "null" if v is None else (json.dumps(v) if isinstance(v, (list, dict)) else str(v))


def swept_parameters(jobs: list[JobRecord]) -> list[str]:
    """Override keys whose value differs between jobs, in the order they first appear
    (jobs whose overrides are unknown, such as a job that never started, are left out)."""
    known = [j for j in jobs if j.overrides]
    order: list[str] = []
    for j in known:
        for k in j.overrides:
            if k not in order:
                order.append(k)
    return [k for k in order if len({j.overrides.get(k) for j in known}) > 1]


def _models(jobs: list[JobRecord]) -> list[str]:
    order: list[str] = []
    for j in jobs:
        for m in j.models:
            if m not in order:
                order.append(m)
    return order


# -- the table -----------------------------------------------------------------

def summary_table(jobs: list[JobRecord]) -> tuple[list[str], list[list]]:
    """One row per job: name, swept settings, other overrides, status, reason, then per model
    the headline metrics (``<model>:<metric>`` columns; empty where a model was not assessed)."""
    params = swept_parameters(jobs)
    models = _models(jobs)
    columns = ["job", *params, "overrides", "status", "reason"]
    columns += [f"{m}:{k}" for m in models for k in HEADLINE_METRICS]
    rows = []
    for j in jobs:
        other = " ".join(f"{k}={v}" for k, v in j.overrides.items() if k not in params)
        row = [j.name, *(j.overrides.get(p, "") for p in params), other, j.state, j.reason]
        for m in models:
            row += [j.models.get(m, {}).get(k) for k in HEADLINE_METRICS]
        rows.append(row)
    return columns, rows


def _csv_text(columns, rows) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(columns)
    for r in rows:
        w.writerow(["" if v is None else v for v in r])
    return buf.getvalue()


def _num(v, digits=3) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "–"
    return f"{v:.{digits}g}"


def _md_cell(text: str) -> str:
    return str(text).replace("|", "\\|").replace("\n", " ")


def _markdown(jobs: list[JobRecord], out_dir: Path) -> str:
    params = swept_parameters(jobs)
    models = _models(jobs)
    unit = next((j.time_unit for j in jobs if j.models), "time units")
    done = sum(j.finished for j in jobs)
    lines = [
        "# Study summary", "",
        f"{len(jobs)} jobs, {done} finished, {len(jobs) - done} not. Swept: "
        + (", ".join(f"`{p}`" for p in params) or "nothing (the runs share every setting)") + ".", "",
        f"Each model's cell: validity time median [q25, q75] ({unit}); KL(truth ‖ model) of the "
        "invariant measure (nats); ACF error (RMS over lags, dimensionless).", "",
    ]
    head = ["job", *params, "status", *models]
    lines += ["| " + " | ".join(_md_cell(h) for h in head) + " |", "|" + "---|" * len(head)]
    for j in jobs:
        cells = [j.name, *(j.overrides.get(p, "") for p in params), j.state]
        for m in models:
            d = j.models.get(m)
            cells.append("–" if not d else f"{_num(d.get('validity_time_median'))} "
                         f"[{_num(d.get('validity_time_q25'))}, {_num(d.get('validity_time_q75'))}]; "
                         f"KL {_num(d.get('kl_invariant'))}; ACF {_num(d.get('acf_error'))}")
        lines.append("| " + " | ".join(_md_cell(c) for c in cells) + " |")
    bad = [j for j in jobs if not j.finished]
    if bad:
        lines += ["", "## Jobs that did not finish", ""]
        lines += [f"- `{j.name}` ({j.state}): {_md_cell(j.reason)}" for j in bad]
    figs = sorted((out_dir / "figures").glob("*.png")) if (out_dir / "figures").exists() else []
    if figs:
        lines += ["", "## Figures", ""]
        lines += [f"![{f.stem}](figures/{f.name})" for f in figs]
    return "\n".join(lines) + "\n"


# -- the plots -----------------------------------------------------------------

def _as_float(v):
    try:
        return float(v)
    except (TypeError, ValueError):
        return None


def _axis_label(key: str, unit: str) -> str:
    return f"{key} ({unit})" if key.split(".")[-1] in _TIME_KEYS else key


def _pooled(values: list[dict], metric: str):
    """(centre, low, high, per-seed values) of one metric over the runs of one setting."""
    if metric == "validity_time":
        per_seed = [d.get("validity_time_median") for d in values]
        lists = [d.get("validity_times") for d in values]
        if all(isinstance(x, list) and x for x in lists):
            pooled = np.asarray([v for x in lists for v in x], dtype=float)
            pooled = pooled[np.isfinite(pooled)]
            if pooled.size:
                return (*np.percentile(pooled, [50, 25, 75]), per_seed)
        cols = [[d.get(k) for d in values] for k in ("validity_time_median", "validity_time_q25", "validity_time_q75")]
        if any(v is None for c in cols for v in c):
            return None
        return (float(np.median(cols[0])), float(np.median(cols[1])), float(np.median(cols[2])), per_seed)
    per_seed = [d.get(metric) for d in values]
    finite = np.asarray([v for v in per_seed if v is not None and math.isfinite(v)], dtype=float)
    if not finite.size:
        return None
    return (*np.percentile(finite, [50, 25, 75]), per_seed)


_METRIC_LABELS = {
    "validity_time": ("validity time ({unit})", "median over forecasts with quartile band"),
    "kl_invariant": ("KL(truth ‖ model), invariant measure (nats)", "median over seeds with quartile band"),
    "acf_error": ("ACF error, RMS over lags (dimensionless)", "median over seeds with quartile band"),
}


def pooled_points(jobs: list[JobRecord]) -> list[dict]:
    """The plotted points: per swept parameter, metric, model, other settings and value of
    the parameter, the seeds-pooled centre and band (see the module docstring).

    Returns:
        dicts with keys ``parameter, value, x, metric, model, group, centre, low, high,
        n_runs, per_run`` (``x`` is the value as a number, or its rank if not numeric;
        ``group`` names the other swept settings, seeds excepted).
    """
    finished = [j for j in jobs if j.finished and j.models]
    axes_keys = [p for p in swept_parameters(jobs) if p not in SEED_KEYS]
    models = _models(finished)
    points = []
    for x_key in axes_keys:
        others = [p for p in axes_keys if p != x_key]
        xs_raw = sorted({j.overrides.get(x_key, "") for j in finished},
                        key=lambda v: (_as_float(v) is None, _as_float(v) or 0.0, v))
        numeric = all(_as_float(v) is not None for v in xs_raw)
        groups = sorted({tuple(j.overrides.get(o, "") for o in others) for j in finished})
        for metric in _METRIC_LABELS:
            for model in models:
                for g in groups:
                    label = ", ".join(f"{o}={v}" for o, v in zip(others, g))
                    for rank, xv in enumerate(xs_raw):
                        runs = [j.models[model] for j in finished if model in j.models
                                and j.overrides.get(x_key, "") == xv
                                and tuple(j.overrides.get(o, "") for o in others) == g]
                        stat = _pooled(runs, metric) if runs else None
                        if stat is None:
                            continue
                        points.append({
                            "parameter": x_key, "value": xv, "x": _as_float(xv) if numeric else float(rank),
                            "metric": metric, "model": model, "group": label,
                            "centre": float(stat[0]), "low": float(stat[1]), "high": float(stat[2]),
                            "n_runs": len(runs), "per_run": stat[3],
                        })
    return points


def _plot(points: list[dict], unit: str, out_dir: Path, horizons=()) -> list[Path]:
    import matplotlib

    from .assess.palette import line_styles

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    written = []
    panels = sorted({(p["parameter"], p["metric"]) for p in points})
    if panels:
        (out_dir / "figures").mkdir(parents=True, exist_ok=True)
    for x_key, metric in panels:
        pts = [p for p in points if p["parameter"] == x_key and p["metric"] == metric]
        xs = {p["value"]: p["x"] for p in pts}
        numeric = all(_as_float(v) is not None for v in xs)
        fig, ax = plt.subplots(figsize=(6.4, 4.2))
        lines = sorted({(p["model"], p["group"]) for p in pts}, key=lambda mg: [q["model"] for q in pts].index(mg[0]))
        # mnemode's palette by role (physics-only orange dash-dot, oracle dotted, learned models in turn);
        # the other swept settings of one model cycle through the learned models' colours after them
        styles = line_styles([f"{m}|{g}" if g else m for m, g in lines])
        for model, group in lines:
            line_pts = sorted((p for p in pts if p["model"] == model and p["group"] == group), key=lambda p: p["x"])
            x = np.array([p["x"] for p in line_pts])
            centre, low, high = (np.array([p[k] for p in line_pts], dtype=float) for k in ("centre", "low", "high"))
            style = styles[f"{model}|{group}" if group else model]
            line, = ax.plot(x, centre, marker="o", ms=4, label=model + (f" ({group})" if group else ""), **style.kw())
            ax.fill_between(x, low, high, color=line.get_color(), alpha=0.2, linewidth=0)
            for p in line_pts:
                seeds = [v for v in p["per_run"] if v is not None and math.isfinite(v)]
                ax.scatter([p["x"]] * len(seeds), seeds, s=8, color=line.get_color(), alpha=0.5)
        if metric == "validity_time":
            for i, h in enumerate(sorted(set(horizons))):
                ax.axhline(h, color="grey", linestyle=":", linewidth=1,
                           label="forecast horizon (validity censored)" if i == 0 else None)
        values = list(xs.values())
        if numeric and all(v > 0 for v in values) and max(values) >= 10 * min(values):
            ax.set_xscale("log")
        if not numeric:
            ax.set_xticks(values, list(xs))
        ylabel, how = _METRIC_LABELS[metric]
        ax.set_xlabel(_axis_label(x_key, unit))
        ax.set_ylabel(ylabel.format(unit=unit), fontsize=8)
        ax.set_title(f"{metric.replace('_', ' ')}: {how}; seeds pooled, dots: each seed", fontsize=9)
        ax.grid(alpha=0.3)
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize=8)
        path = out_dir / "figures" / f"{metric}_vs_{x_key.replace('/', '_')}.png"
        fig.tight_layout()
        fig.savefig(path, dpi=110)
        plt.close(fig)
        written.append(path)
    return written


# -- the command's work --------------------------------------------------------

def summarise(paths, out_dir: str | Path | None = None, *, overwrite: bool = False) -> StudySummary:
    """Read the runs under ``paths`` and write the study table and plots into ``out_dir``.

    Args:
        paths: sweep directories and/or run directories.
        out_dir: where to write (default ``<first path>/study``).
        overwrite: replace an earlier summary in ``out_dir``.

    Returns:
        a :class:`StudySummary` naming what was written.

    Raises:
        MnemodeError: a path holds no run; ``out_dir`` holds an earlier summary and
            ``overwrite`` is false.
    """
    from .fileio import write_text

    paths = [Path(p) for p in ([paths] if isinstance(paths, (str, Path)) else paths)]
    if not paths:
        raise MnemodeError("study", "needs at least one directory", "pass a sweep directory or run directories.")
    jobs = read_jobs(paths)
    out = Path(out_dir) if out_dir is not None else paths[0] / "study"
    csv_path, md_path = out / "study.csv", out / "study.md"
    if (csv_path.exists() or md_path.exists()) and not overwrite:
        raise MnemodeError(str(out), "already holds a study summary; mnemode does not write over it",
                           "pass --overwrite to replace it, or --out DIR for another place.")
    out.mkdir(parents=True, exist_ok=True)
    params = swept_parameters(jobs)
    if overwrite and (out / "figures").exists():
        for old in (out / "figures").glob("*_vs_*.png"):
            old.unlink()
    points = pooled_points(jobs)
    unit = next((j.time_unit for j in jobs if j.finished and j.models), "time units")
    horizons = [j.horizon for j in jobs if j.finished and j.horizon is not None]
    figures = _plot(points, unit, out, horizons)
    columns, rows = summary_table(jobs)
    write_text(csv_path, _csv_text(columns, rows))
    point_cols = ["parameter", "value", "metric", "model", "group", "centre", "low", "high", "n_runs"]
    write_text(out / "study_points.csv", _csv_text(point_cols, [[p[c] for c in point_cols] for p in points]))
    write_text(md_path, _markdown(jobs, out))
    return StudySummary(jobs=jobs, parameters=params, table_csv=csv_path, table_md=md_path, figures=figures)
