"""Bring your own physics: wrap a user's nominal vector field as a :class:`System`.

In a config::

    system:
      _target_: mnemode.systems.custom_system
      nominal: {_target_: my_package.MyLoopModel, some_parameter: 1.5}
      state_names: [X, Y, Z]
      state_units: [m/s, K, K]
      time_unit: s

The nominal field must be an ``nn.Module`` called as ``f(t, x)`` or ``f(t, x, u)``
(with forcing inputs ``u``) returning ``dx/dt`` with the shape of ``x``. Such a
system has no truth generator: its data come from the user's file.
"""

from __future__ import annotations

from typing import Sequence

from torch import nn

from ..errors import ConfigError
from .base import System

__all__ = ["custom_system"]


def custom_system(nominal: nn.Module, state_names: Sequence[str], state_units: Sequence[str] | None = None,
                  time_unit: str = "s", lyapunov_exponent: float | None = None, name: str = "custom",
                  ring: bool = False) -> System:
    """A :class:`System` from a user's nominal field and the names of the observed components."""
    if not isinstance(nominal, nn.Module):
        raise ConfigError("system.nominal", f"is a {type(nominal).__name__}, expected an nn.Module vector field",
                          "point system.nominal._target_ at an nn.Module class whose forward(t, x[, u]) "
                          "returns dx/dt.")
    names = tuple(str(s) for s in state_names)
    if not hasattr(nominal, "dim"):
        nominal.dim = len(names)
    return System(name=name, state_names=names,
                  state_units=tuple(state_units) if state_units else ("",) * len(names),
                  time_unit=time_unit, nominal=nominal, truth=None,
                  observed_index=tuple(range(len(names))), lyapunov_exponent=lyapunov_exponent,
                  ring=ring, description=f"user physics {type(nominal).__module__}.{type(nominal).__name__}")
