"""How an assessment is run: every setting, its range check, and how it is read from a run's config."""

from __future__ import annotations

import math
import typing
from collections.abc import Mapping
from dataclasses import dataclass, fields

from ..errors import ConfigError
from ..solvers import Solver

__all__ = ["AssessSettings"]

# Settings read from the top level of a run's config rather than its ``assess`` group:
# the warm-up is shared with fitting, the seed and progress bars with every stage.
_RUN_LEVEL = ("warm_up", "seed", "progress")
# Settings that are objects, not config values (the pipeline passes the run's solver).
_OBJECTS = ("solver",)
# Keys of the ``assess`` config group that are not settings of the assessment itself.
_GROUP_ONLY = ("enabled",)


@dataclass
class AssessSettings:
    """How the assessment is run. Times are in the data's time unit.

    Attributes:
        gamma: validity threshold on the normalised error ``‖x̂ − x‖ / RMS(x)``.
        warm_up: observed history driving each model's hidden state before a forecast.
        horizon: forecast length; forecasts still valid then are censored.
        n_starts: forecast starts spread along the test trajectories.
        free_run_length: length of each long free run used for invariant statistics
            (after the transient).
        free_run_starts: number of free runs (each from the end of a warm-up).
        transient: time discarded at the start of each free run.
        stability_length: total length of each free run examined for leaving the
            training envelope (the statistics runs are continued to this length
            when it is longer).
        envelope_margin: widening of each component's training range, as a fraction
            of it, before a free run counts as having left the envelope.
        n_bins: inner histogram bins per component for the invariant measure.
        acf_max_lag: largest autocorrelation lag.
        oracle_noise: oracle start perturbation relative to each component's std;
            ``None``: the data's noise level, or 1e-4 for clean data.
        seed: seeds the oracle perturbation, the floor run and the Lyapunov estimate.
        progress: show a progress bar.
        pseudo_count: added to every histogram bin before normalising.
        truth_step: RK4 step limit for truth runs (oracle, floor, Lyapunov estimate).
        lyapunov_duration: averaging time of the Lyapunov estimate when the system states none.
        solver: for continuous models given without one (and the added physics-only
            model); ``None``: the first solver among the entries, else ``RK4(min(dt, 0.01))``.
        batch_size: forecasts and free runs integrated together (all at once when ``None``).
        max_components: panels per figure for systems with many components.
    """

    gamma: float = 0.5
    warm_up: float = 5.0
    horizon: float = 25.0
    n_starts: int = 50
    free_run_length: float = 200.0
    free_run_starts: int = 8
    transient: float = 10.0
    stability_length: float = 1000.0
    envelope_margin: float = 0.1
    n_bins: int = 50
    acf_max_lag: float = 5.0
    oracle_noise: float | None = None
    seed: int = 0
    progress: bool = False
    pseudo_count: float = 0.5
    truth_step: float = 0.005
    lyapunov_duration: float = 100.0
    solver: Solver | None = None
    batch_size: int | None = None
    max_components: int = 4

    @classmethod
    def config_keys(cls) -> tuple[str, ...]:
        """Names settable in the ``assess`` config group."""
        return tuple(f.name for f in fields(cls) if f.name not in _RUN_LEVEL + _OBJECTS)

    @classmethod
    def from_config(cls, cfg: Mapping, solver: Solver | None = None) -> "AssessSettings":
        """Settings from a run's config: the ``assess`` group plus ``warm_up``, ``seed``, ``progress``.

        Missing keys keep their defaults; values are converted to each field's
        type, then range-checked (:meth:`check`).

        Raises:
            ConfigError: an unknown key in ``assess``, or a value of the wrong type or range.
        """
        group = cfg.get("assess") or {}
        values = {str(k): group[k] for k in group if str(k) not in _GROUP_ONLY}
        known = cls.config_keys()
        for key in values:
            if key not in known:
                raise ConfigError(f"assess.{key}", "is not an assessment setting",
                                  f"use one of: {', '.join(known)}.")
        for key in _RUN_LEVEL:
            if cfg.get(key) is not None:
                values[key] = cfg.get(key)
        hints = typing.get_type_hints(cls)
        kwargs = {k: _convert(k, v, hints[k]) for k, v in values.items()}
        settings = cls(**kwargs, solver=solver)
        settings.check()
        return settings

    def check(self) -> None:
        """Raise :class:`ConfigError` naming the first setting out of range."""
        positive = ("gamma", "horizon", "n_starts", "free_run_length", "free_run_starts", "n_bins",
                    "acf_max_lag", "truth_step", "lyapunov_duration", "max_components")
        for name in positive:
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v <= 0:
                raise ConfigError(_key(name), f"is {v!r}; it must be a positive number",
                                  f"set {_key(name)} to a value > 0.")
        for name in ("warm_up", "transient", "pseudo_count", "stability_length", "envelope_margin"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v < 0:
                raise ConfigError(_key(name), f"is {v!r}; it must be a number ≥ 0",
                                  f"set {_key(name)} to a value ≥ 0.")
        if self.oracle_noise is not None and not (math.isfinite(self.oracle_noise) and self.oracle_noise >= 0):
            raise ConfigError("assess.oracle_noise", f"is {self.oracle_noise!r}; it must be ≥ 0 or null",
                              "set it to e.g. 1e-4, or null for the data's noise level.")
        if self.batch_size is not None and self.batch_size < 1:
            raise ConfigError("assess.batch_size", f"is {self.batch_size!r}; it must be ≥ 1 or null",
                              "set it to a positive integer or null.")

    def to_dict(self) -> dict:
        """Plain-data copy (the solver as its ``repr``)."""
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        d["solver"] = None if self.solver is None else repr(self.solver)
        return d


def _key(name: str) -> str:
    """The config key a setting is read from."""
    return name if name in _RUN_LEVEL else f"assess.{name}"


def _convert(name: str, value, hint):
    """``value`` as the field's type (``int``, ``float``, ``bool``, optionally ``None``)."""
    args = typing.get_args(hint)
    optional = type(None) in args
    base = next((a for a in args if a is not type(None)), hint) if args else hint
    if value is None:
        if optional:
            return None
        raise ConfigError(_key(name), "is null", f"give {_key(name)} a value (default {_default(name)!r}).")
    try:
        if base is bool:
            if isinstance(value, str):
                if value.lower() not in ("true", "false"):
                    raise ValueError(value)
                return value.lower() == "true"
            return bool(value)
        if base is int:
            if isinstance(value, float) and not value.is_integer():
                raise ValueError(value)
            return int(value)
        if base is float:
            return float(value)
    except (TypeError, ValueError):
        raise ConfigError(_key(name), f"is {value!r}; expected a {base.__name__}",
                          f"set {_key(name)} to a {base.__name__} (default {_default(name)!r}).") from None
    return value


def _default(name: str):
    return next(f.default for f in fields(AssessSettings) if f.name == name)
