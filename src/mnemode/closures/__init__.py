"""Learnable corrections, one module per family (see :mod:`mnemode.closures.base`)."""

from .base import Closure, DiscreteRecurrent, LinearReadout, Memory, Recurrent, RegressionFittable, Scaling

__all__ = ["Closure", "Scaling", "RegressionFittable", "LinearReadout", "Memory", "Recurrent", "DiscreteRecurrent"]

from .gaussian_process import GaussianProcessClosure
from .mlp import MLPClosure
from .polynomial import PolynomialClosure
from .random_features import RandomFeatureClosure
from .ring import RingLocalClosure

__all__ += ["GaussianProcessClosure", "MLPClosure", "PolynomialClosure", "RandomFeatureClosure", "RingLocalClosure"]

from .discrete import GRUFlowClosure
from .recurrent import RecurrentClosure
from .reservoir import ReservoirClosure, ReservoirFlowClosure

__all__ += ["RecurrentClosure", "ReservoirClosure", "ReservoirFlowClosure", "GRUFlowClosure"]
