"""Ways to fit a closure: regression on targets, trajectory fitting, ridge readouts."""

from .context import FitContext

__all__ = ["FitContext"]

from .regression import DerivativeRegression, FlowMapRegression, set_scaling
from .targets import derivative_targets, flow_map_targets

__all__ += ["DerivativeRegression", "FlowMapRegression", "set_scaling", "derivative_targets", "flow_map_targets"]

from .checkpoint import checkpoint_step
from .memory_diagnostic import memory_need
from .readout import ReadoutRidge
from .trajectory import TrajectoryFit

__all__ += ["TrajectoryFit", "ReadoutRidge", "checkpoint_step", "memory_need"]
