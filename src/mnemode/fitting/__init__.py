"""Ways to fit a closure: regression on targets, trajectory fitting, ridge readouts."""

from .context import FitContext

__all__ = ["FitContext"]
