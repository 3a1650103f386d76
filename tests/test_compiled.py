"""The compiled solver step and ahead-of-time packages against the eager computation and outside references.

Outside references used here:
- torch.autograd.gradcheck (central finite differences) for the compiled step's gradients;
- numpy for a closed-form program (``tanh(x Wᵀ + b)``) compiled ahead of time;
- the classical RK4 formula (Hairer, Nørsett & Wanner, *Solving ODEs I*, §II.1) written out
  in numpy for one step of a linear field y' = M y.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import torch

from mnemode import compiled as compiled_mod
from mnemode.closures import RecurrentClosure
from mnemode.compiled import CompileFallbackWarning, CompiledStep
from mnemode.export_aot import AOTI, PLAIN, compile_program, cxx_compiler, load_compiled
from mnemode.hybrid import HybridField, simulate, warm_up
from mnemode.solvers import RK4, Euler
from mnemode.systems import Lorenz63Field


class Linear(torch.nn.Module):
    """y' = M y."""

    def __init__(self, m: np.ndarray):
        super().__init__()
        self.register_buffer("m", torch.as_tensor(m))

    def forward(self, t, y):
        return y @ self.m.T


def _rk4_numpy(m: np.ndarray, y: np.ndarray, h: float) -> np.ndarray:
    """One classical RK4 step of y' = M y, stages written out (Hairer, Nørsett & Wanner §II.1)."""
    f = lambda v: v @ m.T  # noqa: E731
    k1 = f(y)
    k2 = f(y + h / 2 * k1)
    k3 = f(y + h / 2 * k2)
    k4 = f(y + h * k3)
    return y + h / 6 * (k1 + 2 * k2 + 2 * k3 + k4)


def test_rewritten_rk4_step_matches_textbook_formula():
    rng = np.random.default_rng(0)
    m = rng.normal(size=(4, 4))
    y = rng.normal(size=(3, 4))
    got = RK4(0.1).one_step(Linear(m), 0.0, torch.as_tensor(y), 0.1).numpy()
    np.testing.assert_allclose(got, _rk4_numpy(m, y, 0.1), rtol=0, atol=1e-14)


def _demo_like_model(seed: int = 0) -> HybridField:
    closure = RecurrentClosure(3, hidden_size=6, form="leaky", coupling=True, seed=seed).double()
    with torch.no_grad():
        closure.C.normal_(0, 0.3, generator=torch.Generator().manual_seed(1))
    return HybridField(Lorenz63Field().double(), closure, 3)


@pytest.mark.slow
def test_compiled_gradients_equal_eager_through_warm_up_and_forecast():
    # The fitting computation: warm-up on observations (differentiated), then a free-running forecast.
    model = _demo_like_model()
    gen = torch.Generator().manual_seed(2)
    history = torch.randn(6, 4, 3, dtype=torch.float64, generator=gen) * 3
    params = [p for p in model.parameters() if p.requires_grad]

    def loss_and_grads(solver):
        r = warm_up(model, history, 0.02, solver)
        x = simulate(model, history[-1], 12, 0.02, solver, r0=r)
        loss = x.square().mean()
        return loss.detach(), torch.autograd.grad(loss, params)

    plain, fast = RK4(0.01), RK4(0.01, compile=True)
    with warnings.catch_warnings():
        warnings.simplefilter("error", CompileFallbackWarning)  # a silent fallback would make this test vacuous
        loss_c, grads_c = loss_and_grads(fast)
    loss_e, grads_e = loss_and_grads(plain)
    assert fast._compiled is not None and fast._compiled.failed is None
    assert abs(float(loss_c - loss_e)) <= 1e-10 * max(1.0, abs(float(loss_e)))
    for gc, ge in zip(grads_c, grads_e):
        assert float((gc - ge).abs().max()) <= 1e-10 * max(1.0, float(ge.abs().max()))

    # and against central finite differences of the loss along a random direction in parameter space
    # (a compiled backward runs once per graph, so gradcheck's repeated backward passes do not apply)
    direction = [torch.randn(p.shape, dtype=p.dtype, generator=gen) for p in params]
    eps = 1e-6

    def shifted_loss(sign):
        with torch.no_grad():
            for p, d in zip(params, direction):
                p.add_(sign * eps * d)
            r = warm_up(model, history, 0.02, plain)
            value = float(simulate(model, history[-1], 12, 0.02, plain, r0=r).square().mean())
            for p, d in zip(params, direction):
                p.sub_(sign * eps * d)
        return value

    fd = (shifted_loss(+1) - shifted_loss(-1)) / (2 * eps)
    analytic = float(sum((g * d).sum() for g, d in zip(grads_c, direction)))
    assert abs(fd - analytic) <= 1e-6 * max(1.0, abs(analytic))


def test_compile_failure_falls_back_to_eager_once(monkeypatch):
    def broken_compile(fn, **kwargs):
        def run(*args):
            raise RuntimeError("inductor: no working C++ compiler")
        return run

    monkeypatch.setattr(compiled_mod.torch, "compile", broken_compile)
    field = Linear(np.array([[0.0, 1.0], [-4.0, 0.0]]))
    y0 = torch.tensor([[1.0, 0.0]], dtype=torch.float64)
    solver = RK4(0.05, compile=True)
    with pytest.warns(CompileFallbackWarning, match="no working C"):
        got = solver.unroll(field, y0, 0.0, 0.1, 5)
    assert solver._compiled.failed is not None
    with warnings.catch_warnings():
        warnings.simplefilter("error", CompileFallbackWarning)  # warned once only
        again = solver.unroll(field, y0, 0.0, 0.1, 5)
    # harmonic oscillator q'' = −4 q: exact q(t) = cos 2t (RK4 at h = 0.05 is within 1e-6 over t ≤ 0.5)
    t = np.arange(6) * 0.1
    np.testing.assert_allclose(got[:, 0, 0].numpy(), np.cos(2 * t), atol=1e-6)
    assert torch.equal(got, again)


def test_field_errors_are_raised_not_swallowed(monkeypatch):
    monkeypatch.setattr(compiled_mod.torch, "compile", lambda fn, **kw: fn)

    class Bad(torch.nn.Module):
        def forward(self, t, y):
            raise ValueError("field refuses")

    with pytest.raises(ValueError, match="field refuses"):
        RK4(0.1, compile=True).advance(Bad(), 0.0, torch.zeros(1, 2), 0.1)


def test_kill_switch_and_repr(monkeypatch):
    calls = []
    monkeypatch.setattr(compiled_mod.torch, "compile", lambda fn, **kw: calls.append(1) or fn)
    monkeypatch.setenv(compiled_mod.DISABLE_ENV, "1")
    solver = Euler(0.1, compile=True)
    solver.advance(Linear(np.eye(2)), 0.0, torch.ones(1, 2, dtype=torch.float64), 0.1)
    assert calls == []
    assert repr(solver) == "Euler(step=0.1, compile=True)" and repr(Euler(0.1)) == "Euler(step=0.1)"
    step = CompiledStep(lambda f, t, y, h: y, "x")
    assert step(None, 0.0, torch.ones(1), 0.1).item() == 1.0 and calls == []


def test_export_traces_the_eager_step_of_a_compiling_solver():
    # torch.export of an advance through a compile=True solver captures the plain step (nothing compiled nested)
    m = np.array([[0.0, 1.0], [-4.0, 0.0]])
    field = Linear(m)
    solver = RK4(0.05, compile=True)

    class Step(torch.nn.Module):
        def forward(self, y):
            return solver.advance(field, 0.0, y, 0.05)

    y = torch.tensor([[1.0, 0.0], [0.5, 0.2]], dtype=torch.float64)
    ep = torch.export.export(Step(), (y,))
    np.testing.assert_allclose(ep.module()(y).numpy(), _rk4_numpy(m, y.numpy(), 0.05), atol=1e-14)
    assert solver._compiled is None  # never built: the capture took the eager branch


class _Tanh(torch.nn.Module):
    def __init__(self):
        super().__init__()
        g = torch.Generator().manual_seed(0)
        self.w = torch.nn.Parameter(torch.randn(5, 5, generator=g, dtype=torch.float64) / 3)
        self.b = torch.nn.Parameter(torch.randn(5, generator=g, dtype=torch.float64))

    def forward(self, x):
        return torch.tanh(x @ self.w.T + self.b)


def _small_program():
    module = _Tanh()
    x = torch.randn(4, 5, dtype=torch.float64, generator=torch.Generator().manual_seed(1))
    ep = torch.export.export(module, (x,), dynamic_shapes=({0: torch.export.Dim("batch", min=1)},))
    reference = np.tanh(x.numpy() @ module.w.detach().numpy().T + module.b.detach().numpy())
    return ep, x, reference


def test_aot_falls_back_to_plain_program_without_compiler(tmp_path, monkeypatch):
    import mnemode.export_aot as aot

    monkeypatch.setattr(aot, "cxx_compiler", lambda: None)
    ep, x, reference = _small_program()
    saved = tmp_path / "prog.pt2"
    torch.export.save(ep, str(saved))
    out = compile_program(saved, tmp_path / "out.pt2", (x,))
    assert out["kind"] == PLAIN and "C++ compiler" in out["reason"]
    import hashlib
    assert out["sha256"] == hashlib.sha256((tmp_path / "out.pt2").read_bytes()).hexdigest()
    np.testing.assert_allclose(load_compiled(out["path"], out["kind"])(x).detach().numpy(), reference, atol=1e-14)
    with pytest.raises(Exception, match="compiled ahead of time"):
        compile_program(ep, tmp_path / "strict.pt2", (x,), allow_fallback=False)


@pytest.mark.slow
@pytest.mark.skipif(cxx_compiler() is None, reason="no C++ compiler for inductor")
def test_aot_package_reproduces_closed_form(tmp_path):
    ep, x, reference = _small_program()
    out = compile_program(ep, tmp_path / "prog_aoti.pt2", (x,))
    assert out["kind"] == AOTI, out["reason"]
    assert out["parity"] <= 1e-6
    runner = load_compiled(out["path"], out["kind"])
    with torch.no_grad():
        np.testing.assert_allclose(runner(x).numpy(), reference, rtol=0, atol=1e-12)   # numpy reference
        np.testing.assert_allclose(runner(x[:1]).numpy(), reference[:1], rtol=0, atol=1e-12)  # dynamic batch


def test_solver_config_switches_compilation():
    from mnemode.errors import ConfigError
    from mnemode.pipeline import compose_config, make_solver
    from mnemode.solvers import Adaptive

    assert make_solver(compose_config([])).compile is False  # opt-in: default off
    solver = make_solver(compose_config(["solver.compile=true"]))
    assert isinstance(solver, RK4) and solver.compile is True
    adaptive = make_solver(compose_config(["solver._target_=mnemode.solvers.Adaptive", "~solver.step"]))
    assert isinstance(adaptive, Adaptive)
    with pytest.raises(ConfigError, match="compile"):
        Adaptive(compile=True)


def test_each_compiled_step_has_its_own_code_object(monkeypatch):
    # the compiler's graph cache and recompilation limit are per code object; solvers must not share one
    seen = []
    monkeypatch.setattr(compiled_mod.torch, "compile", lambda fn, **kw: seen.append(fn) or fn)
    field = Linear(np.array([[0.0, 1.0], [-4.0, 0.0]]))
    y = torch.tensor([[1.0, 0.0]], dtype=torch.float64)
    a, b = RK4(0.05, compile=True), RK4(0.05, compile=True)
    ya, yb = a.advance(field, 0.0, y, 0.1), b.advance(field, 0.0, y, 0.1)
    assert torch.equal(ya, yb) and torch.equal(ya, RK4(0.05).advance(field, 0.0, y, 0.1))
    codes = [fn.__func__.__code__ for fn in seen]  # code objects compare by value: check identity
    assert len(seen) == 2 and codes[0] is not codes[1]
    assert all(c is not RK4.one_step.__code__ for c in codes)
