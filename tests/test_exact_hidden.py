"""Exact (exponential) stepping of the leaky-linear hidden field against scipy and against RK4.

Outside references used here:
- scipy.integrate.solve_ivp (DOP853, rtol 1e-12, atol 1e-14) of dr/dt = A r + B z(t) + b with z
  linear between samples;
- scipy.linalg.expm for e^{AΔ};
- the order of the classical RK4 method (errors fall as Δ⁴; Hairer, Nørsett & Wanner §II.1).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.integrate import solve_ivp
from scipy.linalg import expm

from mnemode.closures import RecurrentClosure
from mnemode.errors import ConfigError
from mnemode.hybrid import HybridField, warm_up
from mnemode.solvers import RK4


def _closure(coupling: bool, forcing_dim: int = 0) -> RecurrentClosure:
    previous = torch.get_default_dtype()
    torch.set_default_dtype(torch.float64)
    try:
        c = RecurrentClosure(3, hidden_size=6, form="leaky", coupling=coupling, time_constants=(0.2, 5.0),
                             forcing_dim=forcing_dim, seed=3)
    finally:
        torch.set_default_dtype(previous)
    g = torch.Generator().manual_seed(4)
    with torch.no_grad():
        if coupling:
            c.A_rel.add_(0.3 * torch.randn(c.A_rel.shape, generator=g, dtype=torch.float64))
        else:
            c.log_rate.add_(0.2 * torch.randn(c.log_rate.shape, generator=g, dtype=torch.float64))
        c.b_rel.normal_(0, 0.5, generator=g)
        n = 3 + forcing_dim
        c.scaling.set(in_mean=np.linspace(-1, 1, n), in_std=np.linspace(0.5, 2, n))
    return c


def _scipy_warm_up(c: RecurrentClosure, history: np.ndarray, dt: float, r0: np.ndarray) -> np.ndarray:
    A, B, b = (t.detach().numpy() for t in (c.A, c.B, c.b))
    mean, std = c.scaling.in_mean.numpy(), c.scaling.in_std.numpy()
    z = (history - mean) / std  # (T, n)
    T = z.shape[0]

    def rhs(t, r, i):
        w = t / dt - i
        zt = z[i] * (1 - w) + z[i + 1] * w
        return A @ r + B @ zt + b

    # one solve per interval: z(t) has a kink at every sample, which a step must not straddle
    out = [np.asarray(r0, dtype=np.float64)]
    for i in range(T - 1):
        sol = solve_ivp(rhs, (i * dt, (i + 1) * dt), out[-1], method="DOP853", rtol=1e-12, atol=1e-14, args=(i,))
        out.append(sol.y[:, -1])
    return np.stack(out)


@pytest.mark.parametrize("coupling", [True, False])
def test_exact_warm_up_matches_scipy(coupling):
    c = _closure(coupling)
    rng = np.random.default_rng(0)
    history = np.cumsum(rng.normal(size=(41, 3)), axis=0) * 0.3
    dt = 0.05
    r0 = rng.normal(size=6)
    ref = _scipy_warm_up(c, history, dt, r0)
    with torch.no_grad():
        got = c.exact_warm_up(torch.as_tensor(history)[:, None], dt, r0=torch.as_tensor(r0)[None],
                              return_all=True)[:, 0].numpy()
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-9)
    # the propagator itself against scipy's matrix exponential
    E, _, _ = c.exact_propagators(dt)
    np.testing.assert_allclose(E.detach().numpy(), expm(c.A.detach().numpy() * dt), rtol=0, atol=1e-13)


def test_rk4_warm_up_converges_to_exact_at_fourth_order():
    c = _closure(True)
    model = HybridField(None, c, 3)
    rng = np.random.default_rng(1)
    history = torch.as_tensor(np.cumsum(rng.normal(size=(21, 4, 3)), axis=0) * 0.3)
    dt = 0.1
    with torch.no_grad():
        exact = c.exact_warm_up(history, dt)
        errs = [float((warm_up(model, history, dt, RK4(dt / k), exact=False) - exact).abs().max()) for k in (1, 2, 4)]
    slopes = np.log2(np.array(errs[:-1]) / np.array(errs[1:]))
    assert np.all(slopes > 3.7), (errs, slopes)


def test_exact_step_with_forcing_and_gradients():
    c = _closure(False, forcing_dim=1)
    g = torch.Generator().manual_seed(5)
    x = torch.randn(2, 5, 3, dtype=torch.float64, generator=g)
    u = torch.randn(2, 5, 1, dtype=torch.float64, generator=g)
    r = torch.randn(5, 6, dtype=torch.float64, generator=g)
    one = c.exact_hidden_step(x[0], x[1], r, 0.05, u[0], u[1])
    via_warm_up = c.exact_warm_up(x, 0.05, r0=r, forcing=u)
    torch.testing.assert_close(one, via_warm_up, rtol=0, atol=1e-14)
    # differentiable: the gradient of a scalar of the final state against central finite differences
    p = c.log_rate
    direction = torch.randn(p.shape, dtype=p.dtype, generator=g)
    (grad,) = torch.autograd.grad(via_warm_up.square().sum(), p)
    eps = 1e-6
    with torch.no_grad():
        p.add_(eps * direction)
        up = float(c.exact_warm_up(x, 0.05, r0=r, forcing=u).square().sum())
        p.sub_(2 * eps * direction)
        down = float(c.exact_warm_up(x, 0.05, r0=r, forcing=u).square().sum())
        p.add_(eps * direction)
    assert abs((up - down) / (2 * eps) - float((grad * direction).sum())) < 1e-6


def test_exact_stepping_needs_leaky_form():
    c = RecurrentClosure(3, hidden_size=4, form="tanh")
    with pytest.raises(ConfigError, match="leaky"):
        c.exact_propagators(0.1)
