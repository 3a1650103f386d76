"""mnemode: learn what a physics model is missing.

Public entry points are listed in ``__all__``; everything else is internal.
They load on first use (PEP 562 module ``__getattr__``), so ``import mnemode``
and the ``mnemode --help`` path stay free of torch until a name that needs it
is touched; ``from mnemode import simulate`` works as before.
"""

from __future__ import annotations

import importlib

from .version import __version__

__all__ = [
    "TrajectorySet", "generate", "load_trajectories", "finite_difference", "Normalisation",
    "Euler", "RK4", "Adaptive", "FlowMap",
    "HybridField", "HybridFlowMap", "simulate", "warm_up",
    "MnemodeError", "__version__",
]

# public name -> submodule that defines it (loaded on first access)
_LAZY = {
    "TrajectorySet": "data", "generate": "data", "load_trajectories": "data",
    "finite_difference": "data", "Normalisation": "data",
    "Euler": "solvers", "RK4": "solvers", "Adaptive": "solvers", "FlowMap": "solvers",
    "HybridField": "hybrid", "HybridFlowMap": "hybrid", "simulate": "hybrid", "warm_up": "hybrid",
    "MnemodeError": "errors",
}


def __getattr__(name: str):
    """Load a public name from its submodule on first access, then cache it here."""
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'mnemode' has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
