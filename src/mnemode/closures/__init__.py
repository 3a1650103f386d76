"""Learnable corrections, one module per family (see :mod:`mnemode.closures.base`)."""

from .base import Closure, Scaling

__all__ = ["Closure", "Scaling"]

from .gaussian_process import GaussianProcessClosure
from .mlp import MLPClosure
from .random_features import RandomFeatureClosure
from .ring import RingLocalClosure

__all__ += ["GaussianProcessClosure", "MLPClosure", "RandomFeatureClosure", "RingLocalClosure"]

from .discrete import GRUFlowClosure
from .recurrent import RecurrentClosure
from .reservoir import ReservoirClosure

__all__ += ["RecurrentClosure", "ReservoirClosure", "GRUFlowClosure"]
