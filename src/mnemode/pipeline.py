"""The main job's stages as plain functions: system → data → models → fit → assess → export.

The command line calls exactly these functions with a Hydra config; Python users
can call them with a config from :func:`compose_config` or build the objects by
hand and call the stage libraries directly.
"""

from __future__ import annotations

import hashlib
import inspect
import json
import logging
import time
from dataclasses import dataclass
from pathlib import Path

import torch
from hydra.utils import instantiate
from omegaconf import DictConfig, OmegaConf

from .data import TrajectorySet, generate, load_trajectories
from .errors import CheckpointError, ConfigError, MnemodeError
from .fitting.checkpoint import checkpoint_step
from .fitting.context import FitContext
from .hybrid import HybridField, HybridFlowMap
from .rundir import RunDir
from .solvers import RK4, FlowMap, Solver
from .systems.base import System

__all__ = [
    "DataSplits", "compose_config", "make_system", "prepare_data", "model_specs", "build_model",
    "fit_models", "save_model", "load_model", "assess_run", "export_run", "run_pipeline",
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


@dataclass
class DataSplits:
    """Training, validation and test trajectories, and where they came from."""

    train: TrajectorySet
    val: TrajectorySet
    test: TrajectorySet
    source: str

    @property
    def dt(self) -> float:
        return self.train.dt

    @property
    def n_forcing(self) -> int:
        return 0 if self.train.forcing is None else int(self.train.forcing.shape[-1])


def _data_key(cfg: DictConfig) -> str:
    spec = {
        "system": OmegaConf.to_container(cfg.system, resolve=True),
        "data": {k: v for k, v in OmegaConf.to_container(cfg.data, resolve=True).items() if k != "cache_dir"},
        "version": 1,
    }
    return hashlib.sha256(json.dumps(spec, sort_keys=True).encode()).hexdigest()[:12]


def prepare_data(cfg: DictConfig, system: System, *, progress: bool = False) -> DataSplits:
    """Generate (and cache) or load the trajectories, validate them and split them."""
    d = cfg.data
    if d.source == "generated":
        cache = Path(str(d.cache_dir)).expanduser() / f"{system.name}-{_data_key(cfg)}"
        fit_path, test_path = cache / "train_val.npz", cache / "test.npz"
        if fit_path.exists() and test_path.exists():
            log.info("using cached data %s", cache)
            fit_set = load_trajectories(fit_path, expected_dim=system.dim)
            test = load_trajectories(test_path, expected_dim=system.dim)
        else:
            log.info("generating %s data into %s", system.name, cache)
            solver = RK4(float(d.solver_step))
            fit_set = generate(system, n_trajectories=int(d.n_train) + int(d.n_val), duration=float(d.duration),
                               dt=float(d.dt), solver=solver, seed=int(d.seed), noise=float(d.noise),
                               spin_up=d.spin_up, progress=progress)
            test = generate(system, n_trajectories=int(d.n_test), duration=float(d.test_duration),
                            dt=float(d.dt), solver=solver, seed=int(d.seed) + 100_003, noise=float(d.noise),
                            spin_up=d.spin_up, progress=progress)
            fit_set.save(fit_path)
            test.save(test_path)
        train, val = fit_set.split_by_trajectory([int(d.n_train), int(d.n_val)])
        return DataSplits(train, val, test, str(cache))
    if d.source == "file":
        if d.path in (None, "???"):
            raise ConfigError("data.path", "is not set", "pass data.path=/path/to/observations.csv")
        ts = load_trajectories(d.path, expected_dim=system.dim,
                               state_columns=d.get("state_columns"), forcing_columns=d.get("forcing_columns"))
        if d.split == "time":
            train, val, test = ts.split_by_time(list(d.fractions))
        elif d.split == "trajectory":
            b = ts.n_trajectories
            counts = [d.get("n_train"), d.get("n_val"), d.get("n_test")]
            if any(c is None for c in counts):
                if b < 3:
                    raise ConfigError("data.split", f"is 'trajectory' but the file holds {b} trajectory(ies)",
                                      "use data.split=time, or provide at least 3 trajectories.")
                n_val = n_test = max(1, round(0.2 * b))
                counts = [b - n_val - n_test, n_val, n_test]
            train, val, test = ts.split_by_trajectory([int(c) for c in counts])
        else:
            raise ConfigError("data.split", f"is {d.split!r}; expected 'trajectory' or 'time'",
                              "set data.split=trajectory or data.split=time.")
        return DataSplits(train, val, test, str(d.path))
    raise ConfigError("data.source", f"is {d.source!r}; expected 'generated' or 'file'",
                      "choose data=generated or data=file.")


_SPLITS = ("train", "val", "test")


def save_run_data(run: RunDir, data: DataSplits) -> None:
    """Keep the run's own copy of its data splits, so the run directory alone suffices later."""
    for split in _SPLITS:
        path = run.path / "data" / f"{split}.npz"
        if not path.exists():
            getattr(data, split).save(path)


def run_data(run: RunDir, cfg: DictConfig, system: System) -> DataSplits:
    """The data a run was fitted on: its own copy if present, else rebuilt from the config."""
    paths = [run.path / "data" / f"{split}.npz" for split in _SPLITS]
    if all(p.exists() for p in paths):
        train, val, test = (load_trajectories(p, expected_dim=system.dim) for p in paths)
        return DataSplits(train, val, test, str(run.path / "data"))
    return prepare_data(cfg, system, progress=bool(cfg.progress))


# -- models ------------------------------------------------------------------------

def model_specs(cfg: DictConfig) -> dict[str, DictConfig]:
    """Every model the run fits: the main one first, then the baselines."""
    def resolved(node):  # detached from the root, so interpolations (e.g. ${data.dt}) are resolved first
        return None if node is None else OmegaConf.to_container(node, resolve=True)

    main = OmegaConf.create({
        "form": cfg.model.form, "physics": cfg.model.physics,
        "closure": resolved(cfg.closure), "fit": resolved(cfg.fit),
    })
    specs = {str(cfg.model.name): main}
    for name, spec in (cfg.get("baselines") or {}).items():
        if name in specs:
            raise ConfigError(f"baselines.{name}", "has the same name as the main model",
                              "rename the main model (model.name=...) or the baseline.")
        specs[str(name)] = OmegaConf.create(resolved(spec))
    return specs


def _closure_kwargs(spec: DictConfig, system: System, n_forcing: int, what: str) -> dict:
    """Constructor arguments the run supplies: ``dim``, and the forcing inputs if the data have them."""
    kwargs = {"dim": system.dim}
    if not n_forcing:
        return kwargs
    from hydra.utils import get_method

    try:
        params = inspect.signature(get_method(spec.closure._target_)).parameters
    except Exception:  # an unresolvable target is reported by _instantiate
        return kwargs
    if "forcing_dim" in params:
        kwargs["forcing_dim"] = n_forcing
    elif "in_dim" in params:
        kwargs["in_dim"] = system.dim + n_forcing
    else:
        raise ConfigError(what, f"{spec.closure._target_} cannot take the data's {n_forcing} forcing input(s)",
                          "choose a closure that accepts forcing (random_features, mlp, gaussian_process, "
                          "leaky_memory, filter_bank) or drop data.forcing_columns.")
    return kwargs


def build_model(spec: DictConfig, system: System, dt: float, dtype=torch.float64,
                what: str = "closure", n_forcing: int = 0) -> HybridField | HybridFlowMap:
    """An unfitted hybrid model from a model spec (``form``, ``physics``, ``closure``).

    ``n_forcing`` forcing inputs (from the data) are passed to the physics as ``u``
    and appended to the closure's inputs.
    """
    closure = None
    if spec.get("closure") is not None:
        previous = torch.get_default_dtype()
        torch.set_default_dtype(dtype)  # closures derive constants at construction: keep full precision
        try:
            closure = _instantiate(spec.closure, what, **_closure_kwargs(spec, system, n_forcing, what))
        finally:
            torch.set_default_dtype(previous)
    physics = system.nominal if spec.get("physics", True) else None
    form = spec.get("form", "continuous")
    if form == "continuous":
        if closure is not None and closure.discrete:
            raise ConfigError(f"{what}", f"{type(closure).__name__} acts on the flow map but the model form is "
                              "'continuous'", "set model.form=discrete for this closure.")
        model = HybridField(physics, closure, system.dim)
    elif form == "discrete":
        if closure is not None and closure.hidden_size and not closure.discrete:
            raise ConfigError(f"{what}", f"{type(closure).__name__} has a continuous hidden field but the model "
                              "form is 'discrete'", "use closure=gru_flow for a discrete model with memory, or "
                              "set model.form=continuous.")
        flow = None
        if physics is not None:
            flow = FlowMap(physics, dt, RK4(float(spec.get("psi0_step") or dt / 10)))
        model = HybridFlowMap(flow, closure, system.dim, dt)
    else:
        raise ConfigError("model.form", f"is {form!r}; expected 'continuous' or 'discrete'",
                          "set model.form=continuous or model.form=discrete.")
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
        raise CheckpointError(str(path), f"fitted model {name!r} is missing",
                              f"fit it first (`mnemode resume {run.path}` finishes an interrupted run).")
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
        if run.stage_done(stage) and run.model_path(name).exists():
            log.info("%s: already fitted, skipped", name)
            results[name] = run.metrics().get("fit", {}).get(name, {})
            continue
        model = build_model(spec, system, data.dt, dtype, what=f"{name}.closure", n_forcing=data.n_forcing)
        fitter = _instantiate(spec.fit, f"{name}.fit")
        torch.manual_seed(int(cfg.seed))
        # a resumed fit continues its TensorBoard curves from the checkpointed step
        start_step = checkpoint_step(run.checkpoint_dir(name)) if resume else None
        writer = _writer(run, purge_step=start_step)
        ctx = FitContext(solver=solver, warm_up=float(cfg.warm_up), lyapunov_time=(1.0 / lyap) if lyap else None,
                         writer=writer, checkpoint_dir=run.checkpoint_dir(name), resume=resume,
                         seed=int(cfg.seed), progress=bool(cfg.progress), name=name)
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
        save_model(run.model_path(name), model, name, diagnostics)
        fit_section = run.metrics().get("fit", {})
        fit_section[name] = diagnostics
        run.update_metrics(fit=fit_section)
        run.mark(stage)
        results[name] = diagnostics
        log.info("%s fitted in %.1f s: train error %s, validation error %s", name, diagnostics["fit_seconds"],
                 _fmt(diagnostics.get("train_error")), _fmt(diagnostics.get("val_error")))
    return results


def _fmt(v) -> str:
    return f"{v:.4g}" if isinstance(v, (int, float)) else str(v)


def assess_run(run: RunDir, cfg: DictConfig | None = None, system: System | None = None,
               data: DataSplits | None = None) -> dict:
    """Assess every fitted model of a run on its test set; writes metrics, figures, report."""
    cfg = cfg if cfg is not None else run.load_config()
    from .assess.assessment import AssessSettings, ModelEntry, assess_models

    system = system or make_system(cfg)
    data = data or run_data(run, cfg, system)
    solver = make_solver(cfg)
    models = {}
    for name in model_specs(cfg):
        model, _ = load_model(run, name, cfg, system, data.dt, data.n_forcing)
        models[name] = ModelEntry(model, None if isinstance(model, HybridFlowMap) else solver)
    a = cfg.assess
    settings = AssessSettings(gamma=float(a.gamma), warm_up=float(cfg.warm_up), horizon=float(a.horizon),
                              n_starts=int(a.n_starts), free_run_length=float(a.free_run_length),
                              n_bins=int(a.n_bins), acf_max_lag=float(a.acf_max_lag),
                              oracle_noise=a.get("oracle_noise"), seed=int(cfg.seed),
                              progress=bool(cfg.progress))
    log.info("assessing %s (+ physics-only and oracle) on %d test trajectories", ", ".join(models),
             data.test.n_trajectories)
    t0 = time.perf_counter()
    writer = _writer(run)
    try:
        result = assess_models(models, data.test, system, settings, out_dir=run.path, writer=writer)
    finally:
        writer.flush()
        writer.close()
    run.update_metrics(assessment=result, **_flat_metrics(result))
    run.mark("assess")
    log.info("assessment done in %.1f s: report %s", time.perf_counter() - t0, run.path / "report.md")
    return result


def _flat_metrics(result: dict) -> dict:
    """Top-level keys users look for first: gamma, lyapunov_time, floor, per-model figures."""
    keys = ("validity_time_median", "validity_time_q25", "validity_time_q75", "kl_invariant", "acf_error")
    return {
        "gamma": result.get("gamma"),
        "lyapunov_time": result.get("lyapunov_time"),
        "floor": result.get("floor"),
        "models": {n: {k: m.get(k) for k in keys} for n, m in result.get("models", {}).items()},
    }


def export_run(run: RunDir, cfg: DictConfig | None = None, model_name: str | None = None,
               onnx: bool | None = None, system: System | None = None, data: DataSplits | None = None,
               overwrite: bool = False, out_dir: str | Path | None = None, key: bytes | None = None) -> dict:
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

    main = str(cfg.model.name)
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
    manifest = export_simulator(
        model, target, dt=data.dt,
        solver=None if isinstance(model, HybridFlowMap) else make_solver(cfg),
        state_names=list(system.state_names), state_units=list(system.state_units),
        warm_up_steps=steps, envelope=data.train.envelope(),
        metrics={"fit": diagnostics, "assessment": assessment},
        config=OmegaConf.to_container(cfg, resolve=True), time_unit=system.time_unit,
        dtype=dtype_of(cfg), onnx=bool(cfg.export.onnx if onnx is None else onnx),
        extra_manifest={"model_name": name, "envelope_margin": float(cfg.export.envelope_margin)},
        overwrite=overwrite, key=key, **forcing,
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
    run = RunDir(run_dir)
    run.start(cfg, resume=resume)
    if not resume:
        run.mark("data", "pending", stages_requested=list(stages))
    try:
        system = make_system(cfg)
        data = run_data(run, cfg, system) if resume else prepare_data(cfg, system, progress=bool(cfg.progress))
        save_run_data(run, data)
        run.update_metrics(data={
            "source": data.source, "dt": data.dt, "n_train": data.train.n_trajectories,
            "n_val": data.val.n_trajectories, "n_test": data.test.n_trajectories,
            "noise": data.train.meta.get("noise"), "warm_up": float(cfg.warm_up),
        })
        run.mark("data")
        if "fit" in stages:
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
