"""Solvers against exact solutions, scipy's DOP853 and the textbook Runge–Kutta formulas.

Outside references used here:
- exact solutions of linear ODEs (y' = −y + sin t; the harmonic oscillator);
- the classical RK4 Butcher tableau and its stability function
  R(z) = 1 + z + z²/2 + z³/6 + z⁴/24 (Hairer, Nørsett & Wanner, *Solving ODEs I*, §II.1;
  Hairer & Wanner, *Solving ODEs II*, §IV.2);
- scipy.integrate.solve_ivp with DOP853 at rtol 1e-10, atol 1e-12;
- torch.autograd.gradcheck (central finite differences).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from scipy.integrate import solve_ivp

from mnemode.errors import MnemodeError
from mnemode.solvers import (RK4, Adaptive, CountingField, Euler, FlowMap, StepBudgetExceeded,
                             substeps_for)
from mnemode.systems import Lorenz63Field


# -- problems with exact solutions ---------------------------------------------------

class ForcedDecay(torch.nn.Module):
    """y' = −y + sin t; with y(0) = y0: y(t) = (sin t − cos t)/2 + (y0 + 1/2) e^{−t}."""

    def forward(self, t, y):
        return -y + torch.sin(torch.as_tensor(t, dtype=y.dtype))

    @staticmethod
    def exact(t, y0):
        t = np.asarray(t, dtype=np.float64)
        return (np.sin(t) - np.cos(t)) / 2 + (y0 + 0.5) * np.exp(-t)


class Oscillator(torch.nn.Module):
    """(q, p)' = (p, −ω² q); exact solution a rotation in phase space."""

    def __init__(self, omega: float = 2.0):
        super().__init__()
        self.omega = omega

    def forward(self, t, y):
        return torch.stack((y[..., 1], -self.omega ** 2 * y[..., 0]), dim=-1)

    def exact(self, t, y0):
        t = np.asarray(t, dtype=np.float64)[:, None]
        q0, p0 = y0
        w = self.omega
        return np.concatenate((q0 * np.cos(w * t) + p0 / w * np.sin(w * t),
                               -q0 * w * np.sin(w * t) + p0 * np.cos(w * t)), axis=1)


def _max_error(solver_cls, problem, y0, horizon, n):
    h = horizon / n
    out = solver_cls(h).unroll(problem, torch.tensor(y0, dtype=torch.float64), 0.0, h, n)
    exact = problem.exact(np.arange(n + 1) * h, y0)
    return float(np.max(np.abs(out.numpy().reshape(exact.shape) - exact)))


@pytest.mark.parametrize("solver_cls, order, counts", [
    (Euler, 1, (20, 40, 80, 160)),
    (RK4, 4, (10, 20, 40, 80)),
])
@pytest.mark.parametrize("problem, y0", [
    (ForcedDecay(), 1.0),
    (Oscillator(2.0), (1.0, 0.5)),
])
def test_convergence_order(solver_cls, order, counts, problem, y0):
    # Declared order = slope of log(max error) against log(step) on a problem with an
    # exact solution (standard convergence test; Hairer, Nørsett & Wanner, Solving ODEs I, §II.1).
    horizon = 2.0
    errors = [_max_error(solver_cls, problem, y0, horizon, n) for n in counts]
    steps = [horizon / n for n in counts]
    slope = np.polyfit(np.log(steps), np.log(errors), 1)[0]
    assert abs(slope - order) < 0.3, (slope, errors)
    assert errors[-1] < errors[0]


def _textbook_rk4_step(f, t, y, h):
    # Classical RK4 Butcher tableau (Hairer, Nørsett & Wanner, Solving ODEs I, Table II.1.1),
    # written out independently of mnemode.solvers.
    a = [[], [0.5], [0.0, 0.5], [0.0, 0.0, 1.0]]
    b = [1 / 6, 1 / 3, 1 / 3, 1 / 6]
    c = [0.0, 0.5, 0.5, 1.0]
    ks = []
    for i in range(4):
        yi = y + h * sum((aij * k for aij, k in zip(a[i], ks)), torch.zeros_like(y))
        ks.append(f(t + c[i] * h, yi))
    return y + h * sum(bi * k for bi, k in zip(b, ks))


def _textbook_euler_step(f, t, y, h):
    return y + h * f(t, y)


@pytest.mark.parametrize("interval, step, expected", [
    (0.1, 0.03, 4), (0.1, 0.025, 4), (0.3, 0.1, 3), (0.7, 0.1, 7), (0.01, 0.1, 1), (1.0, 1 / 3, 3),
    (0.1, 0.1, 1), (0.2, 0.05, 4),
])
def test_substeps_for_is_ceiling(interval, step, expected):
    # Fewest equal sub-steps no longer than `step`: ceil(interval / step), robust to the
    # rounding of exact multiples (0.3/0.1 = 2.9999999999999996 in binary floating point).
    assert substeps_for(interval, step) == expected
    assert interval / expected <= step * (1 + 1e-12)


@pytest.mark.parametrize("solver_cls, manual, stages", [(Euler, _textbook_euler_step, 1),
                                                         (RK4, _textbook_rk4_step, 4)])
def test_advance_uses_equal_substeps(solver_cls, manual, stages):
    # An interval longer than the step is covered by ceil(interval/step) equal sub-steps;
    # compared with textbook steps taken by hand on a non-autonomous field (so the
    # sub-step times matter too).
    f = CountingField(ForcedDecay())
    y0 = torch.tensor([0.3, -1.2], dtype=torch.float64)
    t0, interval, step = 0.2, 0.1, 0.03
    n = math.ceil(interval / step)
    got = solver_cls(step).advance(f, t0, y0, interval)
    assert f.nfe == n * stages
    y = y0
    for i in range(n):
        y = manual(ForcedDecay(), t0 + i * interval / n, y, interval / n)
    torch.testing.assert_close(got, y, rtol=1e-14, atol=1e-14)


def test_backward_integration_substeps():
    # A negative interval integrates backwards with sub-steps no longer than `step`:
    # from the exact y(2) back to t = 0 it recovers the exact y(0) to RK4 accuracy.
    f = ForcedDecay()
    y2 = torch.tensor(ForcedDecay.exact(2.0, 1.0), dtype=torch.float64)
    back = RK4(0.01).advance(f, 2.0, y2, -2.0)
    assert abs(float(back) - 1.0) < 1e-8


def test_unroll_and_integrate_grids():
    f = ForcedDecay()
    y0 = torch.tensor(1.0, dtype=torch.float64)
    out = RK4(0.01).unroll(f, y0, 0.0, 0.1, 20)
    assert out.shape == (21,)
    # Exact solution (see ForcedDecay).
    np.testing.assert_allclose(out.numpy(), ForcedDecay.exact(np.arange(21) * 0.1, 1.0), atol=1e-9)
    times = [0.0, 0.05, 0.3, 0.31, 1.7]
    out = RK4(0.01).integrate(f, y0, torch.tensor(times))
    np.testing.assert_allclose(out.numpy(), ForcedDecay.exact(times, 1.0), atol=1e-9)
    with pytest.raises(ValueError):
        RK4(0.01).integrate(f, y0, [0.0, 0.5, 0.5])
    with pytest.raises(ValueError):
        RK4(0.0)


@pytest.mark.parametrize("solver_cls", [Euler, RK4])
def test_batched_leading_dims_match_single_runs(solver_cls):
    f = Oscillator(1.5)
    gen = torch.Generator().manual_seed(0)
    y0 = torch.randn(2, 3, 2, generator=gen, dtype=torch.float64)
    out = solver_cls(0.05).unroll(f, y0, 0.0, 0.2, 10)
    assert out.shape == (11, 2, 3, 2)
    for i in range(2):
        for j in range(3):
            single = solver_cls(0.05).unroll(f, y0[i, j], 0.0, 0.2, 10)
            torch.testing.assert_close(out[:, i, j], single, rtol=1e-13, atol=1e-13)


@pytest.mark.parametrize("solver_cls", [Euler, RK4])
def test_float32_and_float64(solver_cls):
    f = Lorenz63Field()
    y64 = torch.tensor([[1.0, 1.0, 20.0], [-3.0, 2.0, 25.0]], dtype=torch.float64)
    out64 = solver_cls(0.005).unroll(f, y64, 0.0, 0.05, 10)
    out32 = solver_cls(0.005).unroll(f, y64.float(), 0.0, 0.05, 10)
    assert out64.dtype == torch.float64 and out32.dtype == torch.float32
    # Over half a time unit rounding (eps32 ≈ 1.2e-7, states ≈ 30) grows only mildly.
    torch.testing.assert_close(out32.double(), out64, rtol=1e-4, atol=1e-4)


@pytest.mark.parametrize("solver_cls, stability", [
    # Stability functions: Euler R(z) = 1 + z; RK4 R(z) = 1 + z + z²/2 + z³/6 + z⁴/24
    # (Hairer & Wanner, Solving ODEs II, §IV.2). For y' = −y + g(t), dy_n/dy_0 = R(−h)^n exactly.
    (Euler, lambda z: 1 + z),
    (RK4, lambda z: 1 + z + z ** 2 / 2 + z ** 3 / 6 + z ** 4 / 24),
])
def test_gradient_is_stability_function_power(solver_cls, stability):
    # Two intervals of 0.85 with step 0.1: 9 equal sub-steps of 0.85/9 each, 18 in all.
    y0 = torch.tensor([0.7, -0.2], dtype=torch.float64, requires_grad=True)
    out = solver_cls(0.1).unroll(ForcedDecay(), y0, 0.0, 0.85, 2)
    assert out.shape == (3, 2) and out.requires_grad
    out[-1].sum().backward()
    np.testing.assert_allclose(y0.grad.numpy(), [stability(-0.85 / 9) ** 18] * 2, rtol=1e-12)


def test_gradcheck_through_substeps():
    # Gradient w.r.t. the state and a field parameter against central finite
    # differences (torch.autograd.gradcheck, float64).
    def run(y0, rate):
        f = lambda t, y: torch.stack((y[..., 1], -rate * y[..., 0] - 0.1 * y[..., 1] ** 3), dim=-1)
        return RK4(0.07).advance(f, 0.0, y0, 0.5)

    y0 = torch.tensor([[0.5, -0.3], [1.0, 0.2]], dtype=torch.float64, requires_grad=True)
    rate = torch.tensor(2.0, dtype=torch.float64, requires_grad=True)
    assert torch.autograd.gradcheck(run, (y0, rate))


@pytest.mark.parametrize("solver_cls", [Euler, RK4])
def test_fixed_step_loop_has_no_host_sync(solver_cls):
    # Meta tensors carry shapes but no data: any .item(), bool() or .tolist() inside the
    # loop raises. vmap likewise refuses data-dependent host reads.
    f = Lorenz63Field()
    y0 = torch.empty(4, 3, dtype=torch.float64, device="meta")
    out = solver_cls(0.01).unroll(f, y0, 0.0, 0.05, 6)
    assert out.shape == (7, 4, 3) and out.device.type == "meta"
    y0 = torch.tensor([[1.0, 1.0, 20.0], [-3.0, 2.0, 25.0]], dtype=torch.float64)
    batched = torch.func.vmap(lambda y: solver_cls(0.01).advance(f, 0.0, y, 0.05))(y0)
    torch.testing.assert_close(batched, solver_cls(0.01).advance(f, 0.0, y0, 0.05))


def test_flow_map_of_oscillator_is_rotation():
    # Exact flow of the harmonic oscillator (a rotation in phase space).
    f = Oscillator(2.0)
    psi = FlowMap(f, 0.3, RK4(0.01))
    x = torch.tensor([[1.0, 0.5], [-0.2, 0.7]], dtype=torch.float64)
    for row in range(2):
        np.testing.assert_allclose(psi(x)[row].numpy(), f.exact([0.3], x[row].tolist())[0], atol=1e-10)


# -- agreement with scipy on Lorenz-63 --------------------------------------------------

def _lorenz63_numpy(t, u, sigma=10.0, rho=28.0, beta=8.0 / 3.0):
    # Lorenz (1963) equations, written independently of mnemode.
    x, y, z = u
    return [sigma * (y - x), x * (rho - z) - y, x * y - beta * z]


@pytest.fixture(scope="module")
def lorenz_reference():
    # Starting states away from the saddle at the origin: from some others (e.g. (−5, 3, 30))
    # even DOP853 at rtol 1e-10 differs from itself at rtol 1e-13 by 1e-5 within 2 time units.
    y0 = np.array([[1.0, 1.0, 20.0], [5.0, -2.0, 15.0], [3.0, 8.0, 30.0]])
    times = np.linspace(0.0, 2.0, 21)
    # Reference: scipy DOP853 at rtol 1e-10, atol 1e-12.
    ref = np.stack([solve_ivp(_lorenz63_numpy, (0.0, 2.0), y, method="DOP853", rtol=1e-10, atol=1e-12,
                              t_eval=times).y.T for y in y0], axis=1)
    return y0, times, ref


def test_rk4_matches_dop853_on_lorenz63(lorenz_reference):
    y0, times, ref = lorenz_reference
    out = RK4(0.001).integrate(Lorenz63Field(), torch.tensor(y0), times).numpy()
    # RK4 global error at h = 1e-3 over 2 time units is ≈ 1e-7 (measured); 1e-6 leaves room.
    np.testing.assert_allclose(out, ref, rtol=0, atol=1e-6)
    coarse = RK4(0.02).integrate(Lorenz63Field(), torch.tensor(y0), times).numpy()
    assert np.abs(coarse - ref).max() > 1e-5  # the comparison can tell a coarse step apart


def test_adaptive_matches_dop853_on_lorenz63(lorenz_reference):
    y0, times, ref = lorenz_reference
    solver = Adaptive("dopri5", rtol=1e-10, atol=1e-12)
    out = solver.integrate(Lorenz63Field(), torch.tensor(y0), times)
    assert out.shape == (21, 3, 3)
    np.testing.assert_allclose(out.numpy(), ref, rtol=0, atol=1e-6)
    assert solver.nfe > 0
    unrolled = solver.unroll(Lorenz63Field(), torch.tensor(y0), 0.0, 0.1, 20)
    np.testing.assert_allclose(unrolled.numpy(), ref, rtol=0, atol=1e-6)


def test_adaptive_step_budget_raises():
    solver = Adaptive("dopri5", rtol=1e-10, atol=1e-12, max_steps=5)
    y0 = torch.tensor([1.0, 1.0, 20.0], dtype=torch.float64)
    with pytest.raises(StepBudgetExceeded) as info:
        solver.integrate(Lorenz63Field(), y0, [0.0, 2.0])
    assert isinstance(info.value, MnemodeError) and isinstance(info.value, RuntimeError)
    assert "max_steps=5" in str(info.value) and "Fix:" in str(info.value)
    # A generous budget finishes the same integration.
    Adaptive("dopri5", rtol=1e-10, atol=1e-12, max_steps=100_000).integrate(Lorenz63Field(), y0, [0.0, 2.0])


def test_adaptive_adjoint_gradient_matches_direct():
    # Two ways of backpropagating (through the solver's operations and by the adjoint
    # ODE) must give the same gradient (common practice; torchdiffeq's own gradient tests).
    def grad(adjoint):
        y0 = torch.tensor([1.0, 1.0, 20.0], dtype=torch.float64, requires_grad=True)
        out = Adaptive("dopri5", rtol=1e-9, atol=1e-11, adjoint=adjoint).advance(Lorenz63Field(), 0.0, y0, 0.5)
        out.pow(2).sum().backward()
        return y0.grad

    torch.testing.assert_close(grad(True), grad(False), rtol=1e-5, atol=1e-5)
