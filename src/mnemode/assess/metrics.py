"""Forecast skill: validity time, its summary over many forecasts, normalised error curves.

The normalised forecast error at time ``t_n`` is ``e_n = ‖x̂_n − x_n‖ / s`` with
``s = sqrt(mean ‖x − x̄‖²)`` the RMS size of the truth about its mean; the
validity time is the first ``t_n`` with ``e_n > γ``. Long-run statistics
(invariant measure, autocorrelation) live in :mod:`mnemode.assess.statistics`.
"""

from __future__ import annotations

import numpy as np

__all__ = ["validity_times", "rms_scale", "normalised_error", "summarise_validity"]


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


def rms_scale(states) -> float:
    """RMS size of states about their mean, ``sqrt(mean ‖x − x̄‖²)`` over all samples of ``(..., D)``."""
    flat = np.asarray(states, dtype=np.float64).reshape(-1, np.shape(states)[-1])
    return float(np.sqrt(((flat - flat.mean(0)) ** 2).sum(-1).mean()))


def normalised_error(forecast, truth, scale: float) -> np.ndarray:
    """``‖x̂_n − x_n‖ / scale`` for ``(T, N, D)`` arrays → ``(T, N)``; non-finite forecasts give ``inf``."""
    f = np.asarray(forecast, dtype=np.float64)
    x = np.asarray(truth, dtype=np.float64)
    with np.errstate(invalid="ignore", over="ignore"):
        err = np.linalg.norm(f - x, axis=-1) / scale
    return np.where(np.isfinite(err), err, np.inf)


def summarise_validity(times, censored, lyapunov_exponent: float | None = None) -> dict:
    """Median and quartiles of validity times, the censored share, and the same in Lyapunov times.

    Quartiles use numpy's default (linear interpolation between order
    statistics). Censored forecasts enter at the horizon, so a median with
    more than half censored is a lower bound. Lyapunov times are ``t·λ``.

    Returns plain floats: ``validity_time_median``, ``validity_time_q25``,
    ``validity_time_q75``, ``validity_time_{median,q25,q75}_lyapunov`` (``None``
    without ``λ``), ``censored_fraction``, ``censored_count``, ``n_forecasts``.
    """
    t = np.asarray(times, dtype=np.float64)
    c = np.asarray(censored, dtype=bool)
    q25, med, q75 = (float(v) for v in np.percentile(t, [25, 50, 75]))
    lam = lyapunov_exponent
    out = {
        "validity_time_median": med, "validity_time_q25": q25, "validity_time_q75": q75,
        "validity_time_median_lyapunov": None if lam is None else med * lam,
        "validity_time_q25_lyapunov": None if lam is None else q25 * lam,
        "validity_time_q75_lyapunov": None if lam is None else q75 * lam,
        "censored_fraction": float(c.mean()) if c.size else 0.0,
        "censored_count": int(c.sum()),
        "n_forecasts": int(t.size),
    }
    return out
