"""Long-run stability: when a free run leaves the training envelope.

A learned correction can hold a model on the attractor for hundreds of time units
and then let it drift to a state the truth never visits (a spurious fixed point,
a runaway). Forecast skill and short free runs do not show this; long free runs
do. The envelope is the training data's range per component widened by a margin
``m`` of that range, the rule of the exported simulator's guard::

    inside  ⇔  min_i − m·(max_i − min_i) ≤ x_i ≤ max_i + m·(max_i − min_i)  for every i

A run *escapes* at the first sample outside (a non-finite state counts as
outside). Per model: the share of runs that escape, their first exit times, and
the share of all samples spent outside.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Envelope", "escape_times", "summarise_escapes"]


@dataclass
class Envelope:
    """Per-component bounds ``lower ≤ x ≤ upper`` and where they came from."""

    lower: np.ndarray
    upper: np.ndarray
    source: str

    @classmethod
    def from_ranges(cls, minimum, maximum, margin: float, source: str) -> "Envelope":
        """The range ``[minimum, maximum]`` widened by ``margin`` of its width on each side."""
        lo = np.asarray(minimum, dtype=np.float64)
        hi = np.asarray(maximum, dtype=np.float64)
        width = hi - lo
        return cls(lo - margin * width, hi + margin * width, source)

    @classmethod
    def of_samples(cls, states, margin: float, source: str) -> "Envelope":
        """The envelope of ``(..., D)`` samples."""
        flat = np.asarray(states, dtype=np.float64).reshape(-1, np.shape(states)[-1])
        return cls.from_ranges(flat.min(0), flat.max(0), margin, source)

    def outside(self, states) -> np.ndarray:
        """``(...)`` mask of samples ``(..., D)`` outside the envelope or not finite."""
        s = np.asarray(states, dtype=np.float64)
        with np.errstate(invalid="ignore"):
            inside = np.isfinite(s) & (s >= self.lower) & (s <= self.upper)
        return ~inside.all(axis=-1)


def escape_times(runs, envelope: Envelope, dt: float) -> tuple[np.ndarray, np.ndarray]:
    """First exit time of each run ``(T, N, D)`` from the envelope.

    Returns ``(times, escaped)``: ``(N,)`` times ``dt·n`` of the first sample
    ``n`` outside (NaN for runs that stay inside) and the mask of runs that left.
    """
    out = envelope.outside(runs)                      # (T, N)
    escaped = out.any(axis=0)
    first = np.where(escaped, out.argmax(axis=0), -1)
    times = np.where(escaped, first * float(dt), np.nan)
    return times, escaped


def summarise_escapes(runs, envelope: Envelope, dt: float) -> dict:
    """Escape share, first exit times and time outside over free runs ``(T, N, D)``.

    Returns plain data: ``n_runs``, ``escaped_count``, ``escape_fraction``,
    ``escape_times`` (per run, ``None`` for a run that stayed inside),
    ``escape_time_median`` (over the runs that left; ``None`` if none did),
    ``outside_fraction`` (share of all samples outside) and ``run_length``
    (``dt·(T − 1)``).
    """
    times, escaped = escape_times(runs, envelope, dt)
    out = envelope.outside(runs)
    left = times[escaped]
    return {
        "n_runs": int(escaped.size),
        "escaped_count": int(escaped.sum()),
        "escape_fraction": float(escaped.mean()) if escaped.size else 0.0,
        "escape_times": [None if not e else float(t) for t, e in zip(times, escaped)],
        "escape_time_median": float(np.median(left)) if left.size else None,
        "outside_fraction": float(out.mean()) if out.size else 0.0,
        "run_length": float(dt) * (np.shape(runs)[0] - 1),
    }
