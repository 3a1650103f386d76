"""Check the whole config before any work, and decide which settings a resume may change.

:func:`check_config` looks at every stage's settings -- run, data, model, fit,
assessment, export -- and at what can be known before data exist (a forecast
horizon plus warm-up that cannot fit in the trajectories to be generated), so a
bad value stops the run in a second rather than after the fitting. The fitter
configs are also built once (constructors only store hyper-parameters), so a
fitter's own checks run first too.

:func:`resume_overrides` parses ``key=value`` arguments of ``mnemode resume``:
settings that do not change what was fitted (``assess.*``, ``export.*``,
``fit.lr``, ``progress``) are accepted; anything else is refused, because the
fitted models and checkpoints were made under the stored values.
"""

from __future__ import annotations

import math
from typing import Any

from omegaconf import DictConfig, OmegaConf

from .errors import ConfigError

__all__ = ["check_config", "resume_overrides", "RESUME_SAFE", "apply_overrides", "precheck_overrides",
           "check_physics_on_data"]

_ABSENT = object()
RESUME_SAFE = ("assess.", "export.", "fit.lr", "progress")
_TOL = 1e-9


def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _get(cfg: DictConfig, key: str):
    try:
        parent, _, leaf = key.rpartition(".")
        node = OmegaConf.select(cfg, parent, default=None) if parent else cfg
        if OmegaConf.is_dict(node) and leaf in node.keys() and OmegaConf.is_missing(node, leaf):
            return "???"  # a mandatory value nobody set
        return OmegaConf.select(cfg, key, default=_ABSENT, throw_on_missing=False)
    except Exception as exc:  # an interpolation that cannot be resolved
        raise ConfigError(key, f"cannot be resolved ({str(exc).splitlines()[0]})",
                          "fix the ${...} reference in that setting.") from None


def _number(cfg, key, *, gt=None, ge=None, le=None, integer=False, optional=False, example=None):
    """The value of ``key`` checked to be a (finite) number in range; ``_ABSENT`` if the key is absent."""
    v = _get(cfg, key)
    if v is _ABSENT:
        return v
    if v is None and optional:
        return None
    kind = "an integer" if integer else "a number"
    bounds = []
    if gt is not None:
        bounds.append(f"> {gt:g}")
    if ge is not None:
        bounds.append(f"≥ {ge:g}")
    if le is not None:
        bounds.append(f"≤ {le:g}")
    expect = kind + (" " + " and ".join(bounds) if bounds else "") + (" (or null)" if optional else "")
    fix = f"set {key}={example}." if example is not None else f"set {key} to {expect}."
    if v == "???":
        raise ConfigError(key, "is not set", fix)
    if not _is_number(v) or (integer and not isinstance(v, int)) or (isinstance(v, float) and not math.isfinite(v)):
        raise ConfigError(key, f"is {v!r}; expected {expect}", fix)
    if (gt is not None and not v > gt) or (ge is not None and not v >= ge) or (le is not None and not v <= le):
        raise ConfigError(key, f"is {v!r}; expected {expect}", fix)
    return v


def _choice(cfg, key, choices, optional=False):
    v = _get(cfg, key)
    if v is _ABSENT or (v is None and optional):
        return v
    if v not in choices:
        raise ConfigError(key, f"is {v!r}; expected one of {list(choices)}",
                          f"set {key}={list(choices)[0]} (or another of those).")
    return v


def _flag(cfg, key):
    v = _get(cfg, key)
    if v is not _ABSENT and not isinstance(v, bool):
        raise ConfigError(key, f"is {v!r}; expected true or false", f"set {key}=true or {key}=false.")
    return v


def _text(cfg, key):
    v = _get(cfg, key)
    if v is not _ABSENT and (not isinstance(v, str) or not v.strip()):
        raise ConfigError(key, f"is {v!r}; expected a non-empty name", f"set {key}=<a name>.")
    return v


def _length_steps(value, unit, dt):
    """A fitter length in time units (``None`` where it depends on a Lyapunov time)."""
    if unit == "steps":
        return None if dt is None else float(value) * dt
    if unit == "lyapunov":
        return None
    return float(value)


def _check_fit(cfg: DictConfig, prefix: str, warm_up, dt, duration) -> None:
    """A fitter's settings (those mnemode's fitters share) and its windows against the trajectories."""
    for key in ("steps", "batch_size", "val_every", "val_windows", "checkpoint_every", "patience",
                "reforce_every", "max_samples", "epochs"):
        _number(cfg, f"{prefix}.{key}", ge=1, integer=True, optional=True)
    for key in ("lr", "lr_final", "max_seconds", "val_horizon", "clip", "psi0_step"):
        _number(cfg, f"{prefix}.{key}", gt=0, optional=True)
    for key in ("warm_up_grad", "weight_decay"):
        _number(cfg, f"{prefix}.{key}", ge=0, optional=True)
    _number(cfg, f"{prefix}.curriculum", ge=0, le=1, optional=True)
    _number(cfg, f"{prefix}.val_fraction", gt=0, le=1, optional=True)
    unit = _choice(cfg, f"{prefix}.unit", ("time", "steps", "lyapunov"), optional=True)
    horizon = _get(cfg, f"{prefix}.horizon")
    if horizon is _ABSENT or horizon is None:
        return
    hz = [horizon] if _is_number(horizon) else list(horizon) if OmegaConf.is_list(horizon) or isinstance(
        horizon, (list, tuple)) else None
    if hz is None or len(hz) not in (1, 2) or not all(_is_number(h) and h > 0 for h in hz):
        raise ConfigError(f"{prefix}.horizon", f"is {_plain(horizon)!r}; expected a positive length or [start, end]",
                          f"write e.g. {prefix}.horizon=[0.5,4.0].")
    if len(hz) == 2 and hz[0] > hz[1]:
        raise ConfigError(f"{prefix}.horizon", f"is {_plain(horizon)!r}; the start is longer than the end",
                          f"write [short, long], e.g. {prefix}.horizon=[{hz[1]:g},{hz[0]:g}].")
    if duration is None or warm_up is None:
        return
    unit = "time" if unit in (_ABSENT, None) else unit
    longest = _length_steps(max(hz), unit, dt)
    val_h = _get(cfg, f"{prefix}.val_horizon")
    checks = [("horizon", longest)]
    if _is_number(val_h):
        checks.append(("val_horizon", float(val_h)))
    for name, length in checks:
        if length is not None and warm_up + length > duration + _TOL:
            raise ConfigError(f"{prefix}.{name}", f"is {length:g} time units; with warm_up={warm_up:g} that "
                              f"needs trajectories of {warm_up + length:g}, but data.duration is {duration:g}",
                              f"shorten {prefix}.{name} or warm_up, or lengthen data.duration.")


def _plain(v):
    return OmegaConf.to_container(v) if OmegaConf.is_config(v) else v


def check_config(cfg: DictConfig, *, build_fitters: bool = True, data_only: bool = False) -> None:
    """Check every setting of a run before any work is done.

    With ``data_only`` (``mnemode generate`` and ``diagnose``) only the run-wide and
    data settings are checked: models, fits, assessment and export are not used.

    Raises:
        ConfigError: naming the first setting at fault, what was expected and the fix.
    """
    seed = _get(cfg, "seed")
    if seed is not _ABSENT and (not isinstance(seed, int) or isinstance(seed, bool) or seed < 0):
        raise ConfigError("seed", f"is {seed!r}; expected a whole number ≥ 0", "set seed=0 (or another integer).")
    _choice(cfg, "dtype", ("float64", "float32"))
    _flag(cfg, "progress")
    _text(cfg, "name")
    warm_up = _number(cfg, "warm_up", ge=0, example=2.0)
    warm_up = None if warm_up is _ABSENT else float(warm_up)
    if _get(cfg, "model.name") is not None:  # null: named after what it is
        _text(cfg, "model.name")
    _choice(cfg, "model.form", ("continuous", "discrete"))
    _flag(cfg, "model.physics")
    solver = _get(cfg, "solver")
    if solver is not _ABSENT:
        if not OmegaConf.is_dict(solver) or "_target_" not in solver:
            raise ConfigError("solver", f"is {_plain(solver)!r}; expected a solver config with a _target_",
                              "set solver._target_=mnemode.solvers.RK4 and solver.step.")
        _number(cfg, "solver.step", gt=0, optional=True)

    # -- data: what is known before generation ------------------------------------------
    target = str(_get(cfg, "data._target_") or "")
    source = {"mnemode.sources.GeneratedSource": "generated", "mnemode.sources.FileSource": "file"}.get(target)
    dt = duration = test_duration = None
    if source == "generated":
        dt = _number(cfg, "data.dt", gt=0, example=0.02)
        duration = _number(cfg, "data.duration", gt=0, example=100.0)
        test_duration = _number(cfg, "data.test_duration", gt=0, example=100.0)
        for key in ("n_train", "n_val", "n_test"):
            _number(cfg, f"data.{key}", ge=1, integer=True, example=4)
        _number(cfg, "data.noise", ge=0)
        _number(cfg, "data.solver_step", gt=0, example=0.005)
        _number(cfg, "data.seed", ge=0, integer=True, example=0)
        _number(cfg, "data.spin_up", ge=0, optional=True)
        dt, duration, test_duration = (None if v is _ABSENT else float(v) for v in (dt, duration, test_duration))
        for key, length in (("data.duration", duration), ("data.test_duration", test_duration)):
            if dt is not None and length is not None and length < 2 * dt:
                raise ConfigError(key, f"is {length:g}, shorter than two samples at data.dt={dt:g}",
                                  f"lengthen {key} or shorten data.dt.")
        if not data_only and warm_up is not None and duration is not None and warm_up >= duration:
            raise ConfigError("warm_up", f"is {warm_up:g} time units but the trajectories last {duration:g} "
                              "(data.duration): nothing is left to forecast",
                              "shorten warm_up or lengthen data.duration.")
    elif source == "file":
        path = _get(cfg, "data.path")
        if path in (None, "???", _ABSENT) and _get(cfg, "data.train") in (None, _ABSENT):
            raise ConfigError("data.path", "is not set (nor data.train)",
                              "pass data.path=/path/to/observations.csv, or data.train=... and data.test=... files.")
        split = _choice(cfg, "data.split", ("trajectory", "time"))
        if split == "trajectory":
            for key in ("n_train", "n_val", "n_test"):
                _number(cfg, f"data.{key}", ge=1, integer=True, optional=True, example=4)
        fr = _get(cfg, "data.fractions")
        if split == "time" and fr is not _ABSENT:
            fr = _plain(fr)
            if (not isinstance(fr, list) or len(fr) != 3 or not all(_is_number(f) and f > 0 for f in fr)
                    or sum(fr) > 1 + _TOL):
                raise ConfigError("data.fractions", f"is {fr!r}; expected three positive fractions summing to ≤ 1",
                                  "write e.g. data.fractions=[0.6,0.2,0.2].")

    if data_only:
        return

    # -- models: the main one and those fitted to compare with it ------------------------
    specs = {"fit": "fit"}
    compare = _get(cfg, "compare")
    if compare not in (_ABSENT, None):
        if not OmegaConf.is_dict(compare):
            raise ConfigError("compare", f"is {_plain(compare)!r}; expected a mapping name → model",
                              "choose a compare preset, e.g. compare=none.")
        for name in compare:
            specs[str(name)] = f"compare.{name}.fit"
            _choice(cfg, f"compare.{name}.form", ("continuous", "discrete"))
    for prefix in specs.values():
        if _get(cfg, prefix) not in (_ABSENT, None):
            _check_fit(cfg, prefix, warm_up, dt, duration)

    # -- assessment --------------------------------------------------------------------
    _flag(cfg, "assess.enabled")
    if _get(cfg, "assess.enabled") is not False and _get(cfg, "assess") is not _ABSENT:
        _number(cfg, "assess.gamma", gt=0, example=0.5)
        horizon = _number(cfg, "assess.horizon", gt=0, example=4.0)
        _number(cfg, "assess.n_starts", ge=1, integer=True, example=20)
        _number(cfg, "assess.free_run_length", gt=0, example=200.0)
        _number(cfg, "assess.n_bins", ge=2, integer=True, example=50)
        lag = _number(cfg, "assess.acf_max_lag", gt=0, example=1.0)
        _number(cfg, "assess.oracle_noise", ge=0, optional=True)
        if dt is not None and _is_number(horizon) and horizon < dt:
            raise ConfigError("assess.horizon", f"is {horizon:g}, shorter than one sample interval "
                              f"(data.dt={dt:g})", "make the horizon at least a few sample intervals.")
        if test_duration is not None and warm_up is not None and _is_number(horizon) \
                and warm_up + horizon > test_duration + _TOL:
            raise ConfigError("assess.horizon", f"is {horizon:g} time units; with warm_up={warm_up:g} each "
                              f"forecast needs {warm_up + horizon:g}, but the test trajectories last "
                              f"{test_duration:g} (data.test_duration)",
                              "shorten assess.horizon or warm_up, or lengthen data.test_duration.")
        if test_duration is not None and _is_number(lag) and lag >= test_duration:
            raise ConfigError("assess.acf_max_lag", f"is {lag:g}, not shorter than the test trajectories "
                              f"({test_duration:g}, data.test_duration)", "choose a lag of a few time units.")

    # -- export --------------------------------------------------------------------------
    _flag(cfg, "export.enabled")
    _flag(cfg, "export.onnx")
    _number(cfg, "export.envelope_margin", ge=0)
    model = _get(cfg, "export.model")
    if model not in (_ABSENT, None):
        from .pipeline import main_model_name

        names = [main_model_name(cfg)] + [k for k in specs if k != "fit"]
        if model not in names:
            raise ConfigError("export.model", f"is {model!r}, which this run does not fit (models: {names})",
                              f"choose one of {names}, or null for the main model.")

    if build_fitters:
        _build_fitters(cfg, specs)


def _build_fitters(cfg: DictConfig, specs: dict) -> None:
    """Construct each model's fitter once so its own settings checks run before any work."""
    from .pipeline import _instantiate

    for prefix in specs.values():
        node = _get(cfg, prefix)
        if node in (_ABSENT, None) or not OmegaConf.is_dict(node) or "_target_" not in node:
            continue
        _instantiate(node, prefix)


# -- resume overrides -------------------------------------------------------------------

def resume_overrides(args: list[str], cfg: DictConfig) -> dict[str, Any]:
    """Parse ``key=value`` overrides for a resume; only settings that leave the fit unchanged.

    Returns:
        ``{key: value}`` with values parsed as YAML (``0.3`` → float, ``null`` → None).

    Raises:
        ConfigError: a malformed argument, an unknown key, or a key whose change
            would not match what was fitted.
    """
    import yaml

    from .rundir import _yaml_loader

    out: dict[str, Any] = {}
    for arg in args:
        key, sep, raw = arg.partition("=")
        key = key.strip().lstrip("+")
        if key in ("overwrite", "--overwrite"):
            raise ConfigError(arg, "is not a setting of `mnemode resume`: a resume continues the run in place "
                              "and never overwrites finished work", "drop it; `mnemode export RUN_DIR "
                              "--overwrite` replaces an existing export.")
        if not sep or not key:
            raise ConfigError(arg, "is not a key=value override", "write e.g. assess.gamma=0.3.")
        if not any(key == p.rstrip(".") or (p.endswith(".") and key.startswith(p)) for p in RESUME_SAFE):
            raise ConfigError(key, "changes what was fitted, so a resume cannot take it (the fitted models and "
                              "checkpoints were made under the stored value)",
                              f"a resume accepts only {', '.join(p + '*' if p.endswith('.') else p for p in RESUME_SAFE)}"
                              "; for other changes start a new run.")
        if _get(cfg, key) is _ABSENT:
            raise ConfigError(key, "is not a setting of this run", "check the spelling against the run's config.yaml.")
        try:
            out[key] = yaml.load(raw, Loader=_yaml_loader()) if raw.strip() else None
        except yaml.YAMLError:
            out[key] = raw
    return out


def apply_overrides(cfg: DictConfig, overrides: dict[str, Any]) -> DictConfig:
    """A copy of ``cfg`` with ``overrides`` set, checked as a whole."""
    new = OmegaConf.create(OmegaConf.to_container(cfg))
    for key, value in overrides.items():
        OmegaConf.update(new, key, value, merge=False)
    check_config(new)
    return new


# -- command-line overrides, before Hydra creates anything ----------------------------------

_FLAG_ONLY = {"overwrite": "`--overwrite` is a flag of `mnemode export` and `mnemode rollout`; a run never "
                           "overwrites another run"}


def precheck_overrides(command: str, args: list[str]) -> None:
    """Check a Hydra command's overrides and the resulting config before Hydra opens a run directory.

    Skipped (left to Hydra) when the arguments hold options (``-m``, ``--cfg``,
    ``--help``, ...), since those change what Hydra does with them.

    Raises:
        ConfigError: a misplaced flag, an override Hydra cannot apply, or a bad setting.
        CheckpointError: the run directory cannot be created or is a non-empty
            folder that is not a mnemode run.
    """
    import os
    from pathlib import Path

    for arg in args:
        key = arg.split("=", 1)[0].lstrip("+~").lstrip("-")
        if key in _FLAG_ONLY:
            raise ConfigError(arg, f"is not a setting of `mnemode {command}`: {_FLAG_ONLY[key]}",
                              "drop it, and give the run a new place with name=... or hydra.run.dir=....")
    if any(a.startswith("-") for a in args):
        return
    from .pipeline import compose_config

    overrides = [a for a in args if not a.startswith(("hydra.", "+hydra.", "hydra/"))]
    try:
        cfg = compose_config(overrides)
    except Exception as exc:  # Hydra's override and composition errors
        text = " ".join(str(exc).split())
        raise ConfigError("command line", f"the overrides {overrides} cannot be applied ({text[:300]})",
                          f"check the names against `mnemode {command} --cfg job`; a new key needs a leading "
                          "+ (e.g. +my_key=1).") from None
    check_config(cfg, data_only=command not in ("run", "fit"))
    if command not in ("run", "fit"):
        return
    run_dir = next((a.split("=", 1)[1] for a in args if a.startswith("hydra.run.dir=")), None)
    if run_dir is not None and "${" not in run_dir:
        from .rundir import RunDir

        RunDir(run_dir).check_claimable()
        target = Path(run_dir)
    else:
        target = Path(str(cfg.get("runs_root", "mnemode-runs")))
    anchor = target.absolute()
    while not anchor.exists() and anchor != anchor.parent:
        anchor = anchor.parent
    if not anchor.is_dir() or not os.access(anchor, os.W_OK | os.X_OK):
        from .errors import CheckpointError

        raise CheckpointError(str(target), f"cannot be created: {anchor} is "
                              f"{'not a folder' if not anchor.is_dir() else 'not writable'}",
                              "choose a writable place with hydra.run.dir=... or MNEMODE_RUNS=....")


# -- the physics against the data, before any fitting -----------------------------------------

_SCALE_LIMIT = 1e4  # |f0(x)| this many times the data's own rate of change: units or scaling disagree
_PROBE_SAMPLES = 512


def check_physics_on_data(system, train) -> None:
    """Evaluate the nominal physics at the training states before any fitting.

    Three things are caught here rather than deep inside a fit: a field that
    fails or returns another shape than ``x`` (a user's physics module), one
    that is not finite at the data's states, and data whose scale disagrees
    with the physics -- ``rms f0(x)`` more than 10⁴ times the data's own
    ``rms Δx/Δt`` (data in other units, e.g. scaled by 10⁶), which no learning
    rate can fix.

    Raises:
        ConfigError: the physics module fails or returns the wrong shape.
        DataError: non-finite physics, or a scale mismatch, at the data's states.
    """
    import numpy as np
    import torch

    from .errors import DataError

    nominal = getattr(system, "nominal", None)
    if nominal is None:
        return
    states = np.asarray(train.states, dtype=np.float64)            # (T, B, D)
    T, B, D = states.shape
    flat = states.reshape(T * B, D)
    forcing = None
    if getattr(train, "forcing", None) is not None:
        forcing = np.asarray(train.forcing, dtype=np.float64).reshape(T * B, -1)
    finite = np.isfinite(flat).all(axis=1) & (np.isfinite(forcing).all(axis=1) if forcing is not None else True)
    rows = np.flatnonzero(finite)  # gaps (if any) are the data check's business, not the physics'
    if rows.size == 0:
        return
    idx = rows[np.linspace(0, rows.size - 1, min(rows.size, _PROBE_SAMPLES)).astype(int)]
    x = torch.as_tensor(flat[idx])
    u = None if forcing is None else torch.as_tensor(forcing[idx])
    name = f"{type(nominal).__module__}.{type(nominal).__name__}"
    try:
        dtype = next(iter(nominal.buffers()), next(iter(nominal.parameters()), None))
        x = x.to(dtype.dtype) if dtype is not None and dtype.is_floating_point else x
        if u is not None:
            u = u.to(x.dtype)
        with torch.no_grad():
            out = nominal(torch.zeros((), dtype=x.dtype), x, u) if u is not None else nominal(
                torch.zeros((), dtype=x.dtype), x)
    except Exception as exc:
        raise ConfigError(f"system.nominal ({name})", f"fails on the data's states of shape {tuple(x.shape)} "
                          f"({type(exc).__name__}: {str(exc).splitlines()[0][:200] if str(exc) else ''})",
                          "make forward(t, x[, u]) accept a batch of states (..., dim) and return dx/dt "
                          "of the same shape.") from None
    if not isinstance(out, torch.Tensor) or tuple(out.shape) != tuple(x.shape):
        got = tuple(out.shape) if isinstance(out, torch.Tensor) else type(out).__name__
        raise ConfigError(f"system.nominal ({name})", f"returned {got} for states of shape {tuple(x.shape)}; "
                          "expected dx/dt with the shape of x",
                          "return a tensor shaped like x, e.g. torch.stack([dX, dY, dZ], dim=-1).")
    f0 = out.detach().double().numpy()
    where = "data vs system.nominal"
    if not np.isfinite(f0).all():
        raise DataError(where, f"the physics {name} gives non-finite dx/dt at the data's states (largest |x| "
                        f"is {float(np.abs(flat[rows]).max()):.3g})",
                        "check that the data's units and scaling are those the physics expects.")
    dt = float(getattr(train, "dt", 0.0) or 0.0)
    if T < 2 or dt <= 0:
        return
    rate = np.diff(states, axis=0) / dt
    rate_rms = float(np.sqrt(np.mean(rate[np.isfinite(rate)] ** 2))) if np.isfinite(rate).any() else 0.0
    f0_rms = float(np.sqrt(np.mean(f0 ** 2)))
    if rate_rms > 0 and f0_rms > _SCALE_LIMIT * rate_rms:
        raise DataError(where, f"the physics {name} predicts dx/dt of typical size {f0_rms:.3g} at the data's "
                        f"states, but the data change at {rate_rms:.3g} per time unit, a factor {f0_rms / rate_rms:.2g} "
                        "apart: the data's units or scaling do not match the physics, and no learning rate fixes that",
                        "convert the data to the physics' units (or rescale the physics), and check data.dt's "
                        "time unit.")
