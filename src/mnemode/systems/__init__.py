"""Nominal physics and truth generators, one module per system."""

from .base import System, VectorField
from .custom import custom_system
from .lorenz63 import Lorenz63Field, lorenz63
from .lorenz96 import Lorenz96Field, Lorenz96TwoScaleField, lorenz96, lorenz96_two_scale
from .thermosyphon import HeatStoringWallLoopField, IdealWallLoopField, thermosyphon

__all__ = [
    "System", "VectorField", "custom_system",
    "Lorenz63Field", "lorenz63",
    "Lorenz96Field", "Lorenz96TwoScaleField", "lorenz96", "lorenz96_two_scale",
    "IdealWallLoopField", "HeatStoringWallLoopField", "thermosyphon",
]
