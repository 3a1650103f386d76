"""Is the sampling interval fine enough for derivative targets? A check on the data, before any fit.

Two regression targets estimate the same missing term ``m``:

- derivative targets ``ρ_n = ẋ̂_n − f0(x_n)`` with ``ẋ̂`` from a finite-difference
  stencil (:func:`~mnemode.fitting.targets.derivative_targets`), whose truncation
  error grows like ``Δt^p`` (``p = 4`` for ``central4``) times a high derivative of
  the trajectory;
- flow-map targets ``q_n`` from consecutive samples through an accurate
  integration ``Ψ0`` of ``f0`` over one interval, midpoint-corrected for the
  continuous form (:func:`~mnemode.fitting.targets.flow_map_targets`), which need
  no derivative of the data.

When sampling is fine both agree up to ``O(Δt²)``; when the stencil's error
becomes part of what a derivative fit would learn, they part. Two numbers say by how much:

- the raw *disagreement* at the interval midpoints, relative to the missing term's size,

      δ = RMS(½(ρ_n + ρ_{n+1}) − q_n) / RMS(q_n),

  which also counts measurement noise (amplified by 1/Δt in both targets);
- the *fitted gap* ``γ = RMS(m̂_ρ(x) − m̂_q(x)) / RMS(m̂_q(x))`` between two closures of
  the same kind (random Fourier features, ridge readout) fitted to each kind of
  target and evaluated at the same states: noise averages out in the regressions,
  while an error of the stencil that depends on the state stays. The decision
  uses ``γ``.

A data-only cross-check is the Richardson estimate of the stencil's own error,
``ε ≈ (ẋ̂(2Δt) − ẋ̂(Δt)) / (2^p − 1)`` (every other sample against all samples),
reported as ``RMS(ε)/RMS(q)``; and the lag-one autocorrelation of the states with
the number of samples per decorrelation time (ACF falls below ``1/e``) say how
coarse Δt is against the dynamics.

Recommendation: derivative targets and the continuous form when ``γ ≤ threshold``
(0.1 by default: the two closures differ by at most a tenth of the missing term),
otherwise flow-map targets in the discrete form ``x_{n+1} = Ψ0(x_n) + Δt·m(x_n)``.
The threshold was set by fits on the demo system and Lorenz-96 (``docs/data.md``).

References: L. F. Richardson, Phil. Trans. R. Soc. A 210 (1911) 307–357
(extrapolation from two step sizes); B. Fornberg, Math. Comp. 51 (1988) 699–706
(finite-difference weights and orders).
"""

from __future__ import annotations

import numpy as np
import torch

from ..data import FD_SCHEMES, TrajectorySet, finite_difference
from ..errors import DataError
from ..solvers import RK4, FlowMap
from .targets import derivative_targets, flow_map_targets

__all__ = ["sampling_advice", "sampling_report", "DEFAULT_THRESHOLD"]

DEFAULT_THRESHOLD = 0.1

_ORDER = {"forward": 1, "central": 2, "central4": 4}


def _rms(a) -> float:
    a = np.asarray(a, dtype=np.float64)
    return float(np.sqrt(np.mean(a ** 2))) if a.size else float("nan")


def _acf_summary(states: np.ndarray) -> tuple[float, float | None]:
    """Lag-one autocorrelation (mean over trajectories and components) and samples until it falls below 1/e."""
    x = states - states.mean(axis=0, keepdims=True)
    var = np.mean(x ** 2, axis=0)
    T = x.shape[0]
    ok = var > 0

    def acf(lag):
        # the biased estimator (divides by T), which keeps |ACF| ≤ 1
        return float(np.mean((np.sum(x[lag:] * x[:T - lag], axis=0)[ok] / T) / var[ok]))

    lag1 = acf(1) if T > 1 else float("nan")
    for lag in range(1, T // 2):
        if acf(lag) < np.exp(-1.0):
            return lag1, float(lag)
    return lag1, None


def _fitted_gap(x_d, y_d, x_f, y_f, n_features: int = 300, lengthscale: float = 2.0, ridge: float = 1e-6,
                seed: int = 0) -> float:
    """RMS gap between a closure fitted to derivative targets and one fitted to flow-map targets.

    Both are random Fourier features of the standardised inputs with one ridge readout
    (Rahimi & Recht 2007), evaluated at the flow-map inputs, relative to the
    flow-map closure's RMS. Measurement noise in the targets averages out in the
    regressions; an error of the stencil that depends on the state does not.
    """
    x_d, y_d, x_f, y_f = (np.asarray(a, dtype=np.float64) for a in (x_d, y_d, x_f, y_f))
    mu, sd = x_f.mean(axis=0), np.maximum(x_f.std(axis=0), 1e-12)
    rng = np.random.default_rng(seed)
    w = rng.standard_normal((x_f.shape[1], n_features)) / lengthscale
    b = rng.uniform(0.0, 2 * np.pi, n_features)

    def features(x):
        z = np.cos(((x - mu) / sd) @ w + b) * np.sqrt(2.0 / n_features)
        return np.concatenate([z, np.ones((x.shape[0], 1))], axis=1)

    def fit(x, y):
        f = features(x)
        reg = ridge * x.shape[0] * np.eye(f.shape[1])
        reg[-1, -1] = 0.0                                  # the bias is not penalised
        return np.linalg.solve(f.T @ f + reg, f.T @ y)

    phi = features(x_f)
    m_d, m_f = phi @ fit(x_d, y_d), phi @ fit(x_f, y_f)
    return _rms(m_d - m_f) / max(_rms(m_f), 1e-300)


def sampling_advice(data: TrajectorySet, physics, *, scheme: str = "central4", threshold: float = DEFAULT_THRESHOLD,
                    max_pairs: int = 6_000, psi0_substeps: int = 10) -> dict:
    """Judge the sampling interval of ``data`` for derivative against flow-map targets.

    Args:
        data: evenly sampled trajectories ``(T, B, D)`` (forcing, if any, is used).
        physics: the nominal field ``f0(t, x[, u])``, or ``None`` (data-only: ``f0 = 0``).
        scheme: finite-difference scheme of the derivative targets.
        threshold: largest fitted gap ``γ`` at which derivative targets are trusted.
        max_pairs: samples used at most (leading part of each trajectory).
        psi0_substeps: RK4 sub-steps per interval for Ψ0.

    Returns:
        plain data: ``dt``, ``disagreement`` (δ), ``fitted_gap`` (γ), ``fd_error`` (Richardson estimate,
        relative), ``acf_lag1``, ``samples_per_decorrelation`` (``None`` if the ACF
        stays above 1/e), ``threshold``, ``targets`` (``'derivative'`` or
        ``'flow_map'``), ``form`` (``'continuous'`` or ``'discrete'``), ``fit`` and
        ``model_form`` (the config options), ``reason`` (one sentence).

    Raises:
        DataError: too few samples for the stencil.
    """
    dt = data.dt
    offsets = FD_SCHEMES[scheme][0]
    lo, hi = -min(offsets), max(offsets)
    T = min(data.n_times, max(2 * (lo + hi) + 2, max_pairs // max(1, data.n_trajectories)))
    ts = data.time_slice(0, T) if T < data.n_times else data
    if ts.n_times < 2 * (lo + hi) + 2:
        raise DataError("sampling check", f"trajectories of {ts.n_times} samples are too short for the "
                        f"{scheme!r} stencil at Δt and 2Δt", "use longer trajectories.")
    with torch.no_grad():
        x_d, rho = derivative_targets(ts, physics, scheme)
    flow = None if physics is None else FlowMap(physics, dt, RK4(dt / psi0_substeps))
    x_f, q = flow_map_targets(ts, flow, continuous=True, true_time=True)
    fitted_gap = _fitted_gap(x_d.numpy(), rho.numpy(), x_f.numpy(), q.numpy())
    B, D = ts.n_trajectories, ts.dim
    rho = rho.reshape(ts.n_times - lo - hi, B, D).numpy()
    q = q.reshape(ts.n_times - 1, B, D).numpy()
    rho_mid = 0.5 * (rho[:-1] + rho[1:])                 # midpoints n + ½ for n = lo … T − hi − 2
    q_mid = q[lo: ts.n_times - hi - 1]
    scale = max(_rms(q), 1e-300)
    disagreement = _rms(rho_mid - q_mid) / scale
    # Richardson: the stencil on every other sample against all samples
    _, d_fine = finite_difference(ts.states, dt, scheme)
    _, d_coarse = finite_difference(ts.states[::2], 2 * dt, scheme)
    p = _ORDER.get(scheme, 2)
    # coarse index j sits at fine sample 2(lo + j); fine index k at sample lo + k
    fine_at = d_fine[lo::2][: d_coarse.shape[0]]
    n = min(fine_at.shape[0], d_coarse.shape[0])
    fd_error = _rms((d_coarse[:n] - fine_at[:n]) / (2 ** p - 1)) / scale
    acf1, per_decorrelation = _acf_summary(ts.states)
    trusted = fitted_gap <= threshold
    if trusted:
        reason = (f"closures fitted to derivative and to flow-map targets agree to {100 * fitted_gap:.3g} % of the "
                  f"missing term's size (≤ {100 * threshold:.3g} %): finite differences are trustworthy at "
                  f"Δt = {dt:.6g}")
    else:
        reason = (f"a closure fitted to derivative targets differs from one fitted to flow-map targets by "
                  f"{100 * fitted_gap:.3g} % of the missing term's size (> {100 * threshold:.3g} %): at Δt = {dt:.6g} "
                  "the finite-difference error would be learnt as part of the closure")
    return {
        "dt": float(dt), "scheme": scheme, "disagreement": float(disagreement), "fitted_gap": float(fitted_gap),
        "fd_error": float(fd_error),
        "acf_lag1": float(acf1), "samples_per_decorrelation": per_decorrelation, "threshold": float(threshold),
        "targets": "derivative" if trusted else "flow_map", "form": "continuous" if trusted else "discrete",
        "fit": "derivative" if trusted else "flow_map", "model_form": "continuous" if trusted else "discrete",
        "reason": reason, "n_pairs": int(q_mid.shape[0] * B),
    }


def sampling_report(advice: dict) -> str:
    """The advice as a few lines of text."""
    spd = advice["samples_per_decorrelation"]
    lines = [
        "Is the sampling interval fine enough for derivative targets?",
        f"  Δt = {advice['dt']:.6g}; closures fitted to derivative ({advice['scheme']}) and to flow-map targets "
        f"differ by {100 * advice['fitted_gap']:.3g} % of the missing term (threshold {100 * advice['threshold']:.3g} %)",
        f"  the targets themselves differ by {100 * advice['disagreement']:.3g} % (measurement noise included)",
        f"  finite-difference error (Richardson, Δt vs 2Δt): {100 * advice['fd_error']:.3g} % of the missing term",
        f"  autocorrelation at one Δt: {advice['acf_lag1']:.4f}; samples per decorrelation time: "
        + (f"{spd:.0f}" if spd is not None else "more than half a trajectory"),
        f"  recommendation: {advice['targets']} targets, {advice['form']} form -> "
        f"fit={advice['fit']} model={advice['model_form']}",
        f"  because {advice['reason']}.",
    ]
    return "\n".join(lines)
