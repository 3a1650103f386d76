"""Finding runs on disk and summarising each: state, finished stages, models, headline results.

Reads only what a run directory says about itself (``status.json``,
``metrics.json``, ``config.yaml``, ``models/``), as JSON and YAML text, so listing
hundreds of runs takes no torch and no Hydra. A run is any folder holding a
``status.json``; a sweep is a folder of such runs (one per job).
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path

__all__ = ["RunSummary", "find_runs", "summarise_run", "runs_table", "runs_json", "model_listing",
           "default_runs_root"]

_SKIP_DIRS = {"data-cache", "models", "checkpoints", "tb", "figures", "export", "exports", "data", ".hydra"}


@dataclass
class RunSummary:
    """What one run directory says about itself.

    Attributes:
        path: the run directory.
        state: ``finished``, ``running``, ``failed`` or ``unknown`` (from ``status.json``).
        stages: stage → state, e.g. ``{"data": "finished", "fit:memory": "finished"}``.
        started, updated: timestamps from ``status.json``.
        main_model: the config's ``model.name``.
        models: fitted model names (main first), from ``metrics.json`` or ``models/*.pt``.
        validity: model → median validity time (time units), assessed models only.
        time_unit: the system's time unit, where the assessment recorded it.
        error: the failure message of a failed run.
    """

    path: Path
    state: str = "unknown"
    stages: dict = field(default_factory=dict)
    started: str = ""
    updated: str = ""
    main_model: str | None = None
    models: list[str] = field(default_factory=list)
    validity: dict[str, float | None] = field(default_factory=dict)
    time_unit: str = ""
    error: str | None = None

    @property
    def stages_done(self) -> list[str]:
        return [s for s, v in self.stages.items() if v == "finished"]


def default_runs_root() -> Path:
    """Where runs go unless told otherwise: ``$MNEMODE_RUNS`` or ``./mnemode-runs`` (as in the config)."""
    return Path(os.environ.get("MNEMODE_RUNS", "mnemode-runs"))


def find_runs(root: str | Path) -> list[Path]:
    """Every run directory at or below ``root`` (folders holding ``status.json``), sorted by path."""
    root = Path(root)
    if (root / "status.json").exists():
        return [root]
    found = []
    for here, dirs, files in os.walk(root):
        if "status.json" in files:
            found.append(Path(here))
            dirs[:] = []                     # a run's own sub-folders hold no runs
            continue
        dirs[:] = sorted(d for d in dirs if d not in _SKIP_DIRS and not d.startswith("."))
    return sorted(found, key=str)


def _read_json(path: Path) -> dict:
    try:
        return json.loads(path.read_text())
    except (OSError, ValueError):
        return {}


def _main_model(path: Path) -> str | None:
    """``model.name`` from the run's config.yaml (plain YAML, read without OmegaConf)."""
    try:
        import yaml

        cfg = yaml.safe_load((path / "config.yaml").read_text()) or {}
        return str((cfg.get("model") or {}).get("name")) if cfg.get("model") else None
    except Exception:  # a missing or unreadable config only loses the main model's name
        return None


def summarise_run(path: str | Path) -> RunSummary:
    """A :class:`RunSummary` of one run directory (missing files leave fields empty)."""
    path = Path(path)
    status = _read_json(path / "status.json")
    metrics = _read_json(path / "metrics.json")
    s = RunSummary(path, state=str(status.get("state", "unknown")), stages=dict(status.get("stages", {})),
                   started=str(status.get("started", "")), updated=str(status.get("updated", "")),
                   error=status.get("error"))
    s.main_model = _main_model(path)
    fitted = list(metrics.get("fit", {}))
    if not fitted and (path / "models").is_dir():
        fitted = sorted(p.stem for p in (path / "models").glob("*.pt"))
    if s.main_model in fitted:
        fitted.remove(s.main_model)
        fitted.insert(0, s.main_model)
    s.models = fitted
    assessed = metrics.get("models") or (metrics.get("assessment") or {}).get("models") or {}
    s.validity = {n: m.get("validity_time_median") for n, m in assessed.items()}
    s.time_unit = str((metrics.get("assessment") or {}).get("time_unit") or "")
    return s


def _cell(v) -> str:
    return "–" if v is None else f"{float(v):.3g}"


def runs_table(summaries: list[RunSummary], root: str | Path | None = None) -> str:
    """A plain-text table: one row per run, one validity column per model seen in any run.

    Columns: the run (relative to ``root``), its state, its finished stages, then
    each model's median validity time in the system's time units ("–": not assessed).
    """
    if not summaries:
        return "no runs found\n"
    models: list[str] = []
    for s in summaries:
        for n in s.models + [m for m in s.validity if m not in s.models]:
            if n not in models:
                models.append(n)
    root = Path(root) if root is not None else None

    def name(s: RunSummary) -> str:
        try:
            rel = s.path.relative_to(root) if root is not None else s.path
        except ValueError:
            rel = s.path
        return str(rel) if str(rel) != "." else s.path.name

    def stages(s: RunSummary) -> str:
        done = s.stages_done
        fits = [d for d in done if d.startswith("fit:")]
        parts = [d for d in ("data",) if d in done]
        if fits:
            parts.append(f"fit {len(fits)}/{len(s.models) or len(fits)}")
        parts += [d for d in ("assess", "export") if d in done]
        return " ".join(parts) or "–"

    units = {s.time_unit for s in summaries if s.time_unit}
    head = ["run", "state", "stages done"] + models
    rows = [[name(s), s.state, stages(s)] + [_cell(s.validity.get(m)) if m in s.validity else "–"
                                            for m in models] for s in summaries]
    widths = [max(len(str(r[i])) for r in rows + [head]) for i in range(len(head))]
    fmt = "  ".join(f"{{:<{w}}}" for w in widths)
    lines = [fmt.format(*head), fmt.format(*("-" * w for w in widths))]
    lines += [fmt.format(*r) for r in rows]
    unit = f" (one time unit: {units.pop()})" if len(units) == 1 else ""
    lines.append("")
    lines.append("model columns: median validity time, how long a forecast stays within γ·RMS(x) of the "
                 f"truth, in time units{unit}; –: not assessed")
    failed = [s for s in summaries if s.state == "failed" and s.error]
    for s in failed:
        lines.append(f"{name(s)} failed: {s.error}")
    return "\n".join(lines) + "\n"


def runs_json(summaries: list[RunSummary]) -> str:
    """The summaries as JSON (a list of objects), for scripts."""
    out = [{"path": str(s.path), "state": s.state, "stages": s.stages, "started": s.started,
            "updated": s.updated, "main_model": s.main_model, "models": s.models,
            "validity_time_median": s.validity, "time_unit": s.time_unit, "error": s.error}
           for s in summaries]
    return json.dumps(out, indent=2) + "\n"


def model_listing(path: str | Path) -> str:
    """The models of one run, for help screens: name, closure, fitter, validity median."""
    path = Path(path)
    if not (path / "status.json").exists() and not (path / "config.yaml").exists():
        return f"{path} is not a run directory (no status.json or config.yaml there).\n"
    s = summarise_run(path)
    fit = _read_json(path / "metrics.json").get("fit", {})
    lines = [f"models of {path}:"]
    for n in s.models:
        d = fit.get(n, {})
        what = " by ".join(str(x) for x in (d.get("closure"), d.get("fitter")) if x)
        tag = " (main)" if n == s.main_model else ""
        v = s.validity.get(n)
        score = f", validity median {_cell(v)} time units" if v is not None else ""
        lines.append(f"  {n}{tag}" + (f": {what}" if what else "") + score)
    if not s.models:
        lines.append("  (none fitted yet)")
    return "\n".join(lines) + "\n"
