"""Validity times summarised over many forecasts: quartiles, censoring, lower bounds, time scales.

Single forecasts are scored by :func:`mnemode.validity.validity_times`; a forecast
still valid at the horizon ``H`` is *censored*: it enters the summary as ``H``
although its true validity time is longer. A sample percentile that puts weight
on a censored value is therefore only a **lower bound** (reported as ``≥ value``).

With ``N`` times sorted, ``c`` of them censored (the ``c`` largest, all equal to
``H``), numpy's default percentile ``q`` interpolates linearly between the order
statistics at 0-based positions ``⌊p⌋`` and ``⌈p⌉``, ``p = q·(N − 1)``. It is a
lower bound exactly when the highest position with non-zero weight (``⌈p⌉``, or
``p`` itself when integral) is ``≥ N − c``: raising the censored values would then
raise the percentile. For the median this is ``c ≥ N/2``.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["summarise_validity", "percentile_is_lower_bound", "error_doubling_time"]


def percentile_is_lower_bound(n: int, n_censored: int, q: float) -> bool:
    """Whether numpy's linear percentile ``q`` ∈ [0, 1] of ``n`` times with ``n_censored`` censored is a lower bound.

    See the module docstring for the rule.
    """
    n, c = int(n), int(n_censored)
    if n <= 0 or c <= 0:
        return False
    p = float(q) * (n - 1)
    top = math.floor(p) if abs(p - round(p)) < 1e-12 else math.ceil(p)
    return top >= n - c


def summarise_validity(times, censored, lyapunov_exponent: float | None = None,
                       predictability_time: float | None = None) -> dict:
    """Median and quartiles of validity times, the censored share, lower-bound flags, scaled versions.

    Quartiles use numpy's default (linear interpolation between order
    statistics). Censored forecasts enter at the horizon, so a percentile that
    rests on one is flagged as a lower bound
    (:func:`percentile_is_lower_bound`). Lyapunov times are ``t·λ``;
    predictability times are ``t / T_p``.

    Returns plain floats: ``validity_time_median``, ``validity_time_q25``,
    ``validity_time_q75``, ``validity_time_{median,q25,q75}_lyapunov`` (``None``
    without ``λ``), ``validity_time_{median,q25,q75}_predictability`` (``None``
    without ``T_p``), ``validity_time_{median,q25,q75}_lower_bound`` (bools),
    ``censored_fraction``, ``censored_count``, ``n_forecasts``.
    """
    t = np.asarray(times, dtype=np.float64)
    c = np.asarray(censored, dtype=bool)
    values = dict(zip(("q25", "median", "q75"), (float(v) for v in np.percentile(t, [25, 50, 75]))))
    lam, tp = lyapunov_exponent, predictability_time
    out: dict = {}
    for key, v in values.items():
        out[f"validity_time_{key}"] = v
    for key, v in values.items():
        out[f"validity_time_{key}_lyapunov"] = None if lam is None else v * lam
    for key, v in values.items():
        out[f"validity_time_{key}_predictability"] = None if not tp else v / tp
    for key, q in (("q25", 0.25), ("median", 0.5), ("q75", 0.75)):
        out[f"validity_time_{key}_lower_bound"] = percentile_is_lower_bound(t.size, int(c.sum()), q)
    out.update(censored_fraction=float(c.mean()) if c.size else 0.0, censored_count=int(c.sum()),
               n_forecasts=int(t.size))
    return out


def error_doubling_time(median_error, dt: float, gamma: float, doublings: int = 3) -> float | None:
    """Mean doubling time of an error curve over the last ``doublings`` doublings below ``gamma``.

    ``median_error`` is ``(T,)``, sampled every ``dt`` (row 0 the start). With
    ``t(a)`` the first time the curve reaches ``a`` (log-linear interpolation
    between samples)::

        T_2 = (t(γ) − t(γ / 2^k)) / k,        k = doublings

    i.e. the finite-size growth of errors just below the validity threshold,
    which sets the validity time (for ``e(t) = e0·exp(λt)``, ``T_2 = ln 2 / λ``).
    Returns ``None`` when the curve does not reach ``γ`` within the window or
    starts above ``γ / 2^k``.
    """
    e = np.asarray(median_error, dtype=np.float64)
    lo = float(gamma) / 2.0 ** int(doublings)
    if e.size < 2 or not np.isfinite(e[0]) or e[0] >= lo:
        return None

    def first_crossing(level: float) -> float | None:
        above = np.nonzero(e >= level)[0]
        if above.size == 0:
            return None
        i = int(above[0])
        a, b = e[i - 1], e[i]
        if not (np.isfinite(b) and a > 0 and b > a):
            return i * dt
        return (i - 1 + math.log(level / a) / math.log(b / a)) * dt

    t_hi, t_lo = first_crossing(float(gamma)), first_crossing(lo)
    if t_hi is None or t_lo is None or t_hi <= t_lo:
        return None
    return (t_hi - t_lo) / int(doublings)
