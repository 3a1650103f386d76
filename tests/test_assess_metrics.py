"""Assessment metrics against outside references: scipy, statsmodels, closed forms, published values."""

from __future__ import annotations

import math
import statistics

import numpy as np
import pytest
import torch

from mnemode.assess.references import resolve_lyapunov
from mnemode.assess.metrics import summarise_validity
from mnemode.assess.statistics import (MarginalHistograms, acf_error, autocorrelation, histogram_counts,
                                       histogram_edges, kl_divergence, marginal_kl, mean_autocorrelation)
from mnemode.systems import lorenz63
from mnemode.validity import normalised_error, rms_scale, validity_times

scipy_stats = pytest.importorskip("scipy.stats")
stattools = pytest.importorskip("statsmodels.tsa.stattools")


# -- KL divergence ----------------------------------------------------------------------

@pytest.mark.parametrize("pseudo_count", [0.0, 0.5, 1e-3])
def test_kl_matches_scipy_entropy_on_the_same_histograms(pseudo_count):
    rng = np.random.default_rng(0)
    a, b = rng.normal(0.0, 1.0, 5000), rng.normal(0.3, 1.2, 4000)
    edges = histogram_edges(a, 30)
    p, q = histogram_counts(a, edges), histogram_counts(b, edges)
    if pseudo_count == 0.0:
        p, q = p[1:-1] + 1, q[1:-1] + 1  # no empty bins, so scipy's sum stays finite
    ours = kl_divergence(p, q, pseudo_count)
    # Reference: scipy.stats.entropy(pk, qk) = Σ pk ln(pk/qk) after normalising each (scipy docs).
    ref = scipy_stats.entropy(p + pseudo_count, q + pseudo_count)
    assert abs(ours - ref) < 1e-12


def test_kl_is_infinite_without_pseudo_count_when_model_misses_truth_mass():
    # Reference: scipy.stats.entropy returns inf when qk = 0 where pk > 0 (scipy docs).
    p, q = np.array([3.0, 1.0, 0.0]), np.array([4.0, 0.0, 2.0])
    assert kl_divergence(p, q, 0.0) == scipy_stats.entropy(p, q) == math.inf


def test_histogram_counts_match_numpy_histogram_inside_and_count_overflow():
    rng = np.random.default_rng(1)
    x = rng.normal(size=2000)
    edges = np.linspace(-1.0, 1.0, 11)
    c = histogram_counts(x, edges)
    # Reference: numpy.histogram on the same edges (no sample falls exactly on an edge here, where
    # numpy's closed last bin and our half-open one would differ).
    ref, _ = np.histogram(x, edges)
    assert np.array_equal(c[1:-1], ref)
    assert c[0] == np.sum(x < -1.0) and c[-1] == np.sum(x >= 1.0)
    assert c.sum() == x.size


@pytest.mark.parametrize("mu2, s2", [(1.0, 1.0), (0.5, 1.5)])
def test_binned_kl_approaches_gaussian_closed_form(mu2, s2):
    rng = np.random.default_rng(2)
    n = 400_000
    truth = rng.normal(0.0, 1.0, (n, 1))
    model = rng.normal(mu2, s2, (n, 1))
    # Closed form (Kullback & Leibler 1951; any statistics text), = 0.5 for N(0,1)‖N(1,1):
    # KL(N(μ1,σ1²) ‖ N(μ2,σ2²)) = ln(σ2/σ1) + (σ1² + (μ1 − μ2)²)/(2σ2²) − 1/2.
    exact = math.log(s2 / 1.0) + (1.0 + (0.0 - mu2) ** 2) / (2 * s2 ** 2) - 0.5
    assert abs(marginal_kl(truth, model, n_bins=60) - exact) < 0.02


def test_pooled_marginals_use_one_histogram_and_average_otherwise():
    rng = np.random.default_rng(3)
    a = rng.normal(size=(3000, 4))
    b = rng.normal(0.2, 1.0, size=(3000, 4))
    per = [marginal_kl(a[:, [i]], b[:, [i]]) for i in range(4)]
    assert abs(marginal_kl(a, b) - np.mean(per)) < 1e-12
    h = MarginalHistograms(a, 40, pooled=True)
    assert len(h.edges) == 1 and h.reference_counts[0].sum() == a.size
    # Pooled = the KL of the flattened samples (one histogram), checked against scipy.
    p, q = h.reference_counts[0] + 0.5, h.counts(b)[0] + 0.5
    assert abs(h.kl(b)[0] - scipy_stats.entropy(p, q)) < 1e-12


# -- autocorrelation -----------------------------------------------------------------------

def test_acf_worked_example():
    # Worked by hand from the biased definition (Box, Jenkins & Reinsel, Time Series Analysis,
    # §2.1.5): x = 1..5, deviations −2..2, c0 = 10, c1 = 4, c2 = −1, c3 = −4, c4 = −4.
    got = autocorrelation(np.array([1.0, 2.0, 3.0, 4.0, 5.0]), 4)
    assert np.allclose(got, [1.0, 0.4, -0.1, -0.4, -0.4], atol=1e-14)


def test_acf_matches_statsmodels_columnwise():
    rng = np.random.default_rng(4)
    n = 1500
    x = np.zeros((n, 3))
    for t in range(1, n):  # three AR(1) series with different memories
        x[t] = np.array([0.9, 0.5, -0.3]) * x[t - 1] + rng.normal(size=3)
    x += np.array([5.0, -2.0, 0.0])
    got = autocorrelation(x, 40)
    for d in range(3):
        # Reference: statsmodels.tsa.stattools.acf, biased (adjusted=False), direct sums (fft=False).
        ref = stattools.acf(x[:, d], nlags=40, adjusted=False, fft=False)
        assert np.max(np.abs(got[:, d] - ref)) < 1e-10


def test_acf_of_ar1_approaches_theory_and_error_measures_distance():
    rng = np.random.default_rng(5)
    phi, n = 0.8, 200_000
    e = rng.normal(size=n)
    x = np.empty(n)
    x[0] = e[0]
    for t in range(1, n):
        x[t] = phi * x[t - 1] + e[t]
    theory = (phi ** np.arange(21))[:, None]  # AR(1): ρ(k) = φ^k (Box, Jenkins & Reinsel §3.2.4)
    sample = mean_autocorrelation(x[:, None, None], 20)
    assert acf_error(theory, sample) < 0.02
    other = (0.5 ** np.arange(21))[:, None]
    assert acf_error(theory, other) > 0.1   # a different memory is clearly farther than sampling error


def test_acf_of_constant_series_is_undefined_and_scored_as_uncorrelated():
    # statsmodels also returns NaN for a constant series (0/0); the error treats it as ρ = 0.
    assert np.isnan(autocorrelation(np.ones(50), 3)[1:]).all()
    ref = np.array([[1.0], [0.5], [0.25]])
    assert abs(acf_error(ref, np.array([[np.nan], [np.nan], [np.nan]])) - math.sqrt((0.25 + 0.0625) / 2)) < 1e-12


# -- validity time -------------------------------------------------------------------------

def test_validity_time_of_exponential_error_growth():
    # Error δ e^{λt} crosses γ at t* = ln(γ/δ)/λ (solve δ e^{λt} = γ); sampled every dt, the first
    # sample above γ lies within one dt after t*.
    dt, lam, gamma = 0.01, 0.9, 0.5
    deltas = np.array([1e-6, 1e-4, 1e-2])
    t = np.arange(2001) * dt
    truth = np.zeros((t.size, 3, 2))
    truth[..., 0] = np.sin(t)[:, None]
    truth[..., 1] = np.cos(t)[:, None]   # RMS size about the mean ≈ 1
    scale = rms_scale(truth)
    err = deltas[None, :] * np.exp(lam * t[:, None])
    fc = truth.copy()
    fc[..., 0] += err * scale            # error along one axis, in units of the scale
    times, censored = validity_times(fc, truth, dt, gamma)
    exact = np.log(gamma / deltas) / lam
    assert not censored.any()
    assert np.all(times >= exact - 1e-12) and np.all(times <= exact + dt + 1e-12)


def test_validity_time_censoring_and_blow_up():
    truth = np.zeros((11, 3, 2))
    truth[:, :, 0] = np.linspace(-1, 1, 11)[:, None]
    fc = truth.copy()
    fc[4:, 1, 0] += 10.0          # exceeds at sample 4
    fc[2:, 2, :] = np.nan         # blows up at sample 2
    t, c = validity_times(fc, truth, 0.5, 0.5, scale=1.0)
    assert list(t) == [5.0, 2.0, 1.0] and list(c) == [True, False, False]
    assert np.isinf(normalised_error(fc, truth, 1.0)[5, 2])


def test_validity_summary_quartiles_match_statistics_module():
    times = np.array([0.2, 1.5, 3.0, 3.1, 4.0, 7.5, 9.0])
    censored = np.array([0, 0, 0, 0, 0, 1, 1], dtype=bool)
    s = summarise_validity(times, censored, lyapunov_exponent=0.5)
    # Reference: Python's statistics.quantiles(method='inclusive') (linear interpolation between
    # order statistics, the same rule as numpy's default percentile).
    q25, med, q75 = statistics.quantiles(times.tolist(), n=4, method="inclusive")
    assert (s["validity_time_q25"], s["validity_time_median"], s["validity_time_q75"]) == pytest.approx((q25, med, q75))
    assert s["validity_time_median_lyapunov"] == pytest.approx(med * 0.5)
    assert s["censored_fraction"] == pytest.approx(2 / 7) and s["censored_count"] == 2
    assert summarise_validity(times, censored)["validity_time_median_lyapunov"] is None


# -- Lyapunov time -------------------------------------------------------------------------

def test_lyapunov_exponent_used_when_system_states_none_matches_published_value():
    torch.set_num_threads(1)
    system = lorenz63()                  # published σ = 10, ρ = 28, β = 8/3
    assert resolve_lyapunov(system) == (pytest.approx(0.9056), "system")
    system.lyapunov_exponent = None      # force the estimator
    lam, source = resolve_lyapunov(system, duration=60.0, step=0.01, seed=0)
    assert source == "estimated"
    # Published: largest exponent 0.9056 (Sprott, Chaos and Time-Series Analysis, 2003).
    assert abs(lam / 0.9056 - 1) < 0.03
