"""Forecast error and validity: how long a forecast stays close to the truth, and a score that keeps ranking.

Shared by fitting (choosing the best model on validation forecasts) and
assessment (scoring test forecasts). Arrays are ``(T, N, D)``: ``T`` samples
``dt`` apart (row 0 is the forecast's initial state unless a function says
otherwise), ``N`` forecasts, ``D`` components.

Normalised error at sample ``n`` of forecast ``b``::

    e_{n,b} = ‖x̂_{n,b} − x_{n,b}‖ / s,        s = sqrt(mean ‖x − x̄‖²)

``s`` is the RMS size of the truth about its mean. The **validity time** is the
first ``t_n`` with ``e_n > γ``; a forecast that never exceeds ``γ`` is *censored*
at the horizon. The **log-error skill** (:func:`log_error_skill`) averages the
log of the error clipped at ``γ`` and keeps ranking forecasts that are all still
valid at the horizon, where every validity time equals the horizon.
"""

from __future__ import annotations

import numpy as np

__all__ = ["validity_times", "rms_scale", "normalised_error", "log_error_skill", "DEFAULT_SKILL_FLOOR"]

DEFAULT_SKILL_FLOOR = 1e-6


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

    Raises:
        ValueError: arrays that are not both ``(T, N, D)`` of one shape.
    """
    err = _checked_errors(forecast, truth, scale)
    exceeded = err > gamma
    censored = ~exceeded.any(axis=0)
    first = np.where(censored, err.shape[0] - 1, exceeded.argmax(axis=0))
    return first * dt, censored


def log_error_skill(forecast, truth, gamma: float = 0.5, scale: float | None = None, *,
                    skip_first: bool = True, floor: float = DEFAULT_SKILL_FLOOR) -> float:
    """Mean log-distance of the forecast error below the validity threshold (higher is better).

    With ``e_{n,b}`` the normalised error of forecast ``b`` at sample ``n``::

        skill = − mean_{n, b} ln( clip(e_{n,b} / γ, floor, 1) )

    over the samples ``n = 1..T−1`` (``skip_first``: row 0 is the shared initial
    state, whose error is zero) or ``n = 0..T−1``, and all forecasts ``b``. A
    sample whose error is at or above ``γ`` (or non-finite: a blow-up) adds 0, so
    a forecast lost from its first sample scores 0; each sample adds at most
    ``ln(1/floor)`` (13.8 for the default ``floor = 1e-6``).

    Why it keeps ranking where the median validity time saturates: for an error
    growing as ``e(t) = γ·exp(λ(t − T_v))`` (validity time ``T_v``), the integral
    form of the score over a horizon ``H`` is ``λ·T_v²/(2H)`` while ``T_v ≤ H``
    and ``λ·(T_v − H/2)`` once ``T_v > H``: strictly increasing in ``T_v`` in
    both cases, including when every forecast is censored at the horizon (where
    all validity times read ``H``).

    Args:
        forecast, truth: ``(T, N, D)`` arrays.
        gamma: validity threshold on the normalised error.
        scale: normalising size; computed from ``truth`` when ``None``.
        skip_first: leave out row 0 (the forecasts' initial state).
        floor: smallest ratio ``e/γ`` counted (keeps exact hits finite).

    Returns:
        The score in nats (a Python float ≥ 0).

    Raises:
        ValueError: arrays that are not both ``(T, N, D)`` of one shape, or a
            window with no sample left to score.
    """
    err = _checked_errors(forecast, truth, scale)
    if skip_first:
        err = err[1:]
    if err.size == 0:
        raise ValueError("log_error_skill needs at least one sample after the initial state")
    ratio = np.clip(err / float(gamma), float(floor), 1.0)
    return float(-np.mean(np.log(ratio)))


def _checked_errors(forecast, truth, scale) -> np.ndarray:
    """``(T, N)`` normalised errors of ``(T, N, D)`` forecasts (``scale``: RMS of the truth if ``None``)."""
    f = np.asarray(forecast, dtype=np.float64)
    x = np.asarray(truth, dtype=np.float64)
    if f.shape != x.shape or f.ndim != 3:
        raise ValueError(f"forecast {f.shape} and truth {x.shape} must both be (T, N, D)")
    return normalised_error(f, x, rms_scale(x) if scale is None else scale)
