"""Reading closures with memory (time constants, history shares) and partial dependence.

References: numpy.logspace (the filter bank's configured time constants),
numpy.linalg.eigvals (eigenvalues of a linear hidden field), the exact relation
μ = exp(−Δt/τ) of a leaky integrator over one interval, and partial dependence
computed in closed form for a known correction (Friedman, Ann. Statist. 29 (2001) 1189).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch

from mnemode.closures import RecurrentClosure, ReservoirClosure, ReservoirFlowClosure
from mnemode.closures.base import Closure, Scaling
from mnemode.data import TrajectorySet
from mnemode.explain import read_correction
from mnemode.explain.memory import time_constants
from mnemode.explain.partial_dependence import partial_dependence
from mnemode.explain.trace import trace_correction
from mnemode.hybrid import HybridField, HybridFlowMap
from mnemode.solvers import RK4


def _waves(n_times=120, dt=0.05, batch=2, dim=2, seed=0) -> TrajectorySet:
    rng = np.random.default_rng(seed)
    t = np.arange(n_times) * dt
    freq = rng.uniform(0.5, 2.0, size=(batch, dim))
    phase = rng.uniform(0, 2 * math.pi, size=(batch, dim))
    states = np.sin(t[:, None, None] * freq[None] + phase[None]) + 0.3 * np.cos(2.3 * t)[:, None, None]
    return TrajectorySet(times=t, states=states, names=tuple(f"q{i}" for i in range(dim)))


def _float64(make):
    return make(torch.float64)


def test_filter_bank_time_constants_are_the_configured_ones():
    ts = _waves()
    closure = _float64(lambda dtype: ReservoirClosure(2, hidden_size=6, time_constants=(0.1, 10.0), dtype=dtype))
    trace = trace_correction(HybridField(None, closure, 2), ts, RK4(0.025))
    tc = time_constants(closure, trace, ts.dt)
    expected = np.repeat(np.logspace(-1, 1, 3), 2)  # numpy.logspace over (τ_min, τ_max), one per input
    np.testing.assert_allclose(tc.tau, expected, rtol=1e-10)
    assert tc.exact and not tc.discrete and np.all(np.isinf(tc.period))


def test_discrete_filter_bank_time_constants_from_its_multipliers():
    ts = _waves(dt=0.2)
    closure = _float64(lambda dtype: ReservoirFlowClosure(2, hidden_size=4, time_constants=(0.5, 5.0), interval=0.2, dtype=dtype))
    trace = trace_correction(HybridFlowMap(None, closure, 2, 0.2), ts)
    tc = time_constants(closure, trace, 0.2)
    # one interval of dr/dt = (x − r)/τ with x held: r ← r·exp(−Δt/τ) + …, so μ = exp(−Δt/τ)
    np.testing.assert_allclose(np.abs(tc.eigenvalues), np.exp(-0.2 / np.repeat([0.5, 5.0], 2)), rtol=1e-10)
    np.testing.assert_allclose(tc.tau, np.repeat([0.5, 5.0], 2), rtol=1e-10)
    assert tc.discrete


def test_leaky_field_eigenvalues_give_time_constants_and_periods():
    ts = _waves()
    closure = _float64(lambda dtype: RecurrentClosure(2, hidden_size=3, form="leaky", time_constants=(0.5, 2.0), dtype=dtype))
    a_rel = np.array([[-1.0, 2.0, 0.0], [-2.0, -1.0, 0.0], [0.0, 0.3, -0.5]])
    with torch.no_grad():
        closure.A_rel.copy_(torch.as_tensor(a_rel))
    A = closure.rate.numpy()[:, None] * a_rel
    ev = np.linalg.eigvals(A)  # numpy's eigenvalues of the hidden field's matrix
    trace = trace_correction(HybridField(None, closure, 2), ts, RK4(0.025))
    tc = time_constants(closure, trace, ts.dt)
    np.testing.assert_allclose(np.sort(tc.tau), np.sort(-1.0 / ev.real), rtol=1e-10)
    periods = np.sort(2 * math.pi / np.abs(ev.imag[np.abs(ev.imag) > 1e-9]))
    np.testing.assert_allclose(np.sort(tc.period[np.isfinite(tc.period)]), periods, rtol=1e-10)


def test_history_share_names_the_input_whose_past_the_correction_uses():
    ts = _waves(n_times=200, batch=3)
    train = _waves(n_times=200, batch=3, seed=5)
    closure = _float64(lambda dtype: ReservoirClosure(2, hidden_size=4, time_constants=(0.3, 1.0), dtype=dtype))
    # features [q̃0, q̃1, r(τ=0.3, q0), r(τ=0.3, q1), r(τ=1, q0), r(τ=1, q1), 1]: read only the past of q0
    w = torch.zeros(7, 2, dtype=torch.float64)
    w[2, 0], w[4, 1], w[1, 1] = 1.0, -2.0, 0.5
    closure.set_readout(w)
    reading = read_correction(HybridField(None, closure, 2), ts, train, warm_up=2.0, solver=RK4(0.025))
    h = dict(zip(reading.history.names, reading.history.carried))
    assert h["q1"] == pytest.approx(0.0, abs=1e-12)   # q1 enters only through its present value
    assert h["q0"] > 0.5 and h["all inputs"] == pytest.approx(h["q0"], rel=1e-12)
    # the surrogate in [q, r] finds the readout exactly (the correction is linear in r and q)
    s = reading.surrogate
    assert s.coefficient("r1", 0) == pytest.approx(1.0, abs=1e-8)
    assert s.coefficient("r3", 1) == pytest.approx(-2.0, abs=1e-8)
    assert reading.time_constants is not None and len(reading.time_constants.tau) == 4


class _Known(Closure):
    """m = (a·x0², b·x1 + x0·x1) with no learned state (a test double)."""

    def __init__(self, dtype=None, a=0.7, b=-1.3):
        super().__init__(2, dtype=dtype)
        self.scaling = Scaling(2, 2, dtype)
        self.a, self.b = a, b

    def correction(self, x, r=None, u=None):
        return torch.stack((self.a * x[..., 0] ** 2, self.b * x[..., 1] + x[..., 0] * x[..., 1]), dim=-1)


def test_partial_dependence_matches_closed_form():
    ts = _waves(batch=3)
    closure = _float64(_Known)
    trace = trace_correction(HybridField(None, closure, 2), ts)
    envelope = {"q0": [-1.5, 1.5], "q1": [-1.0, 2.0]}
    pd = partial_dependence(closure, trace, envelope, ["q0", "q1"], n_grid=11, n_points=10_000)
    x = ts.states.reshape(-1, 2)
    g0, g1 = np.linspace(-1.5, 1.5, 11), np.linspace(-1.0, 2.0, 11)
    # closed form: PD over q0 averages q1 over the points, and vice versa
    np.testing.assert_allclose(pd.curves[0, :, 0], 0.7 * g0 ** 2, rtol=1e-12)
    np.testing.assert_allclose(pd.curves[0, :, 1], -1.3 * x[:, 1].mean() + g0 * x[:, 1].mean(), atol=1e-12)
    np.testing.assert_allclose(pd.curves[1, :, 0], np.full(11, 0.7 * np.mean(x[:, 0] ** 2)), rtol=1e-12)
    np.testing.assert_allclose(pd.curves[1, :, 1], -1.3 * g1 + g1 * x[:, 0].mean(), atol=1e-12)
    assert pd.spread[1, 0] == pytest.approx(0.0, abs=1e-12)


def test_bad_settings_and_short_data_are_clear_errors():
    from mnemode.errors import ConfigError, DataError

    ts = _waves(n_times=20)
    closure = _float64(lambda dtype: ReservoirClosure(2, hidden_size=2, time_constants=(0.1, 0.1), dtype=dtype))
    model = HybridField(None, closure, 2)
    with pytest.raises(DataError, match="warm"):
        read_correction(model, ts, ts, warm_up=5.0)
    with pytest.raises(ConfigError, match="degree"):
        read_correction(model, ts, ts, degree=-1)
    with pytest.raises(ConfigError, match="no closure"):
        read_correction(HybridField(closure=None, physics=torch.nn.Identity(), dim=2), ts, ts)


class _ForcedKnown(Closure):
    """m = (0.8·q0·u, −0.5·u²): a memoryless correction of the state and one forcing input (test double)."""

    def __init__(self, dtype=None):
        super().__init__(2, forcing_dim=1, dtype=dtype)
        self.scaling = Scaling(3, 2, dtype)

    def correction(self, x, r=None, u=None):
        return torch.stack((0.8 * x[..., 0] * u[..., 0], -0.5 * u[..., 0] ** 2), dim=-1)


def test_forcing_inputs_enter_the_surrogate_and_partial_dependence():
    from dataclasses import replace

    ts = _waves(batch=3)
    u = np.cos(0.7 * ts.times)[:, None, None] * np.linspace(0.5, 1.5, 3)[None, :, None]
    ts = replace(ts, forcing=u, forcing_names=("heat",))
    reading = read_correction(HybridField(None, _float64(_ForcedKnown), 2), ts, ts)
    s = reading.surrogate
    assert reading.input_names == ["q0", "q1", "heat"]
    # the polynomial surrogate finds the exact terms (exact data: STLSQ reduces to least squares on them)
    assert s.coefficient("q0·heat", 0) == pytest.approx(0.8, abs=1e-10)
    assert s.coefficient("heat^2", 1) == pytest.approx(-0.5, abs=1e-10)
    assert [t for t, _, _ in s.terms(1)] == ["heat^2"]
    # closed-form partial dependence over the forcing's training range: −0.5·v² for m_q1
    pd = reading.partial
    grid = np.linspace(u.min(), u.max(), pd.grid.shape[1])
    np.testing.assert_allclose(pd.curves[2, :, 1], -0.5 * grid ** 2, rtol=1e-12)
