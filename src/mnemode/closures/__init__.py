"""Learnable corrections, one module per family (see :mod:`mnemode.closures.base`)."""

from .base import Closure, Scaling

__all__ = ["Closure", "Scaling"]
