"""The fast paths an unroll takes give the plain path's values and gradients.

* :meth:`HybridField.prepared` folds a closure's scalings and weights once per unroll
  (the leaky recurrent closure into one affine map of the state, the random-feature
  closure into two matrices); the speed issue asks that its gradients equal the plain
  field's to 1e-10 in float64.
* The uncoupled leaky closure's observation-driven warm-up is summed in closed form;
  it must equal the interval-by-interval recurrence and scipy's solution.

Outside references: scipy.integrate.solve_ivp (DOP853, rtol 1e-12) of the warm-up's
linear ODE, one solve per sample interval. The plain field is the other reference: the
fast path must change the cost, never the numbers (beyond rounding).
"""

from __future__ import annotations

import functools

import numpy as np
import pytest
import torch
from scipy.integrate import solve_ivp

from mnemode.closures import (PolynomialClosure, RandomFeatureClosure, RecurrentClosure, ReservoirClosure,
                              RingLocalClosure)
from mnemode.hybrid import AffineHybridField, HybridField, PreparedMemoryField, PreparedMemorylessField, warm_up
from mnemode.solvers import RK4
from mnemode.systems import lorenz96, thermosyphon


def _demo_scaling(c):
    """Input and output scalings of the demo's size (means, spreads and offsets far from 0 and 1)."""
    c.scaling.set(in_mean=[0.5, -1.0, 40.0], in_std=[8.0, 9.0, 7.0], out_offset=[0.0, 3.0, 20.0],
                  out_scale=[1.0, 4.0, 5.0])
    return c


def _fill_random(param: torch.Tensor, seed: int, scale: float) -> None:
    """Overwrite ``param`` with ``scale`` × standard normal draws from its own seed."""
    g = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        param.copy_(scale * torch.randn(param.shape, generator=g, dtype=torch.float64))


def _randomised_leaky(coupling: bool) -> RecurrentClosure:
    c = RecurrentClosure(3, hidden_size=9, form="leaky", coupling=coupling, input_init="filter_bank",
                         time_constants=(0.2, 3.0), seed=1, dtype="float64")
    g = torch.Generator().manual_seed(2)
    with torch.no_grad():
        for p in c.parameters():
            p.add_(0.1 * torch.randn(p.shape, generator=g, dtype=p.dtype))
    return _demo_scaling(c)


def _random_features() -> RandomFeatureClosure:
    c = RandomFeatureClosure(3, n_features=40, lengthscale=1.5, seed=4, dtype="float64")
    _fill_random(c.readout, seed=5, scale=1.0)
    return _demo_scaling(c)


def _unroll_loss(field, s0, n=40):
    traj = RK4(0.02).unroll(field, s0, 0.0, 0.02, n)
    return traj, (traj[..., :3] - 1.0).square().mean() + 1e-3 * traj.square().mean()


def _polynomial() -> PolynomialClosure:
    c = PolynomialClosure(3, degree=3, dtype="float64")
    _fill_random(c.readout, seed=6, scale=0.1)
    return _demo_scaling(c)


def _ring_of_cubics() -> RingLocalClosure:
    # as experiment=lorenz96_two_scale builds it: a cubic of five sites shared along a ring of 36
    c = RingLocalClosure(36, functools.partial(PolynomialClosure, degree=3), neighbours=2, dtype="float64")
    _fill_random(c.inner.readout, seed=7, scale=0.05)
    c.scaling.set(in_mean=[2.0] * 36, in_std=[3.5] * 36, out_offset=[-0.8] * 36, out_scale=[1.7] * 36)
    return c


def _reservoir(kind: str, quadratic: bool) -> ReservoirClosure:
    c = ReservoirClosure(3, hidden_size=12, kind=kind, quadratic=quadratic, time_constants=(0.2, 3.0),
                         bias_scale=0.3, seed=8, dtype="float64")
    _fill_random(c.readout_weight, seed=9, scale=0.1)
    return _demo_scaling(c)


@pytest.mark.parametrize("closure_maker, kind", [
    (lambda: _randomised_leaky(False), AffineHybridField),
    (lambda: _reservoir("filter_bank", True), PreparedMemoryField),
    (lambda: _reservoir("random", False), PreparedMemoryField),
    (lambda: _randomised_leaky(True), AffineHybridField),
    (_random_features, PreparedMemorylessField),
    (_polynomial, PreparedMemorylessField),
    (_ring_of_cubics, PreparedMemorylessField),
])
def test_prepared_field_matches_plain_values_and_gradients(closure_maker, kind):
    closure = closure_maker()
    g = torch.Generator().manual_seed(0)
    if closure.dim == 36:
        model = HybridField(lorenz96(k=36, F=10.0).nominal, closure, 36)
        x0 = 2.0 + 3.0 * torch.randn(6, 36, generator=g, dtype=torch.float64)
    else:
        model = HybridField(thermosyphon().nominal, closure, 3)
        x0 = torch.tensor([1.0, 2.0, 45.0], dtype=torch.float64) + torch.randn(6, 3, generator=g, dtype=torch.float64)
    s0 = torch.cat((x0, torch.randn(6, model.hidden_size, generator=g, dtype=torch.float64)), -1)
    fast = model.prepared()
    assert isinstance(fast, kind)
    params = [p for p in closure.parameters() if p.requires_grad]
    plain_traj, plain_loss = _unroll_loss(model, s0)
    plain_grads = torch.autograd.grad(plain_loss, params)
    fast_traj, fast_loss = _unroll_loss(model.prepared(), s0)
    fast_grads = torch.autograd.grad(fast_loss, params)
    scale = float(plain_traj.detach().abs().max())
    assert float((fast_traj - plain_traj).abs().max()) <= 1e-12 * scale
    for p, a, b in zip(params, plain_grads, fast_grads):
        assert float((a - b).abs().max()) <= 1e-10 * max(1.0, float(a.abs().max())), p.shape


def test_plain_field_is_kept_where_nothing_folds():
    # an MLP readout is not affine in the state: the field evaluates itself
    closure = RecurrentClosure(3, hidden_size=4, form="leaky", readout="mlp", dtype="float64")
    model = HybridField(thermosyphon().nominal, closure, 3)
    assert model.prepared() is model


def _scipy_drive(c: RecurrentClosure, history: np.ndarray, dt: float, r0: np.ndarray) -> np.ndarray:
    """Interval by interval (z(t) has a kink at every sample): dr/dt = A r + B z(t) + b."""
    A, B, b = (t.detach().numpy() for t in (c.A, c.B, c.b))
    z = (history - c.scaling.in_mean.numpy()) / c.scaling.in_std.numpy()
    r = r0
    for i in range(len(z) - 1):
        def rhs(t, r, i=i):
            w = t / dt - i
            return A @ r + B @ (z[i] * (1 - w) + z[i + 1] * w) + b
        r = solve_ivp(rhs, (i * dt, (i + 1) * dt), r, method="DOP853", rtol=1e-12, atol=1e-14).y[:, -1]
    return r


def test_closed_form_warm_up_matches_scipy_and_the_recurrence():
    c = _randomised_leaky(False)
    rng = np.random.default_rng(3)
    history = np.cumsum(rng.normal(size=(301, 2, 3)), axis=0) * 0.5 + np.array([0.0, 0.0, 40.0])
    r0 = rng.normal(size=(2, 9))
    h, r0_t = torch.as_tensor(history), torch.as_tensor(r0)
    closed = c.exact_warm_up(h, 0.02, r0=r0_t)
    stepped = c.exact_warm_up(h, 0.02, r0=r0_t, return_all=True)[-1]
    ref = np.stack([_scipy_drive(c, history[:, k], 0.02, r0[k]) for k in range(2)])
    np.testing.assert_allclose(closed.detach().numpy(), ref, rtol=0, atol=1e-9)
    torch.testing.assert_close(closed, stepped, rtol=0, atol=1e-12)
    # gradients of the closed form equal those of the stepped recurrence
    params = [c.log_rate, c.B_rel, c.b_rel]
    ga = torch.autograd.grad(closed.square().sum(), params)
    gb = torch.autograd.grad(stepped.square().sum(), params)
    for a, b in zip(ga, gb):
        torch.testing.assert_close(a, b, rtol=1e-10, atol=1e-10)


def test_truncated_exact_warm_up_differentiates_only_the_last_intervals():
    c = _randomised_leaky(False)
    model = HybridField(None, c, 3)
    g = torch.Generator().manual_seed(7)
    history = torch.randn(101, 4, 3, generator=g, dtype=torch.float64).cumsum(0) * 0.3
    history.requires_grad_(True)
    r = warm_up(model, history, 0.02, RK4(0.02), grad_steps=20)
    (grad,) = torch.autograd.grad(r.sum(), history)
    assert float(grad[:80].abs().max()) == 0.0 and float(grad[81:].abs().max()) > 0.0
    # and the value is the untruncated one
    torch.testing.assert_close(r, warm_up(model, history.detach(), 0.02, RK4(0.02)), rtol=0, atol=1e-13)


def test_exact_warm_up_is_refused_where_there_is_none():
    from mnemode.errors import ConfigError

    model = HybridField(None, RecurrentClosure(3, hidden_size=4, form="tanh", dtype="float64"), 3)
    history = torch.zeros(5, 2, 3, dtype=torch.float64)
    with pytest.raises(ConfigError, match="exact"):
        warm_up(model, history, 0.02, RK4(0.02), exact=True)
    assert warm_up(model, history, 0.02, RK4(0.02)).shape == (2, 4)  # the solver steps it


def test_prepared_data_only_field_matches_plain():
    # no physics: the prepared field is the closure's rates alone (the demo's data_only model)
    for closure in (_reservoir("filter_bank", True), _randomised_leaky(False)):
        model = HybridField(None, closure, 3)
        g = torch.Generator().manual_seed(3)
        s = torch.cat((torch.tensor([1.0, 2.0, 45.0], dtype=torch.float64) + torch.randn(5, 3, generator=g,
                                                                                          dtype=torch.float64),
                       torch.randn(5, closure.hidden_size, generator=g, dtype=torch.float64)), -1)
        with torch.no_grad():
            torch.testing.assert_close(model.prepared()(0.0, s), model(0.0, s), rtol=1e-13, atol=1e-12)


@pytest.mark.parametrize("closure_maker", [
    lambda: _randomised_leaky(False), lambda: _reservoir("filter_bank", True), _random_features, _polynomial,
])
def test_exported_step_holds_folded_constants_of_their_own(closure_maker):
    # The step program captures the folded form; each folded tensor must be saved whole, not as a view
    # into another's storage (torch.export's writer cannot store partial views faithfully and warns).
    from mnemode.export.programs import StepProgram, capture

    model = HybridField(thermosyphon().nominal, closure_maker(), 3).eval().requires_grad_(False)
    state = torch.zeros(2, 3 + model.hidden_size, dtype=torch.float64)
    ep = capture(StepProgram(model, RK4(0.02), 0.02), (state,), "test model")
    for name, t in list(ep.constants.items()) + list(ep.state_dict.items()):
        if isinstance(t, torch.Tensor):  # (a buffer also captured as a constant shares its whole storage: fine)
            assert t.numel() * t.element_size() == t.untyped_storage().nbytes(), f"{name} is a view into another"
