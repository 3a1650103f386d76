"""Long-run statistics: histograms on common bins, KL divergence, autocorrelation.

Invariant measure. The 1-D marginal of each component is binned on edges taken
from the reference (truth) samples: ``n_bins`` equal bins over the reference's
``[min, max]`` widened by ``pad`` (10 %) of its range on each side, plus two
overflow bins ``(−∞, lo)`` and ``[hi, ∞)`` so that mass a model puts far outside
the truth's range still counts against it. Empty bins: a pseudo-count
(0.5 per bin by default, the Krichevsky–Trofimov / Jeffreys choice) is added to
*both* histograms before normalising, so that every bin has non-zero probability
and the divergence is finite. Then

    KL(p ‖ q) = Σ_i p_i ln(p_i / q_i)

with ``p`` the truth and ``q`` the model (zero where ``p_i = 0``). When the
components are identical sites on a ring their samples are pooled into one
histogram; otherwise the divergence is averaged over components.

Autocorrelation. The biased sample autocorrelation of a series ``x_0..x_{N−1}``
with mean ``x̄``::

    ρ(k) = Σ_{t=0}^{N−1−k} (x_t − x̄)(x_{t+k} − x̄)  /  Σ_{t=0}^{N−1} (x_t − x̄)²

(divisor ``N`` for every lag; Box, Jenkins & Reinsel, *Time Series Analysis*,
§2.1.5). Its error against the truth's is the RMS difference over lags
``1..K``, averaged over components.

References: S. Kullback & R. A. Leibler, Ann. Math. Statist. 22 (1951);
R. E. Krichevsky & V. K. Trofimov, IEEE Trans. Inf. Theory 27 (1981).
"""

from __future__ import annotations

import warnings

import numpy as np

__all__ = [
    "DEFAULT_PSEUDO_COUNT", "histogram_edges", "histogram_counts", "kl_divergence",
    "MarginalHistograms", "marginal_kl", "autocorrelation", "mean_autocorrelation", "acf_error", "segments",
]

DEFAULT_PSEUDO_COUNT = 0.5


def histogram_edges(reference, n_bins: int = 50, pad: float = 0.1) -> np.ndarray:
    """Inner bin edges ``(n_bins + 1,)`` over the reference's range widened by ``pad`` of it each side.

    A reference with no spread (max = min) gets a range of ±0.5 around its value
    (±0.5·|value| when that is larger) so that the bins stay well defined.
    """
    r = np.asarray(reference, dtype=np.float64).ravel()
    r = r[np.isfinite(r)]
    if r.size == 0:
        raise ValueError("histogram_edges needs at least one finite reference sample")
    lo, hi = float(r.min()), float(r.max())
    width = hi - lo
    if width <= 0:
        half = max(0.5, 0.5 * abs(lo))
        lo, hi, width = lo - half, hi + half, 2 * half
    return np.linspace(lo - pad * width, hi + pad * width, int(n_bins) + 1)


def histogram_counts(samples, edges) -> np.ndarray:
    """Counts in ``[underflow, inner bins..., overflow]`` (``len(edges) + 1`` entries).

    Underflow holds samples below ``edges[0]``, overflow those at or above
    ``edges[-1]``; inner bins are ``[e_i, e_{i+1})``. Non-finite samples are ignored
    (callers flag runs that blew up before calling this).
    """
    s = np.asarray(samples, dtype=np.float64).ravel()
    s = s[np.isfinite(s)]
    edges = np.asarray(edges, dtype=np.float64)
    # searchsorted with side='right' puts x in bin i where edges[i-1] <= x < edges[i].
    idx = np.searchsorted(edges, s, side="right")
    return np.bincount(idx, minlength=edges.size + 1).astype(np.float64)


def kl_divergence(p_counts, q_counts, pseudo_count: float = DEFAULT_PSEUDO_COUNT) -> float:
    """``KL(p ‖ q) = Σ p_i ln(p_i/q_i)`` of two histograms on the same bins (in nats).

    ``pseudo_count`` is added to every bin of both histograms before each is
    normalised to sum 1. With ``pseudo_count = 0``, bins where ``p_i = 0`` add
    nothing and a bin with ``p_i > 0 = q_i`` makes the divergence ``inf``.
    """
    p = np.asarray(p_counts, dtype=np.float64) + pseudo_count
    q = np.asarray(q_counts, dtype=np.float64) + pseudo_count
    if p.shape != q.shape:
        raise ValueError(f"histograms differ in shape: {p.shape} vs {q.shape}")
    if p.sum() <= 0 or q.sum() <= 0:
        raise ValueError("a histogram with no mass has no distribution")
    p = p / p.sum()
    q = q / q.sum()
    nz = p > 0
    with np.errstate(divide="ignore"):
        return float(np.sum(p[nz] * (np.log(p[nz]) - np.log(q[nz]))))


class MarginalHistograms:
    """Histograms of 1-D marginals on bins fixed by a reference sample (the truth).

    Args:
        reference: ``(..., D)`` reference samples; they fix the bins.
        n_bins: inner bins per component (two overflow bins are added).
        pooled: one histogram over all components (identical ring sites).
        pad: widening of the reference range on each side, as a fraction of it.
        pseudo_count: added to every bin of both histograms in :meth:`kl`.
    """

    def __init__(self, reference, n_bins: int = 50, pooled: bool = False, pad: float = 0.1,
                 pseudo_count: float = DEFAULT_PSEUDO_COUNT):
        self.pooled, self.pseudo_count = bool(pooled), float(pseudo_count)
        groups = self._groups(reference)
        self.edges = [histogram_edges(g, n_bins, pad) for g in groups]
        self.reference_counts = [histogram_counts(g, e) for g, e in zip(groups, self.edges)]

    def _groups(self, samples):
        s = np.asarray(samples, dtype=np.float64)
        if self.pooled:
            return [s.ravel()]
        return [s[..., d].ravel() for d in range(s.shape[-1])]

    def counts(self, samples) -> list[np.ndarray]:
        """Counts of ``samples`` on the reference bins, one array per group."""
        return [histogram_counts(g, e) for g, e in zip(self._groups(samples), self.edges)]

    def kl(self, samples) -> tuple[float, list[float]]:
        """``(mean, per-group)`` KL(reference ‖ samples)."""
        values = [kl_divergence(p, q, self.pseudo_count)
                  for p, q in zip(self.reference_counts, self.counts(samples))]
        return float(np.mean(values)), values


def marginal_kl(reference, samples, n_bins: int = 50, pooled: bool = False, pad: float = 0.1,
                pseudo_count: float = DEFAULT_PSEUDO_COUNT) -> float:
    """KL(reference ‖ samples) of the 1-D marginals on bins from the reference, averaged over components.

    Arrays are ``(..., D)`` (the last axis is the component); ``pooled`` pools all
    components into one histogram. See :class:`MarginalHistograms`.
    """
    return MarginalHistograms(reference, n_bins, pooled, pad, pseudo_count).kl(samples)[0]


def autocorrelation(x, max_lag: int) -> np.ndarray:
    """Biased sample autocorrelation along axis 0 for lags ``0..max_lag``.

    ``x`` is ``(N, ...)``; the result is ``(max_lag + 1, ...)``. A series with no
    variance gives NaN (its autocorrelation is undefined). Computed with a
    zero-padded FFT (exact up to rounding).
    """
    x = np.asarray(x, dtype=np.float64)
    n = x.shape[0]
    if not 0 <= max_lag < n:
        raise ValueError(f"max_lag must be in [0, {n - 1}] for series of {n} samples, got {max_lag}")
    dev = x - x.mean(axis=0, keepdims=True)
    size = 1 << int(np.ceil(np.log2(2 * n - 1)))
    spec = np.fft.rfft(dev, n=size, axis=0)
    cov = np.fft.irfft(spec * np.conj(spec), n=size, axis=0)[: max_lag + 1]
    var = np.sum(dev * dev, axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = cov / var
    out = np.where(var > 0, out, np.nan)
    out[0] = np.where(var > 0, 1.0, np.nan)
    return out


def segments(series, length: int) -> np.ndarray:
    """Cut ``(T, B, D)`` series into non-overlapping segments ``(length, B·⌊T/length⌋, D)``."""
    s = np.asarray(series, dtype=np.float64)
    t, b, d = s.shape
    k = t // length
    if k == 0:
        raise ValueError(f"segments of {length} samples do not fit in series of {t}")
    s = s[: k * length].reshape(k, length, b, d)
    return np.moveaxis(s, 0, 1).reshape(length, k * b, d)


def mean_autocorrelation(series, max_lag: int, segment_length: int | None = None,
                         pooled: bool = False) -> np.ndarray:
    """Autocorrelation of ``(T, B, D)`` series, averaged over segments (and components if pooled).

    Each trajectory is cut into non-overlapping segments of ``segment_length``
    samples (all of ``T`` by default) and the biased estimate of each segment is
    averaged; comparing truth and model on equal segment lengths gives both the
    same small-sample bias. Returns ``(max_lag + 1, D)``, or ``(max_lag + 1, 1)``
    when ``pooled``. Segments with no variance are skipped.
    """
    s = np.asarray(series, dtype=np.float64)
    segs = segments(s, segment_length or s.shape[0])
    rho = autocorrelation(segs, max_lag)            # (L, S, D)
    with warnings.catch_warnings():
        # All-NaN slices (a component with no variance anywhere) stay NaN on purpose.
        warnings.simplefilter("ignore", RuntimeWarning)
        mean = np.nanmean(rho, axis=1)
        if pooled:
            mean = np.nanmean(mean, axis=1, keepdims=True)
    return mean


def acf_error(reference_acf, model_acf) -> float:
    """RMS over lags ``1..K`` of the difference of two ``(K + 1, D)`` ACFs, averaged over components.

    A model component with no variance (NaN autocorrelation) is scored as an
    uncorrelated signal (ρ = 0 at every lag ≥ 1): it has no fluctuations to
    correlate, which is as far as it can be from a decaying truth ACF.
    """
    ref = np.asarray(reference_acf, dtype=np.float64)[1:]
    mod = np.nan_to_num(np.asarray(model_acf, dtype=np.float64)[1:], nan=0.0)
    if ref.shape != mod.shape:
        raise ValueError(f"ACFs differ in shape: {ref.shape} vs {mod.shape}")
    if ref.shape[0] == 0:
        return 0.0
    rms = np.sqrt(np.mean((mod - ref) ** 2, axis=0))
    return float(np.nanmean(rms))
