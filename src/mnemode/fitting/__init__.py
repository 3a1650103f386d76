"""Ways to fit a closure: regression on targets, trajectory fitting, ridge readouts."""

from .base import Fitter
from .context import FitContext

__all__ = ["Fitter", "FitContext"]

from .regression import DerivativeFit, FlowMapFit, set_scaling
from .targets import derivative_targets, flow_map_targets

__all__ += ["DerivativeFit", "FlowMapFit", "set_scaling", "derivative_targets", "flow_map_targets"]

from .checkpoint import checkpoint_step
from .memory_diagnostic import memory_need
from .readout import ReadoutRidgeFit
from .trajectory import TrajectoryFit

__all__ += ["TrajectoryFit", "ReadoutRidgeFit", "checkpoint_step", "memory_need"]
