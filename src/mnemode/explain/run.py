"""Read the learned correction of a model in a run directory (what ``mnemode correction`` calls).

Every call into the pipeline (config, system, data, model, solver) is in
:func:`_load`, so a change of those names touches one place.
"""

from __future__ import annotations

import logging
from pathlib import Path

from ..errors import ConfigError
from .reading import CorrectionReading, read_correction
from .report import write_reading

__all__ = ["explain_run", "correction_dir"]

log = logging.getLogger("mnemode")


def correction_dir(run_path, model_name: str) -> Path:
    """Where the reading of ``model_name`` goes: ``RUN_DIR/correction/<model>/``."""
    return Path(run_path) / "correction" / model_name


def _load(run_path, model_name: str | None):
    """The run's config, system, data, the named model (default: the main one), solver and warm-up."""
    from .. import pipeline
    from ..rundir import RunDir

    run = RunDir(run_path)
    cfg = run.load_config()
    specs = pipeline.model_specs(cfg)
    name = model_name or pipeline.main_model_name(cfg)
    if name not in specs:
        raise ConfigError("--model", f"is {name!r}, which this run did not fit (models: {list(specs)})",
                          f"choose one of {list(specs)}.")
    if specs[name].get("closure") is None:
        raise ConfigError("--model", f"{name!r} has no closure, so there is no learned correction to read",
                          f"choose a model with a closure among {list(specs)}.")
    system = pipeline.make_system(cfg)
    data = pipeline.run_data(run, cfg, system)
    model, _ = pipeline.load_model(run, name, cfg, system, data.dt, data.n_forcing)
    solver = pipeline.make_solver(cfg)
    return name, system, data, model, solver, float(cfg.get("warm_up", 0.0) or 0.0)


def explain_run(run_path, model_name: str | None = None, *, overwrite: bool = False, degree: int = 2,
                threshold: float = 0.01, noise_floor: float = 0.01, n_points: int = 2000,
                figures: bool = True) -> tuple[CorrectionReading, Path]:
    """Read a run's fitted model and write the report under ``RUN_DIR/correction/<model>/``.

    Args:
        run_path: the run directory.
        model_name: which fitted model (default: the run's main model).
        overwrite: replace an earlier reading of the same model.
        degree, threshold, noise_floor, n_points: see :func:`~mnemode.explain.read_correction`.
        figures: write the PNG figures.

    Returns:
        ``(reading, path of report.md)``.

    Raises:
        ConfigError: an unknown model name, a model without closure, bad settings.
        CheckpointError: not a run directory, a missing fitted model, or an existing
            reading without ``overwrite``.
    """
    if int(degree) < 0 or not float(threshold) >= 0:
        raise ConfigError("--degree/--threshold", f"are {degree} and {threshold}; expected a degree ≥ 0 and a "
                          "threshold ≥ 0", "e.g. --degree 2 --threshold 0.01.")
    name, system, data, model, solver, warm_up = _load(run_path, model_name)
    out = correction_dir(run_path, name)
    if out.exists() and any(out.iterdir()) and not overwrite:
        from ..errors import CheckpointError

        raise CheckpointError(str(out), "already holds a reading of this correction; mnemode does not write over it",
                              "pass --overwrite to replace it, or move it away.")
    log.info("reading the learned correction of %s on %d test trajectories", name, data.test.n_trajectories)
    reading = read_correction(model, data.test, data.train, model_name=name, state_names=list(system.state_names),
                              state_units=list(system.state_units), time_unit=system.time_unit, solver=solver,
                              warm_up=warm_up, degree=degree, threshold=threshold, noise_floor=noise_floor,
                              n_points=n_points)
    path = write_reading(reading, out, overwrite=overwrite, figures=figures)
    return reading, path
