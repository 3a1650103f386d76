"""Argument checks of an export, gathered into one :class:`ExportRequest`."""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping

import torch

from ..errors import ConfigError
from ..hybrid import HybridField, HybridFlowMap
from ..simulator import MANIFEST_FILE
from ..solvers import RK4, Adaptive, Euler
from .programs import program_kind

__all__ = ["ExportRequest", "check_request", "DEFAULT_ENVELOPE_MARGIN", "TOLERANCE"]

# Widening of the training range, as a fraction of each component's range, before the
# loader warns (common practice: a tenth of the range of a trained input).
DEFAULT_ENVELOPE_MARGIN = 0.1

# float64 parity requirement; float32 runs through the same kernels, so its figure is
# recorded, not required, unless float32 is the export dtype.
TOLERANCE = {torch.float64: 1e-6, torch.float32: 1e-3}

RESERVED = ("format", "format_version", "created_utc", "state", "time", "forcing", "hidden_init", "programs",
            "model", "normalisation", "envelope", "metrics", "config", "versions", "dtype", "files", "parity",
            "onnx", "cautions")


@dataclass
class ExportRequest:
    """What to export, checked: names, units, envelopes, sizes and settings."""

    out: Path
    dt: float
    names: list[str]
    units: list[str]
    envelope: dict[str, list[float]]
    forcing_names: list[str]
    forcing_units: list[str]
    forcing_envelope: dict[str, list[float]] | None
    warm_up_steps: int
    margin: float
    dtype: torch.dtype
    parity_steps: int
    parity_batch: int
    extra: dict
    onnx: bool
    overwrite: bool
    kind: str = "autonomous"
    parity_t0: float = 0.0

    @property
    def forced(self) -> bool:
        return bool(self.forcing_names)

    @property
    def reads_t(self) -> bool:
        """Whether the step program takes ``t`` (timed and forced programs)."""
        return self.kind != "autonomous"


def _check_model(model, solver, dt, forced: bool) -> None:
    if not isinstance(model, (HybridField, HybridFlowMap)):
        raise ConfigError("model", f"is a {type(model).__name__}; expected a HybridField or HybridFlowMap",
                          "wrap the physics and closure in mnemode.hybrid.HybridField (continuous) or "
                          "HybridFlowMap (discrete).")
    if not (isinstance(dt, (int, float)) and math.isfinite(dt) and dt > 0):
        raise ConfigError("dt", f"is {dt!r}; expected a positive observation interval",
                          "pass the sampling interval of the training data.")
    if isinstance(model, HybridField):
        if solver is None:
            raise ConfigError("solver", "is None; a continuous model needs a solver for its one-step map",
                              "pass the solver the model was fitted with, e.g. RK4(0.01).")
        if not isinstance(solver, (Euler, RK4, Adaptive)):
            raise ConfigError("solver", f"is a {type(solver).__name__}; expected Euler, RK4 or Adaptive",
                              "pass a mnemode.solvers solver.")
    else:
        if forced:
            raise ConfigError("forcing_names", "were given but a discrete (flow-map) model takes no forcing inputs",
                              "export a continuous model for forced data, or drop forcing_names.")
        if abs(model.dt - dt) > 1e-12 * max(1.0, dt):
            raise ConfigError("dt", f"is {dt} but the discrete model steps by {model.dt}",
                              "pass the model's own interval (a flow map cannot change its step).")


def _ranges(envelope, names: list[str], what: str) -> dict[str, list[float]]:
    if not isinstance(envelope, Mapping) or set(envelope) != set(names):
        got = sorted(envelope) if isinstance(envelope, Mapping) else type(envelope).__name__
        raise ConfigError(what, f"has components {got}; expected exactly {names}",
                          "pass {name: [min, max]} over the training data (TrajectorySet.envelope()).")
    env = {}
    for n in names:
        try:
            lo, hi = (float(v) for v in envelope[n])
        except (TypeError, ValueError):
            raise ConfigError(f"{what}[{n!r}]", f"is {envelope[n]!r}; expected [min, max]",
                              "give two numbers.") from None
        if not (math.isfinite(lo) and math.isfinite(hi) and lo <= hi):
            raise ConfigError(f"{what}[{n!r}]", f"is [{lo}, {hi}]; expected finite min ≤ max",
                              "compute it from finite training data.")
        env[n] = [lo, hi]
    return env


def _names(values, n: int, what: str, distinct: bool = True) -> list[str]:
    names = [str(v) for v in values]
    if len(names) != n or (distinct and len(set(names)) != len(names)):
        raise ConfigError(what, f"are {names}; expected {n} {'distinct ' if distinct else ''}entries",
                          f"give one per component ({n}; an empty string for a unit where there is none).")
    return names


def check_request(model, solver, out_dir, *, dt, state_names, state_units, envelope, forcing_names,
                  forcing_units, forcing_envelope, warm_up_steps, envelope_margin, dtype, parity_steps,
                  parity_batch, extra_manifest, onnx, overwrite, parity_t0=0.0) -> ExportRequest:
    """Check every argument of :func:`export_simulator` before any work; raise :class:`ConfigError`."""
    fnames = [str(n) for n in (forcing_names or [])]
    _check_model(model, solver, dt, bool(fnames))
    names = _names(state_names, model.dim, "state_names")
    units = _names(state_units or [""] * len(names), len(names), "state_units", distinct=False)
    env = _ranges(envelope, names, "envelope")
    if len(set(fnames)) != len(fnames) or set(fnames) & set(names):
        raise ConfigError("forcing_names", f"are {fnames}; expected distinct names, none a state name",
                          "name each forcing input once.")
    funits = _names(forcing_units or [""] * len(fnames), len(fnames), "forcing_units", distinct=False)
    fenv = _ranges(forcing_envelope, fnames, "forcing_envelope") if fnames else None
    if dtype not in TOLERANCE:
        raise ConfigError("dtype", f"is {dtype}; expected torch.float64 or torch.float32", "pass one of them.")
    try:
        w = int(warm_up_steps)
    except (TypeError, ValueError):
        w = -1
    if w < 0 or w != warm_up_steps:
        raise ConfigError("warm_up_steps", f"is {warm_up_steps!r}; expected an integer ≥ 0",
                          "pass round(warm_up_time / dt).")
    if int(parity_steps) < 1 or int(parity_batch) < 2:
        raise ConfigError("parity_steps/parity_batch", f"are {parity_steps}/{parity_batch}; expected ≥ 1 and ≥ 2",
                          "check batch 1 and a batch of at least 2 over at least one step.")
    extra = dict(extra_manifest or {})
    clash = set(extra) & set(RESERVED)
    if clash:
        raise ConfigError("extra_manifest", f"would replace the reserved key(s) {sorted(clash)}",
                          "use other key names.")
    margin = extra.pop("envelope_margin", None) if envelope_margin is None else envelope_margin
    margin = DEFAULT_ENVELOPE_MARGIN if margin is None else float(margin)
    if not (math.isfinite(margin) and margin >= 0):
        raise ConfigError("envelope_margin", f"is {margin}; expected ≥ 0", "use e.g. 0.1 (a tenth of each range).")
    try:
        t0 = float(parity_t0)
    except (TypeError, ValueError):
        t0 = math.nan
    if not math.isfinite(t0):
        raise ConfigError("parity_t0", f"is {parity_t0!r}; expected a finite time",
                          "pass the true time the parity runs should start at (e.g. the data's first time).")
    out = Path(out_dir)
    if (out / MANIFEST_FILE).exists() and not overwrite:
        raise ConfigError(str(out), "already holds an exported simulator",
                          "choose another directory, or pass overwrite=True to replace it.")
    return ExportRequest(out, float(dt), names, units, env, fnames, funits, fenv, w, margin, dtype,
                         int(parity_steps), int(parity_batch), extra, bool(onnx), bool(overwrite),
                         program_kind(model, bool(fnames)), t0)
