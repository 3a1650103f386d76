"""mnemode: learn what a physics model is missing.

Public entry points are listed in ``__all__``; everything else is internal.
"""

from .data import Normalisation, TrajectorySet, finite_difference, generate, load_trajectories
from .errors import MnemodeError
from .hybrid import HybridField, HybridFlowMap, simulate, warm_up
from .solvers import RK4, Adaptive, Euler, FlowMap

from .version import __version__

__all__ = [
    "TrajectorySet", "generate", "load_trajectories", "finite_difference", "Normalisation",
    "Euler", "RK4", "Adaptive", "FlowMap",
    "HybridField", "HybridFlowMap", "simulate", "warm_up",
    "MnemodeError", "__version__",
]
