"""Closures with memory: contract, hidden dynamics against exact solutions, gradients three ways,
and the demo's true wall law reproduced by a hand-initialised recurrent closure.

Outside references: scipy.linalg.expm (linear ODE solution), scipy.signal.lsim (driven
linear filter), numpy.linalg.eigvals (spectral radius), scipy.integrate.solve_ivp (truth
trajectories), torch.autograd.gradcheck and central finite differences (gradients),
torchdiffeq's adjoint method (a second way to backpropagate).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from scipy.integrate import solve_ivp
from scipy.linalg import expm
from scipy.signal import lsim

from mnemode.closures import GRUFlowClosure, RecurrentClosure, ReservoirClosure
from mnemode.errors import ConfigError
from mnemode.hybrid import HybridField, HybridFlowMap, simulate, warm_up
from mnemode.solvers import RK4, Adaptive, Euler
from mnemode.systems import thermosyphon

torch.set_num_threads(1)

CONTINUOUS = [
    lambda: RecurrentClosure(3, hidden_size=4, form="leaky"),
    lambda: RecurrentClosure(3, hidden_size=4, form="tanh", readout="mlp", readout_width=8),
    lambda: RecurrentClosure(3, hidden_size=4, form="gated", initial_hidden="learned"),
    lambda: RecurrentClosure(3, hidden_size=6, form="leaky", input_init="filter_bank", coupling=False),
    lambda: ReservoirClosure(3, kind="filter_bank"),
    lambda: ReservoirClosure(3, hidden_size=10, kind="random", quadratic=True),
]
IDS = ["leaky", "tanh-mlp", "gated-learned", "leaky-bank-uncoupled", "filter-bank", "random-quadratic"]


def _randomise(closure: torch.nn.Module, seed: int = 1) -> None:
    """Give every parameter and the scaling a non-trivial value (a fitted-looking closure)."""
    gen = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for p in closure.parameters():
            p.add_(0.1 * torch.randn(p.shape, generator=gen, dtype=p.dtype))
        closure.scaling.set(in_mean=[1.0, -2.0, 30.0], in_std=[8.0, 9.0, 7.0],
                            out_offset=[0.5, 1.0, 20.0], out_scale=[0.1, 3.0, 4.0])


# -- contract ------------------------------------------------------------------------------

@pytest.mark.parametrize("make", CONTINUOUS, ids=IDS)
@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_shapes_dtypes_and_reload(make, dtype):
    before = torch.get_rng_state()
    closure = make().to(dtype)
    assert torch.equal(before, torch.get_rng_state()), "construction must not draw from the global RNG"
    _randomise(closure)
    x = torch.randn(2, 5, 3, dtype=dtype) * 8 + torch.tensor([0.0, 0.0, 40.0], dtype=dtype)
    r = torch.randn(2, 5, closure.hidden_size, dtype=dtype)
    m, g = closure.correction(x, r), closure.hidden_field(x, r)
    assert m.shape == (2, 5, 3) and g.shape == (2, 5, closure.hidden_size)
    assert m.dtype == dtype and g.dtype == dtype
    assert closure.initial_hidden((2, 5), dtype).shape == (2, 5, closure.hidden_size)
    # batching: one sample alone gives the same answer as inside the batch
    torch.testing.assert_close(closure.correction(x[1, 3], r[1, 3]), m[1, 3])
    # a closure rebuilt from the same hyper-parameters accepts the fitted tensors
    fresh = make().to(dtype)
    fresh.load_state_dict(closure.state_dict())
    torch.testing.assert_close(fresh.correction(x, r), m, rtol=0, atol=0)
    torch.testing.assert_close(fresh.hidden_field(x, r), g, rtol=0, atol=0)


def test_gru_flow_closure_contract_and_equations():
    closure = GRUFlowClosure(3, hidden_size=5).double()
    _randomise(closure)
    assert closure.discrete
    x = torch.randn(4, 3, dtype=torch.float64) * 8
    r = torch.randn(4, 5, dtype=torch.float64)
    # reference: the gated recurrent unit written out in numpy (Cho et al., EMNLP 2014, in the
    # reset-after-matmul form torch documents for nn.GRUCell)
    c = closure.cell
    xt = ((x - closure.scaling.in_mean) / closure.scaling.in_std).numpy()
    w_ih, w_hh = c.weight_ih.detach().numpy(), c.weight_hh.detach().numpy()
    b_ih, b_hh = c.bias_ih.detach().numpy(), c.bias_hh.detach().numpy()
    gi, gh = xt @ w_ih.T + b_ih, r.numpy() @ w_hh.T + b_hh
    H = 5
    sig = lambda a: 1 / (1 + np.exp(-a))  # noqa: E731
    reset, update = sig(gi[:, :H] + gh[:, :H]), sig(gi[:, H:2 * H] + gh[:, H:2 * H])
    new = np.tanh(gi[:, 2 * H:] + reset * gh[:, 2 * H:])
    expected = (1 - update) * new + update * r.numpy()
    np.testing.assert_allclose(closure.hidden_field(x, r).detach().numpy(), expected, rtol=1e-12, atol=1e-12)
    # batched leading shape
    assert closure.hidden_field(x.reshape(2, 2, 3), r.reshape(2, 2, 5)).shape == (2, 2, 5)
    model = HybridFlowMap(None, closure, 3, dt=0.1)
    xs = simulate(model, x, 3, 0.1)
    assert xs.shape == (4, 4, 3)
    # x_{n+1} = x_n + Δt·m(x_n, r_n) without physics
    torch.testing.assert_close(xs[1], x + 0.1 * closure.correction(x, closure.initial_hidden((4,), torch.float64)))


def test_bad_options_raise_config_errors():
    with pytest.raises(ConfigError, match="form"):
        RecurrentClosure(3, form="lstm")
    with pytest.raises(ConfigError, match="multiple"):
        RecurrentClosure(3, hidden_size=8, input_init="filter_bank")
    with pytest.raises(ConfigError, match="time_constants"):
        RecurrentClosure(3, time_constants=(1.0, 0.1))
    with pytest.raises(ConfigError, match="multiple"):
        ReservoirClosure(3, hidden_size=10, kind="filter_bank")
    with pytest.raises(ConfigError, match="hidden state r"):
        RecurrentClosure(3).correction(torch.zeros(3))


# -- hidden dynamics against exact solutions ------------------------------------------------------

def test_leaky_hidden_field_matches_matrix_exponential():
    """Driven by a constant input, dr/dt = A r + B x̃ + b has the closed form
    r(t) = e^{At} r0 + A⁻¹(e^{At} − I)(B x̃ + b)  (reference: scipy.linalg.expm)."""
    closure = RecurrentClosure(3, hidden_size=4, form="leaky", seed=3).double()
    _randomise(closure, seed=4)
    model = HybridField(None, closure, 3)
    x = torch.tensor([[2.0, -1.0, 35.0]], dtype=torch.float64)
    T, n = 1.5, 30
    history = x.expand(n + 1, 1, 3)
    r0 = torch.tensor([[0.3, -0.2, 0.5, 0.1]], dtype=torch.float64)
    with torch.no_grad():
        r = warm_up(model, history, T / n, RK4(0.005), r0=r0)
    A = closure.A.detach().numpy()
    drive = (closure.B @ closure.scaling.inputs(x)[0] + closure.b).detach().numpy()
    E = expm(A * T)
    exact = E @ r0[0].numpy() + np.linalg.solve(A, (E - np.eye(4)) @ drive)
    np.testing.assert_allclose(r[0].numpy(), exact, rtol=1e-9, atol=1e-10)


def test_filter_bank_matches_lsim_with_interpolated_input():
    """Each integrator is the filter 1/(τ s + 1) of its input; warm_up interpolates the samples
    linearly, as scipy.signal.lsim does (reference: scipy.signal.lsim)."""
    closure = ReservoirClosure(1, hidden_size=4, kind="filter_bank", time_constants=(0.05, 2.0)).double()
    model = HybridField(None, closure, 1)
    dt = 0.05
    t = np.arange(0, 6 + 1e-9, dt)
    u = np.sin(2.1 * t) + 0.5 * np.cos(0.7 * t)
    history = torch.as_tensor(u, dtype=torch.float64)[:, None, None]
    with torch.no_grad():
        r = warm_up(model, history, dt, RK4(0.005))
    for k, tau in enumerate((1.0 / closure.inv_tau).tolist()):
        _, y, _ = lsim(([1.0], [tau, 1.0]), u, t, interp=True)
        assert abs(r[0, k].item() - y[-1]) < 1e-7, (tau, r[0, k].item(), y[-1])


def test_random_reservoir_spectral_radius():
    closure = ReservoirClosure(3, hidden_size=40, kind="random", spectral_radius=0.7, seed=5)
    # reference: numpy.linalg.eigvals
    radius = np.abs(np.linalg.eigvals(closure.W.double().numpy())).max()
    assert abs(radius - 0.7) < 1e-5


# -- gradients three ways -------------------------------------------------------------------------

class _Unroll(torch.nn.Module):
    """A short unroll as a module, so torch.func.functional_call can substitute the parameters."""

    def __init__(self, model, solver, n_steps, dt):
        super().__init__()
        self.model, self.solver, self.n_steps, self.dt = model, solver, n_steps, dt

    def forward(self, x0, r0):
        return simulate(self.model, x0, self.n_steps, self.dt, self.solver, r0=r0)


def _unroll_fn(closure, solver, n_steps=4, dt=0.05):
    """Observed trajectory of a short unroll as a function of the closure's parameters."""
    unroll = _Unroll(HybridField(thermosyphon().nominal, closure, 3), solver, n_steps, dt)
    names = [f"model.closure.{n}" for n, _ in closure.named_parameters()]
    x0 = torch.tensor([[1.0, 2.0, 30.0], [-3.0, 1.0, 45.0]], dtype=torch.float64)
    r0 = torch.full((2, closure.hidden_size), 0.2, dtype=torch.float64)

    def fn(*params):
        return torch.func.functional_call(unroll, dict(zip(names, params)), (x0, r0))

    return fn, tuple(p.detach().clone().requires_grad_(True) for p in closure.parameters())


@pytest.mark.parametrize("options", [dict(form="leaky"), dict(form="leaky", coupling=False),
                                     dict(form="tanh", readout="mlp"), dict(form="gated")],
                         ids=["leaky", "leaky-uncoupled", "tanh-mlp", "gated"])
def test_gradcheck_through_rk4_unroll(options):
    # reference: torch.autograd.gradcheck (analytical Jacobian against numerical differences), float64
    closure = RecurrentClosure(3, hidden_size=2, readout_width=4, seed=2, **options).double()
    _randomise(closure)
    fn, params = _unroll_fn(closure, RK4(0.05), n_steps=3)
    assert torch.autograd.gradcheck(fn, params, eps=1e-6, atol=1e-6, rtol=1e-5)


def test_euler_unroll_gradient_matches_central_differences():
    # reference: central finite differences (L(θ + h e_i) − L(θ − h e_i)) / 2h, error O(h²)
    closure = RecurrentClosure(3, hidden_size=3, form="leaky", seed=6).double()
    _randomise(closure, seed=7)
    fn, params = _unroll_fn(closure, Euler(0.01), n_steps=10, dt=0.02)

    def loss(*ps):
        return (fn(*ps) ** 2).sum()

    grads = torch.autograd.grad(loss(*params), params)
    h = 1e-6
    with torch.no_grad():
        for p, g in zip(params, grads):
            flat = p.view(-1)
            for i in range(flat.numel()):
                old = flat[i].item()
                flat[i] = old + h
                up = loss(*params).item()
                flat[i] = old - h
                down = loss(*params).item()
                flat[i] = old
                fd = (up - down) / (2 * h)
                assert abs(fd - g.reshape(-1)[i].item()) <= 1e-5 * max(1.0, abs(fd)), (fd, g.reshape(-1)[i].item())


def test_direct_and_adjoint_gradients_agree():
    # two ways to backpropagate through torchdiffeq's dopri5: through the solver's operations,
    # and by the adjoint method (Chen et al., NeurIPS 2018); tolerances tight so both are accurate
    grads = []
    for adjoint in (False, True):
        closure = RecurrentClosure(3, hidden_size=2, form="tanh", seed=8).double()
        _randomise(closure, seed=9)
        model = HybridField(thermosyphon().nominal, closure, 3)
        x0 = torch.tensor([[1.0, 2.0, 30.0]], dtype=torch.float64)
        solver = Adaptive("dopri5", rtol=1e-10, atol=1e-12, adjoint=adjoint)
        xs = simulate(model, x0, 3, 0.1, solver, r0=torch.full((1, 2), 0.1, dtype=torch.float64))
        (xs ** 2).sum().backward()
        grads.append(torch.cat([p.grad.reshape(-1) for p in closure.parameters()]))
        assert solver.nfe > 0
    torch.testing.assert_close(grads[1], grads[0], rtol=1e-5, atol=1e-8)


# -- the demo's memory, known exactly -------------------------------------------------------------

TAU, BETA = 1.0, 1.0


def _true_wall_closure(dtype=torch.float64) -> RecurrentClosure:
    """dr/dt = (c·(Y, Z) − r)/τ with c = 1/(1+β); readout adds r to dY/dt and dZ/dt; identity scaling."""
    closure = RecurrentClosure(3, hidden_size=2, form="leaky", time_constants=(TAU, TAU)).to(dtype)
    c = 1.0 / (1.0 + BETA)
    with torch.no_grad():  # the leaky form is dr/dt = λ ⊙ (A_rel r + B_rel x̃ + b_rel), λ = 1/τ
        closure.A_rel.copy_(-torch.eye(2))
        closure.B_rel.zero_()
        closure.B_rel[0, 1] = closure.B_rel[1, 2] = c
        closure.b_rel.zero_()
        closure.C.zero_()
        closure.C[1, 0] = closure.C[2, 1] = 1.0
        closure.D.zero_()
        closure.c.zero_()
    assert torch.allclose(closure.A, -torch.eye(2, dtype=dtype) / TAU)
    return closure


@pytest.fixture(scope="module")
def wall_data(trajectories):
    return trajectories("thermosyphon", {"wall_response_time": TAU, "conductance_ratio": BETA}, n_trajectories=2,
                        duration=12.0, dt=0.02, solver_step=0.005, seed=3, spin_up=20.0)


def test_true_wall_law_reproduces_truth_trajectories(wall_data):
    system, data = wall_data
    model = HybridField(system.nominal, _true_wall_closure(), 3)
    x0 = torch.as_tensor(data.states[0])
    r0 = torch.as_tensor(data.hidden[0])
    n = 250  # 5 time units
    with torch.no_grad():
        xs, rs = simulate(model, x0, n, 0.02, RK4(0.005), r0=r0, return_hidden=True)
    # same solver and step as the generator: the equations are the same, so only round-off differs
    np.testing.assert_allclose(xs.numpy(), data.states[: n + 1], rtol=0, atol=1e-8)
    np.testing.assert_allclose(rs.numpy(), data.hidden[: n + 1], rtol=0, atol=1e-8)

    # reference: scipy's DOP853 on the truth equations written out here (thermosyphon docstring)
    sigma, ray, c = 6.0, 50.0, 1.0 / (1.0 + BETA)

    def truth(t, z):
        X, Y, Z, P, Q = z
        return [sigma * (Y - X), ray * X - X * Z - Y + P, X * Y - Z + Q, (c * Y - P) / TAU, (c * Z - Q) / TAU]

    t_eval = np.arange(n + 1) * 0.02
    ref = []
    for b in range(2):
        z0 = np.concatenate((data.states[0, b], data.hidden[0, b]))
        sol = solve_ivp(truth, (0, t_eval[-1]), z0, method="DOP853", rtol=1e-12, atol=1e-12, t_eval=t_eval)
        ref.append(sol.y[:3].T)
    ref = np.stack(ref, axis=1)
    # to solver accuracy: the difference is RK4's own error, so it shrinks ~2⁴ when the step halves
    err = {}
    for h in (0.01, 0.005):
        with torch.no_grad():
            err[h] = np.abs(simulate(model, x0, n, 0.02, RK4(h), r0=r0).numpy() - ref).max()
    assert err[0.005] < 5e-6, err
    assert err[0.01] / err[0.005] > 10, err


def test_warm_up_forgets_the_initial_hidden_state_at_the_wall_rate(wall_data):
    """Driven by the observed x, the error of the hidden state decays like e^{−T/τ} (linear ODE)."""
    system, data = wall_data
    model = HybridField(system.nominal, _true_wall_closure(), 3)
    history = torch.as_tensor(data.states)
    errs = {}
    for T in (1.0, 2.0, 3.0):
        n = int(round(T / 0.02))
        with torch.no_grad():
            r = warm_up(model, history[: n + 1], 0.02, RK4(0.005))  # starts from zeros
        errs[T] = np.abs(r.numpy() - data.hidden[n])
    init = np.abs(data.hidden[0])
    for T, e in errs.items():
        # the residual left is the initial error times e^{−T/τ}, up to the small error of driving
        # with linearly interpolated samples instead of the continuous x
        np.testing.assert_allclose(e, init * math.exp(-T / TAU), rtol=0.02, atol=0.02)
