"""Reading a learned correction on Lorenz-63 with ρ 5 % low in the physics.

Truth: Lorenz (1963), σ = 10, ρ = 28, β = 8/3. The nominal model has ρ = 0.95·28,
so the missing term is 0.05·28·x = 1.4·x in dy/dt and nothing elsewhere. The
correction is learned with mnemode's own fitters, then read back; the flow maps
used as the reference for the discrete-versus-vector-field difference are
computed independently with scipy.integrate.solve_ivp.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch

from mnemode.closures import RandomFeatureClosure
from mnemode.data import generate
from mnemode.explain import read_correction, reading_markdown
from mnemode.fitting import DerivativeFit, FlowMapFit
from mnemode.hybrid import HybridField, HybridFlowMap
from mnemode.solvers import RK4, FlowMap
from mnemode.systems import lorenz63

SIGMA, RHO, BETA = 10.0, 28.0, 8.0 / 3.0   # Lorenz (1963)
MISSING = 0.05 * RHO                        # coefficient of x in dy/dt that the physics lacks

pytestmark = pytest.mark.slow


def _system():
    return lorenz63(nominal_rho=0.95 * RHO, spin_up=5.0)


def _data(system, dt, n_train, duration):
    train = generate(system, n_trajectories=n_train, duration=duration, dt=dt, seed=1)
    test = generate(system, n_trajectories=2, duration=duration, dt=dt, seed=2)
    return train, test


def _closure():
    previous = torch.get_default_dtype()
    torch.set_default_dtype(torch.float64)
    try:
        return RandomFeatureClosure(3, n_features=300)
    finally:
        torch.set_default_dtype(previous)


def test_fine_sampling_surrogate_recovers_the_missing_term():
    system = _system()
    train, test = _data(system, 0.01, 4, 20.0)
    model = HybridField(system.nominal, _closure(), 3)
    DerivativeFit().fit(model, train, None)
    reading = read_correction(model, test, train, state_units=system.state_units, time_unit=system.time_unit)
    s = reading.surrogate
    coef = s.coefficient("x", 1)
    assert abs(coef - MISSING) / MISSING < 0.02, coef
    # no other term, in any component, contributes above 1 % of the recovered term (contribution =
    # |coefficient| × rms of the term over the test samples, so the comparison is unit-free)
    main = s.contribution[s.library.term_names.index("x"), 1]
    others = s.contribution.copy()
    others[s.library.term_names.index("x"), 1] = 0.0
    assert others.max() < 0.01 * main, others.max() / main
    # the learned dy/dt correction tracks the finite-difference targets
    assert reading.comparisons[0].kind == "derivative" and reading.comparisons[0].r2[1] > 0.999
    assert "m_y (in dy/dt) = 1.4" in reading_markdown(reading)


def _flows(x0: np.ndarray, dt: float):
    """Truth and nominal flow maps over dt from every row of x0, by scipy's RK45."""
    from scipy.integrate import solve_ivp

    def field(rho):
        def f(t, s):
            x, y, z = s.reshape(-1, 3).T
            return np.stack([SIGMA * (y - x), x * (rho - z) - y, x * y - BETA * z], axis=1).reshape(-1)
        return f

    out = []
    for rho in (RHO, 0.95 * RHO):
        sol = solve_ivp(field(rho), (0.0, dt), x0.reshape(-1), method="RK45", rtol=1e-11, atol=1e-11)
        out.append(sol.y[:, -1].reshape(-1, 3))
    return out


def test_coarse_sampling_states_the_difference_and_the_flow_map_fit_recovers_the_term():
    dt = 0.1
    system = _system()
    train, test = _data(system, dt, 4, 30.0)
    model = HybridFlowMap(FlowMap(system.nominal, dt, RK4(dt / 10)), _closure(), 3, dt)
    FlowMapFit(target="discrete").fit(model, train, None)
    reading = read_correction(model, test, train, state_units=system.state_units, time_unit=system.time_unit)
    eq = reading.equivalent
    assert eq is not None
    coef = eq.fit.coefficient("x", 1)
    assert abs(coef - MISSING) / MISSING < 0.10, coef

    # reference size of the discrete-versus-vector-field difference from the known equations:
    # the exact interval-averaged correction (Ψ_truth − Ψ_nominal)/Δt against the term 1.4·x in dy/dt
    x = reading.surrogate_points[0][:, :3]
    truth, nominal = _flows(x, dt)
    averaged = (truth - nominal) / dt
    term = np.zeros_like(x)
    term[:, 1] = MISSING * x[:, 0]
    expected = np.sqrt(np.sum((averaged - term) ** 2) / np.sum(term ** 2))
    assert expected > 0.2  # at Δt = 0.1 the two readings really differ
    assert eq.overall_difference == pytest.approx(expected, rel=0.05), (eq.overall_difference, expected)

    text = reading_markdown(reading)
    assert "not a term of dx/dt" in text
    assert "Discrete-versus-vector-field difference" in text
    assert f"{100 * eq.overall_difference:.3g} %" in text
    assert "m_y (in dy/dt) = 1.4" in text
