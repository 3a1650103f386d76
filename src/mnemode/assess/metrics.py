"""Skill and statistics metrics: forecast validity time (more to come in this module)."""

from __future__ import annotations

import numpy as np

__all__ = ["validity_times"]


def validity_times(forecast, truth, dt: float, gamma: float = 0.5, scale: float | None = None):
    """Time until each forecast's normalised error first exceeds ``gamma``.

    The error at step ``n`` is ``‖x̂_n − x_n‖ / scale`` where ``scale`` is the RMS
    size of the truth about its mean, ``sqrt(mean ‖x − x̄‖²)`` over all samples of
    ``truth`` unless given. The validity time is ``dt`` times the index of the first
    sample whose error exceeds ``gamma``; a forecast that never exceeds it is
    censored at the horizon ``dt·(T − 1)``.

    Args:
        forecast, truth: ``(T, N, D)`` arrays (``N`` forecasts).
        dt: sampling interval.
        gamma: error threshold (0.5 by default).
        scale: normalising size; computed from ``truth`` when ``None``.

    Returns:
        ``(times, censored)``: ``(N,)`` validity times and a boolean mask of the
        forecasts censored at the horizon.
    """
    f = np.asarray(forecast, dtype=np.float64)
    x = np.asarray(truth, dtype=np.float64)
    if f.shape != x.shape or f.ndim != 3:
        raise ValueError(f"forecast {f.shape} and truth {x.shape} must both be (T, N, D)")
    if scale is None:
        flat = x.reshape(-1, x.shape[-1])
        scale = float(np.sqrt(((flat - flat.mean(0)) ** 2).sum(-1).mean()))
    err = np.linalg.norm(f - x, axis=-1) / scale
    err = np.where(np.isfinite(err), err, np.inf)
    exceeded = err > gamma
    censored = ~exceeded.any(axis=0)
    first = np.where(censored, x.shape[0] - 1, exceeded.argmax(axis=0))
    return first * dt, censored
