"""What a fitter is: the contract every way of fitting a closure honours."""

from __future__ import annotations

from abc import ABC, abstractmethod

__all__ = ["Fitter"]


class Fitter(ABC):
    """A configured way of fitting a hybrid model's closure.

    A fitter is built from its config (hyper-parameters only) and then called once per
    model with :meth:`fit`. It sets the closure's scaling from the training data, learns
    the closure's parameters in place, and returns plain diagnostics. A fitter that
    cannot fit the given model form (say, a regression fit of a closure with memory)
    raises :class:`~mnemode.errors.ConfigError` naming the fix.
    """

    @abstractmethod
    def fit(self, model, train, val, ctx) -> dict:
        """Fit ``model``'s closure on ``train`` (``val`` for model selection, may be ``None``).

        Args:
            model: a :class:`~mnemode.hybrid.HybridField` or :class:`~mnemode.hybrid.HybridFlowMap`.
            train, val: :class:`~mnemode.data.TrajectorySet` s.
            ctx: the run's :class:`~mnemode.fitting.FitContext`.

        Returns:
            Plain diagnostics (floats, ints, strings): at least ``train_error``,
            ``val_error`` and ``fit_seconds``.
        """
