"""The main job's stages as plain functions: system → data → models → fit → assess → export.

The command line calls exactly these functions with a Hydra config; Python users
can call them with a config from :func:`compose_config` or build the objects by
hand and call the stage libraries directly.
"""

from __future__ import annotations

import logging
import time
from dataclasses import dataclass
from pathlib import Path

import torch
from hydra.utils import instantiate
from omegaconf import DictConfig, OmegaConf

from . import distributed
from .closures.base import Closure, DiscreteRecurrent, Memory, Recurrent
from .errors import CheckpointError, ConfigError, MnemodeError
from .fitting.base import Fitter
from .fitting.checkpoint import checkpoint_step
from .fitting.context import FitContext
from .hybrid import HybridField, HybridFlowMap
from .metric_labels import metrics_labels, versions
from .rundir import RunDir, holds_lock
from .solvers import RK4, FlowMap, Solver
from .sources import DataSplits, prepare_data, run_data, save_run_data
from .systems.base import System

__all__ = [
    "DataSplits", "compose_config", "make_system", "prepare_data", "main_model_name", "model_specs", "build_model",
    "fit_models", "save_model", "load_model", "RunModel", "load_run_model", "fit_worker", "assess_run", "export_run",
    "run_pipeline",
]

log = logging.getLogger("mnemode")

_DTYPES = {"float32": torch.float32, "float64": torch.float64}


def compose_config(overrides: list[str] | None = None, config_name: str = "mnemode") -> DictConfig:
    """The config the command line would build from ``overrides`` (for the Python API and tests)."""
    from hydra import compose, initialize_config_dir

    from .configs_path import config_dir

    with initialize_config_dir(config_dir=str(config_dir()), version_base=None):
        return compose(config_name=config_name, overrides=list(overrides or []))


def dtype_of(cfg: DictConfig) -> torch.dtype:
    name = str(cfg.get("dtype", "float64"))
    if name not in _DTYPES:
        raise ConfigError("dtype", f"is {name!r}; expected one of {sorted(_DTYPES)}", "set dtype=float64 or float32.")
    return _DTYPES[name]


def _instantiate(node, what: str, **kwargs):
    try:
        return instantiate(node, **kwargs)
    except MnemodeError:
        raise
    except Exception as exc:  # Hydra wraps import and argument errors
        cause = exc.__cause__ or exc
        if isinstance(cause, MnemodeError):  # a target's own clear message, unwrapped
            raise cause from None
        raise ConfigError(what, f"could not be built from {OmegaConf.to_container(node)} ({cause})",
                          "check the _target_ and its arguments in that config group.") from None


# -- system and data -------------------------------------------------------------

def make_system(cfg: DictConfig) -> System:
    """The configured :class:`System`."""
    system = _instantiate(cfg.system, "system")
    if not isinstance(system, System):
        raise ConfigError("system._target_", f"built a {type(system).__name__}, expected a mnemode System",
                          "point it at a mnemode.systems factory or mnemode.systems.custom_system.")
    return system


# -- models ------------------------------------------------------------------------

def main_model_name(cfg: DictConfig) -> str:
    """The main model's name: ``model.name``, or what it is (``memory``, ``memoryless``, ``data_only``)."""
    name = cfg.model.get("name")
    if name:
        return str(name)
    if not cfg.model.get("physics", True):
        return "data_only"
    target = (cfg.get("closure") or {}).get("_target_")
    try:
        from hydra.utils import get_class

        memory = issubclass(get_class(str(target)), Memory)
    except Exception:  # an unresolvable target is reported when the closure is built
        memory = False
    return "memory" if memory else "memoryless"


def model_specs(cfg: DictConfig) -> dict[str, DictConfig]:
    """Every model the run fits, each as ``{form, physics, closure, fit[, psi0_step]}``: the main one
    first, then those fitted to compare with it (config group ``compare``)."""
    def resolved(node):  # detached from the root, so interpolations (e.g. ${data.dt}) are resolved first
        return None if node is None else OmegaConf.to_container(node, resolve=True)

    main = OmegaConf.create({
        "form": cfg.model.get("form", "continuous"), "physics": cfg.model.get("physics", True),
        "psi0_step": cfg.model.get("psi0_step"), "closure": resolved(cfg.closure), "fit": resolved(cfg.fit),
    })
    specs = {main_model_name(cfg): main}
    for name, spec in (cfg.get("compare") or {}).items():
        if name in specs:
            raise ConfigError(f"compare.{name}", "has the same name as the main model",
                              "rename the main model (model.name=...) or that compared model.")
        specs[str(name)] = OmegaConf.create(resolved(spec))
    return specs


def build_model(spec: DictConfig, system: System, dt: float, dtype=torch.float64,
                what: str = "closure", n_forcing: int = 0) -> HybridField | HybridFlowMap:
    """An unfitted hybrid model from a model spec (``form``, ``physics``, ``closure``).

    Every closure is built with the run's ``dim``, ``forcing_dim`` (the data's forcing
    inputs, passed to the physics as ``u`` and appended to the closure's inputs) and
    ``dtype``.
    """
    closure = None
    if spec.get("closure") is not None:
        closure = _instantiate(spec.closure, what, dim=system.dim, forcing_dim=int(n_forcing),
                               dtype=str(dtype).replace("torch.", ""))
        if not isinstance(closure, Closure):
            raise ConfigError(f"{what}._target_", f"built a {type(closure).__name__}, expected a mnemode Closure",
                              "point it at a class in mnemode.closures (or a Closure subclass of your own).")
    physics = system.nominal if spec.get("physics", True) else None
    form = spec.get("form", "continuous")
    if form == "continuous":
        if isinstance(closure, DiscreteRecurrent):
            raise ConfigError(f"{what}", f"{type(closure).__name__} acts on the flow map but the model form is "
                              "'continuous'", "set model=discrete for this closure.")
        model = HybridField(physics, closure, system.dim)
    elif form == "discrete":
        if isinstance(closure, Recurrent):
            raise ConfigError(f"{what}", f"{type(closure).__name__} has a continuous hidden field but the model "
                              "form is 'discrete'", "use closure=gru_flow or closure=reservoir_flow for a discrete model "
                              "with memory, or set model=continuous.")
        if n_forcing:
            raise ConfigError(f"{what}", f"the data have {n_forcing} forcing input(s) and the model form is "
                              "'discrete'; discrete models take no forcing in this version",
                              "set model=continuous for forced data.")
        flow = None
        if physics is not None:
            flow = FlowMap(physics, dt, RK4(float(spec.get("psi0_step") or dt / 10)))
        model = HybridFlowMap(flow, closure, system.dim, dt)
    else:
        raise ConfigError("model.form", f"is {form!r}; expected 'continuous' or 'discrete'",
                          "set model=continuous or model=discrete.")
    return model.to(dtype)


def make_solver(cfg: DictConfig) -> Solver:
    return _instantiate(cfg.solver, "solver")


def save_model(path: Path, model, name: str, diagnostics: dict) -> None:
    """Write a fitted model: tensors and plain data only, atomically."""
    from .fileio import atomic_path

    payload = {"name": name, "state_dict": model.state_dict(), "diagnostics": diagnostics,
               "hidden_size": int(model.hidden_size), "mnemode_format": 1}
    with atomic_path(path) as tmp:
        torch.save(payload, tmp)


def load_model(run: RunDir, name: str, cfg: DictConfig, system: System, dt: float, n_forcing: int = 0):
    """Rebuild model ``name`` from the run's config, then load its tensors."""
    path = run.model_path(name)
    if not path.exists():
        if run.stage_done(f"fit:{name}"):  # fitted once, then deleted or moved: a resume would skip it
            raise CheckpointError(str(path), f"fitted model {name!r} was deleted or moved after the run "
                                  "fitted it", f"restore {path.name} into {path.parent} from a backup, or refit "
                                  f"in a new run with the settings in {run.config_path}.")
        raise CheckpointError(str(path), f"fitted model {name!r} is missing: the run stopped before fitting it",
                              f"finish the fit with `mnemode resume {run.path}`.")
    try:
        payload = torch.load(path, weights_only=True, map_location="cpu")
    except Exception as exc:
        raise CheckpointError(str(path), f"cannot be read as a mnemode model ({exc.__class__.__name__})",
                              "the file is corrupt or truncated; refit the model.") from None
    spec = model_specs(cfg)[name]
    model = build_model(spec, system, dt, dtype_of(cfg), what=f"{name}.closure", n_forcing=n_forcing)
    own = model.state_dict()
    saved = payload.get("state_dict", {})
    for key, value in own.items():
        if key not in saved:
            raise CheckpointError(f"{path} [{key}]", "tensor is missing from the saved model",
                                  "the config changed since the fit; refit or restore config.yaml.")
    for key in saved:
        if key not in own:
            raise CheckpointError(f"{path} [{key}]", "saved tensor has no place in the model built from config",
                                  "the config changed since the fit; refit or restore config.yaml.")
    try:
        model.load_state_dict(saved)
    except RuntimeError as exc:
        raise CheckpointError(str(path), f"tensors do not fit the model built from config ({exc})",
                              "the config changed since the fit; refit or restore config.yaml.") from None
    return model, payload.get("diagnostics", {})


@dataclass
class RunModel:
    """A fitted model of a run, with what using it needs: the system, the run's data, solver and warm-up."""

    name: str
    model: HybridField | HybridFlowMap
    system: System
    data: DataSplits
    solver: Solver | None
    warm_up: float
    diagnostics: dict


def load_run_model(run_dir: str | Path, name: str | None = None) -> RunModel:
    """Load fitted model ``name`` (default: the main one) from a run directory alone.

    The model is rebuilt from the run's stored config and its tensors loaded; the run's
    own copy of its data comes with it, so forecasts can be driven by the run's forcing.

    Example::

        from mnemode import load_run_model, simulate
        m = load_run_model("mnemode-runs/demo/2026-12-02_10-00-00")
        x = simulate(m.model, x0, n_steps=100, dt=m.data.dt, solver=m.solver)

    Raises:
        ConfigError: a model the run did not fit. CheckpointError: a missing or damaged model file.
    """
    run = RunDir(run_dir)
    cfg = run.load_config()
    specs = model_specs(cfg)
    name = name or main_model_name(cfg)
    if name not in specs:
        raise ConfigError("model name", f"is {name!r}, which this run did not fit (models: {list(specs)})",
                          f"choose one of {list(specs)}.")
    system = make_system(cfg)
    data = run_data(run, cfg, system)
    model, diagnostics = load_model(run, name, cfg, system, data.dt, data.n_forcing)
    solver = None if isinstance(model, HybridFlowMap) else make_solver(cfg)
    return RunModel(name, model, system, data, solver, float(cfg.warm_up), diagnostics)


# -- stages ---------------------------------------------------------------------

def _writer(run: RunDir, purge_step: int | None = None):
    from torch.utils.tensorboard import SummaryWriter

    return SummaryWriter(log_dir=str(run.tb_dir), purge_step=purge_step)


def fit_models(cfg: DictConfig, run: RunDir, system: System, data: DataSplits, *, resume: bool = False,
               only: list[str] | None = None) -> dict[str, dict]:
    """Fit every model of the run (skipping those already finished) and save them."""
    dtype = dtype_of(cfg)
    solver = make_solver(cfg)
    lyap = system.lyapunov_exponent
    results: dict[str, dict] = {}
    for name, spec in model_specs(cfg).items():
        if only is not None and name not in only:
            continue
        stage = f"fit:{name}"
        fitter = _fitter(spec, name)
        done = run.stage_done(stage) and run.model_path(name).exists()
        if _fits_together(fitter):  # the processes fitting data-parallel take rank 0's decision
            done = distributed.shared_value(done)
        if done:
            log.info("%s: already fitted, skipped", name)
            results[name] = run.metrics().get("fit", {}).get(name, {})
            continue
        model = build_model(spec, system, data.dt, dtype, what=f"{name}.closure", n_forcing=data.n_forcing)
        torch.manual_seed(int(cfg.seed))
        # a resumed fit continues its TensorBoard curves from the checkpointed step
        start_step = checkpoint_step(run.checkpoint_dir(name)) if resume else None
        writer = _writer(run, purge_step=start_step)
        ctx = _fit_context(cfg, run, name, solver, lyap, resume, writer=writer, progress=bool(cfg.progress))
        log.info("fitting %s: %s by %s", name, type(model.closure).__name__, type(fitter).__name__)
        t0 = time.perf_counter()
        try:
            diagnostics = dict(fitter.fit(model, data.train, data.val, ctx))
        finally:
            writer.flush()
            writer.close()
        diagnostics.setdefault("fit_seconds", time.perf_counter() - t0)
        diagnostics["closure"] = type(model.closure).__name__
        diagnostics["fitter"] = type(fitter).__name__
        diagnostics["hidden_size"] = int(model.hidden_size)
        diagnostics["versions"] = versions()
        save_model(run.model_path(name), model, name, diagnostics)
        # wall times go to their own section, so the rest of metrics.json repeats exactly for a fixed seed
        fit_section, timing = run.metrics().get("fit", {}), run.metrics().get("timing", {})
        fit_section[name] = {k: v for k, v in diagnostics.items() if not k.endswith("_seconds")}
        timing.setdefault("fit", {})[name] = {k: v for k, v in diagnostics.items() if k.endswith("_seconds")}
        run.update_metrics(fit=fit_section, timing=timing, labels=metrics_labels(fit_section))
        run.mark(stage)
        results[name] = diagnostics
        log.info("%s fitted in %.1f s: train error %s, validation error %s", name, diagnostics["fit_seconds"],
                 _fmt(diagnostics.get("train_error")), _fmt(diagnostics.get("val_error")))
        if diagnostics.get("note"):
            log.warning("%s: %s", name, diagnostics["note"])
    return results


def _fit_context(cfg: DictConfig, run: RunDir, name: str, solver: Solver, lyap, resume: bool, *, writer,
                 progress: bool) -> FitContext:
    """What a fitter of model ``name`` is told about the run (rank 0 and data-parallel workers alike)."""
    return FitContext(solver=solver, warm_up=float(cfg.warm_up), lyapunov_time=(1.0 / lyap) if lyap else None,
                      writer=writer, checkpoint_dir=run.checkpoint_dir(name), resume=resume,
                      seed=int(cfg.seed), progress=progress, name=name)


def _fitter(spec: DictConfig, name: str) -> Fitter:
    fitter = _instantiate(spec.fit, f"{name}.fit")
    if not isinstance(fitter, Fitter):
        raise ConfigError(f"{name}.fit._target_", f"built a {type(fitter).__name__}, expected a mnemode Fitter",
                          "point it at a class in mnemode.fitting (or a Fitter subclass of your own).")
    return fitter


def _fits_together(fitter: Fitter) -> bool:
    """Whether every process of a data-parallel launch takes part in this fit (trajectory fits do)."""
    from .fitting.trajectory import TrajectoryFit

    return distributed.world_size() > 1 and isinstance(fitter, TrajectoryFit)


def fit_worker(cfg: DictConfig, run_dir: str | Path, *, resume: bool = False) -> None:
    """A process of rank > 0 in data-parallel fitting (see :mod:`mnemode.distributed`).

    It joins every trajectory fit of the run that rank 0 makes, on the run's own copy of
    the data, and writes nothing: rank 0 owns the run directory, checkpoints and logs.
    Other fitters run on rank 0 alone.
    """
    distributed.barrier()  # rank 0 has created the run directory and written its data
    run = RunDir(run_dir)
    system = make_system(cfg)
    data = run_data(run, cfg, system)
    dtype, solver = dtype_of(cfg), make_solver(cfg)
    lyap = system.lyapunov_exponent
    for name, spec in model_specs(cfg).items():
        fitter = _fitter(spec, name)
        if not _fits_together(fitter):
            continue
        if distributed.shared_value(None):  # rank 0 found it already fitted
            continue
        model = build_model(spec, system, data.dt, dtype, what=f"{name}.closure", n_forcing=data.n_forcing)
        torch.manual_seed(int(cfg.seed))
        ctx = _fit_context(cfg, run, name, solver, lyap, resume, writer=None, progress=False)
        fitter.fit(model, data.train, data.val, ctx)


def _fmt(v) -> str:
    return f"{v:.4g}" if isinstance(v, (int, float)) else str(v)


@holds_lock("assess")  # one writer per run directory, from Python as from the command line
def assess_run(run: RunDir, cfg: DictConfig | None = None, system: System | None = None,
               data: DataSplits | None = None) -> dict:
    """Assess every fitted model of a run on its test set (never refits); writes metrics, figures, report."""
    cfg = cfg if cfg is not None else run.load_config()
    from .assess import AssessSettings, ModelEntry, assess_models
    from .assess.references import oracle_unavailable

    system = system or make_system(cfg)
    data = data or run_data(run, cfg, system)
    solver = make_solver(cfg)
    settings = AssessSettings.from_config(cfg, solver=solver)
    models = {}
    for name in model_specs(cfg):
        model, _ = load_model(run, name, cfg, system, data.dt, data.n_forcing)
        models[name] = ModelEntry(model, None if isinstance(model, HybridFlowMap) else solver)
    references = "physics-only" + ("" if oracle_unavailable(system, data.test) else " and oracle")
    log.info("assessing %s (+ %s) on %d test trajectories", ", ".join(models), references,
             data.test.n_trajectories)
    writer = _writer(run)
    try:
        result = assess_models(models, data.test, system, settings, out_dir=run.path, writer=writer,
                               envelope=data.train.envelope())
        _run_figures(run, result, models, data, settings, system, writer)
    finally:
        writer.flush()
        writer.close()
    # wall time to the timing section, so the rest of metrics.json repeats exactly for a fixed seed
    timing = run.metrics().get("timing", {})
    timing["assess_seconds"] = result.pop("cost_seconds", None)
    run.update_metrics(assessment=result, timing=timing, labels=metrics_labels(run.metrics().get("fit")),
                       **_flat_metrics(result))
    run.mark("assess")
    for note in result.get("notes", []):
        log.info("assessment note: %s", note)
    log.info("assessment done in %.1f s: report %s", timing["assess_seconds"], run.path / "report.md")
    return result


def _run_figures(run: RunDir, result: dict, models: dict, data: DataSplits, settings, system, writer) -> None:
    """Training curves and hidden-state traces beside the assessment's figures; the report lists them all."""
    from .assess.figures import CAPTIONS
    from .assess.report import write_report
    from .assess.run_figures import run_figures

    writer.flush()  # the fit's curves are read back from the event files
    made = run_figures(run.path, models, data.test, settings.warm_up, result["horizon"], system.time_unit,
                       writer, fit=run.metrics().get("fit"), order=list(result.get("models", {})))
    result["figures"] = {**(result.get("figures") or {}), **made}
    write_report(result, run.path, {CAPTIONS.get(k, k): v for k, v in result["figures"].items()})


def _flat_metrics(result: dict) -> dict:
    """Top-level keys users look for first: gamma, time scales, floor, per-model figures."""
    keys = ("validity_time_median", "validity_time_median_lower_bound", "validity_time_q25", "validity_time_q75",
            "censored_fraction", "kl_invariant", "acf_error", "escape_fraction")
    return {
        "gamma": result.get("gamma"),
        "lyapunov_time": result.get("lyapunov_time"),
        "predictability_time": (result.get("predictability") or {}).get("time"),
        "floor": result.get("floor"),
        "models": {n: {k: m.get(k) for k in keys} for n, m in result.get("models", {}).items()},
    }


@holds_lock("export")  # one writer per run directory, from Python as from the command line
def export_run(run: RunDir, cfg: DictConfig | None = None, model_name: str | None = None,
               onnx: bool | None = None, system: System | None = None, data: DataSplits | None = None,
               overwrite: bool = False, out_dir: str | Path | None = None, key: bytes | None = None,
               compiled: bool | None = None) -> dict:
    """Export a fitted model of a run as a frozen simulator under ``RUN_DIR/export/<model>`` (or ``out_dir``).

    Each model of a run has its own folder, so exports of several models sit side
    by side; ``RUN_DIR/export/exports.json`` names the run's main model as the
    default that ``load_simulator(RUN_DIR/export)`` picks. A forced run's
    simulator takes the forcing inputs of its data (names, units from
    ``data.forcing_units`` when set, training envelope). ``key`` signs the export.
    """
    import numpy as np

    from .export import check_exportable, export_simulator
    from .simulator import INDEX_FILE

    cfg = cfg if cfg is not None else run.load_config()

    main = main_model_name(cfg)
    name = model_name or cfg.export.get("model") or main
    specs = model_specs(cfg)
    if name not in specs:
        raise ConfigError("export.model", f"is {name!r}, which this run did not fit (models: {list(specs)})",
                          f"choose one of {list(specs)}.")
    path = run.model_path(name)
    fit_diag = run.metrics().get("fit", {}).get(name)
    check_exportable(path, fit_diag)
    system = system or make_system(cfg)
    data = data or run_data(run, cfg, system)
    model, diagnostics = load_model(run, name, cfg, system, data.dt, data.n_forcing)
    assessment = run.metrics().get("assessment", {}).get("models", {}).get(name)
    steps = int(round(float(cfg.warm_up) / data.dt))
    target = Path(out_dir) if out_dir is not None else run.export_dir / name
    forcing = {}
    if data.n_forcing:
        u = np.asarray(data.train.forcing, dtype=np.float64).reshape(-1, data.n_forcing)
        names = list(data.train.forcing_names)
        forcing = {"forcing_names": names, "forcing_units": list(cfg.data.get("forcing_units") or [""] * len(names)),
                   "forcing_envelope": {n: [float(np.nanmin(u[:, j])), float(np.nanmax(u[:, j]))]
                                        for j, n in enumerate(names)}}
    log.info("exporting %s as a frozen simulator to %s", name, target)
    t0 = time.perf_counter()
    solver = None if isinstance(model, HybridFlowMap) else make_solver(cfg)
    if getattr(solver, "compile", False):  # the exported program is captured from the plain step
        solver = type(solver)(solver.step)
    manifest = export_simulator(
        model, target, dt=data.dt, solver=solver,
        state_names=list(system.state_names), state_units=list(system.state_units),
        warm_up_steps=steps, envelope=data.train.envelope(),
        metrics={"fit": diagnostics, "assessment": assessment},
        config=OmegaConf.to_container(cfg, resolve=True), time_unit=system.time_unit,
        dtype=dtype_of(cfg), onnx=bool(cfg.export.onnx if onnx is None else onnx),
        extra_manifest={"model_name": name, "envelope_margin": float(cfg.export.envelope_margin)},
        overwrite=overwrite, key=key, compiled=bool(cfg.export.get("compiled", False) if compiled is None
                                                     else compiled),
        parity_t0=float(np.min(data.train.absolute_times()[0])),  # physics that reads t: check it where the data are
        **forcing,
    )
    if out_dir is None:
        from .fileio import write_json

        exported = sorted(p.parent.name for p in run.export_dir.glob("*/simulator.json"))
        write_json(run.export_dir / INDEX_FILE, {"default": main, "models": exported})
    run.mark("export")
    log.info("export done in %.1f s: %s", time.perf_counter() - t0, target)
    return manifest


def run_pipeline(cfg: DictConfig, run_dir: str | Path, *, resume: bool = False, stages=("fit", "assess", "export"),
                 only: list[str] | None = None) -> RunDir:
    """The main job: data, fit, assess, export, in one run directory."""
    from .config_check import check_config, check_physics_on_data

    check_config(cfg)  # every stage's settings, before anything is written or computed
    run = RunDir(run_dir)
    run.start(cfg, resume=resume, command="resume" if resume else "+".join(stages))
    if not resume:
        run.mark("data", "pending", stages_requested=list(stages))
    try:
        system = make_system(cfg)
        data = run_data(run, cfg, system) if resume else prepare_data(cfg, system, progress=bool(cfg.progress))
        save_run_data(run, data)
        distributed.barrier()  # the other processes of a data-parallel fit read the run's data now
        run.update_metrics(data={
            "source": data.source, "dt": data.dt, "n_train": data.train.n_trajectories,
            "n_val": data.val.n_trajectories, "n_test": data.test.n_trajectories,
            "noise": data.train.meta.get("noise"), "warm_up": float(cfg.warm_up),
        })
        run.mark("data")
        if "fit" in stages:
            check_physics_on_data(system, data.train)  # shape, finiteness and units, before any fitting
            fit_models(cfg, run, system, data, resume=resume, only=only)
        if "assess" in stages and cfg.assess.enabled and not (resume and run.stage_done("assess")):
            assess_run(run, cfg, system, data)
        if "export" in stages and cfg.export.enabled and not (resume and run.stage_done("export")):
            # a resumed run may have died half-way through writing the export: replace it
            export_run(run, cfg, system=system, data=data, overwrite=resume)
    except BaseException as exc:
        run.finish("failed", error=str(exc) or type(exc).__name__)
        raise
    run.finish("finished")
    return run
