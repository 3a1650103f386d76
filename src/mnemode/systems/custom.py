"""Bring your own physics: wrap a user's nominal vector field as a :class:`System`.

In a config::

    system:
      _target_: mnemode.systems.custom_system
      nominal: {_target_: my_package.MyLoopModel, some_parameter: 1.5}
      state_names: [X, Y, Z]
      state_units: [m/s, K, K]
      time_unit: s                # null: 'time unit of the data'

The nominal field must be an ``nn.Module`` called as ``f(t, x)`` or ``f(t, x, u)``
(with forcing inputs ``u``) returning ``dx/dt`` with the shape of ``x``. Such a
system has no truth generator: its data come from the user's file.

``t`` is the true time of the data (the file's ``time`` column: each trajectory's
own start time plus the time since), and it arrives in one of two forms: a float
(or 0-d tensor) when every state in the batch shares one time, or a ``(B, 1)``
tensor holding each trajectory's own time, which broadcasts against ``x`` of shape
``(B, dim)``. A field that depends on ``t`` (a daily cycle) is written with torch
operations that accept both, e.g.::

    def forward(self, t, x):
        heating = self.amplitude * torch.sin(self.omega * torch.as_tensor(t, dtype=x.dtype))  # () or (B, 1)
        return torch.cat((-x[..., :1] + heating, x[..., :1] - x[..., 1:]), dim=-1)

(slice components as ``x[..., i:i+1]`` next to ``t``: ``x[..., i]`` is ``(B,)`` and
would broadcast against ``(B, 1)`` into ``(B, B)``). Continuous models see true
time everywhere (targets, fitting windows, forecasts). Discrete models
(``model=discrete``) are autonomous: their Ψ0 integrates ``f0`` over each Δt from
``t = 0``, so use the continuous form for time-dependent physics. An exported
simulator's physics sees the rollout's clock ``t0 + k·Δt`` when forced (see
docs/exported-simulator.md).

The config builds the nominal field here (``_recursive_: false``), so that a
module that does not import is reported with how to put it on the Python path.
"""

from __future__ import annotations

import importlib
import inspect
import os
from typing import Any, Sequence

import torch
from torch import nn

from ..errors import ConfigError
from .base import System

__all__ = ["custom_system"]


def _build_nominal(spec: Any) -> nn.Module:
    """Instantiate a ``{_target_: module.Class, ...}`` node, naming the fix when the module does not import."""
    from hydra.utils import instantiate
    from omegaconf import DictConfig, OmegaConf

    node = OmegaConf.create(spec) if isinstance(spec, dict) else spec
    if not isinstance(node, DictConfig) or "_target_" not in node:
        return spec
    target = str(node._target_)
    module_name, _, attr = target.rpartition(".")
    if not module_name:
        raise ConfigError("system.nominal._target_", f"is {target!r}, not a dotted path module.Class",
                          "write it as my_module.MyModel.")
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        top = module_name.split(".")[0]
        raise ConfigError("system.nominal._target_",
                          f"{target!r}: the module {module_name!r} cannot be imported ({exc}); mnemode looks for it "
                          f"on PYTHONPATH and among installed packages (running in {os.getcwd()})",
                          f"put the folder that holds {top}.py (or the {top}/ package) on the path, e.g. "
                          f"`PYTHONPATH=/path/to/that/folder mnemode run ...`, or install it with "
                          f"`pip install -e /path/to/your/project`.") from None
    if not hasattr(module, attr):
        raise ConfigError("system.nominal._target_", f"{target!r}: module {module_name!r} "
                          f"({getattr(module, '__file__', '?')}) has no {attr!r}",
                          "check the class name (spelling, capitals).")
    return instantiate(node)


def custom_system(nominal: nn.Module, state_names: Sequence[str], state_units: Sequence[str] | None = None,
                  time_unit: str | None = None, lyapunov_exponent: float | None = None, name: str = "custom",
                  ring: bool = False) -> System:
    """A :class:`System` from a user's nominal field and the names of the observed components.

    Args:
        nominal: the field, or its config node ``{_target_: module.Class, ...}``.
        time_unit: the unit of the data's time column; ``None`` says "time unit of the data".

    Raises:
        ConfigError: the field's module does not import (the message says how to
            put it on the path), or it is not an ``nn.Module``.
    """
    nominal = _build_nominal(nominal)
    if not isinstance(nominal, nn.Module):
        raise ConfigError("system.nominal", f"is a {type(nominal).__name__}, expected an nn.Module vector field",
                          "point system.nominal._target_ at an nn.Module class whose forward(t, x[, u]) "
                          "returns dx/dt.")
    names = tuple(str(s) for s in state_names)
    if not names:
        raise ConfigError("system.state_names", "is empty; expected the names of the observed components",
                          "list them in the order of your data's state columns, e.g. state_names=[X,Y,Z].")
    _check_output_shape(nominal, len(names))
    if not hasattr(nominal, "dim"):
        nominal.dim = len(names)
    return System(name=name, state_names=names,
                  state_units=tuple(state_units) if state_units else ("",) * len(names),
                  time_unit=time_unit or "time unit of the data", nominal=nominal, truth=None,
                  observed_index=tuple(range(len(names))), lyapunov_exponent=lyapunov_exponent,
                  ring=ring, description=f"user physics {type(nominal).__module__}.{type(nominal).__name__}")


def _check_output_shape(nominal: nn.Module, dim: int) -> None:
    """Call the field on a small batch of states and refuse an output of another shape.

    Called twice: with a scalar ``t`` and with ``t`` of shape ``(2, 1)`` (one time
    per state, as fitting and forecasts pass it); a field that works with the
    first but not the second is refused with how to handle the tensor ``t``.
    Skipped for fields that need forcing inputs ``u`` (their shape is checked on
    the data, with the forcing, before fitting). A field that fails on these
    probe states is left to that data check too: the states here are arbitrary.
    """
    try:
        params = inspect.signature(nominal.forward).parameters
    except (TypeError, ValueError):
        return
    u = params.get("u")
    if u is not None and u.default is inspect.Parameter.empty:
        return
    x = torch.linspace(0.1, 0.9, 2 * dim, dtype=torch.float64).reshape(2, dim)
    try:
        probe = next(iter(nominal.buffers()), next(iter(nominal.parameters()), None))
        if probe is not None and probe.is_floating_point():
            x = x.to(probe.dtype)
        with torch.no_grad():
            out = nominal(torch.zeros((), dtype=x.dtype), x)
    except Exception:  # judged on the data's own states later
        return
    name = f"{type(nominal).__module__}.{type(nominal).__name__}"
    if not isinstance(out, torch.Tensor) or tuple(out.shape) != (2, dim):
        got = tuple(out.shape) if isinstance(out, torch.Tensor) else type(out).__name__
        raise ConfigError(f"system.nominal ({name})", f"returned {got} for a batch of states of shape (2, {dim}) "
                          f"({dim} state_names); expected dx/dt with the shape of x",
                          "return a tensor shaped like x (..., dim), e.g. torch.stack([dX, dY, dZ], dim=-1), "
                          "and list one state name per component.")
    t = torch.tensor([[0.5], [1.5]], dtype=x.dtype)
    try:
        with torch.no_grad():
            out = nominal(t, x)
        problem = None if isinstance(out, torch.Tensor) and tuple(out.shape) == (2, dim) else \
            f"returned {tuple(out.shape) if isinstance(out, torch.Tensor) else type(out).__name__}"
    except Exception as exc:
        problem = f"failed ({type(exc).__name__}: {str(exc).strip().splitlines()[0][:160] if str(exc).strip() else ''})"
    if problem is not None:
        raise ConfigError(f"system.nominal ({name})", f"works with a scalar t but {problem} when t holds one time "
                          f"per state (shape (2, 1)) for states of shape (2, {dim}); trajectories that start at "
                          "different times reach the physics that way",
                          "use torch operations on t (torch.sin(t), torch.where(t > a, ...)) rather than math or "
                          "Python comparisons, and slice components as x[..., i:i+1] where they meet t, so that "
                          "t of shape (B, 1) broadcasts against x of shape (B, dim).")
