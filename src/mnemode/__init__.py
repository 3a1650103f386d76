"""mnemode: learn what a physics model is missing.

Public entry points are listed in ``__all__``; everything else is internal.
They load on first use (PEP 562 module ``__getattr__``), so ``import mnemode``
and the ``mnemode --help`` path stay free of torch until a name that needs it
is touched; ``from mnemode import simulate`` works as before.
"""

from __future__ import annotations

import importlib

from .version import __version__

# public name -> submodule that defines it (loaded on first access); grouped by stage
_LAZY = {
    # data
    "TrajectorySet": "data", "generate": "data", "load_trajectories": "data",
    "finite_difference": "data", "Normalisation": "data",
    # systems
    "System": "systems", "custom_system": "systems", "lorenz63": "systems", "lorenz96": "systems",
    "lorenz96_two_scale": "systems", "thermosyphon": "systems",
    # solvers
    "Euler": "solvers", "RK4": "solvers", "Adaptive": "solvers", "FlowMap": "solvers",
    # closures and their declared capabilities
    "Closure": "closures", "RegressionFittable": "closures", "LinearReadout": "closures", "Memory": "closures",
    "Recurrent": "closures", "DiscreteRecurrent": "closures",
    "RandomFeatureClosure": "closures", "MLPClosure": "closures", "GaussianProcessClosure": "closures",
    "PolynomialClosure": "closures",
    "RingLocalClosure": "closures", "RecurrentClosure": "closures", "ReservoirClosure": "closures",
    "ReservoirFlowClosure": "closures", "GRUFlowClosure": "closures",
    # hybrid models
    "HybridField": "hybrid", "HybridFlowMap": "hybrid", "Forcing": "hybrid", "simulate": "hybrid",
    "warm_up": "hybrid",
    # fitters
    "FitContext": "fitting", "Fitter": "fitting", "DerivativeFit": "fitting", "FlowMapFit": "fitting",
    "ReadoutRidgeFit": "fitting", "TrajectoryFit": "fitting",
    # assessment, export, the exported simulator
    "AssessSettings": "assess", "assess_models": "assess",
    "export_simulator": "export", "load_simulator": "simulator", "Simulator": "simulator",
    # the whole job
    "compose_config": "pipeline", "run_pipeline": "pipeline", "load_run_model": "pipeline",
    "RunDir": "rundir",
    # errors
    "MnemodeError": "errors", "ConfigError": "errors", "DataError": "errors", "CheckpointError": "errors",
    "FitDiverged": "errors",
}

__all__ = [*_LAZY, "__version__"]


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
