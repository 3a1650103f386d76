"""Exporting a frozen simulator: parity, validity times, manifest, ONNX, run-level refusals.

Outside references used here:
- scipy.integrate.solve_ivp (DOP853, rtol 1e-11, atol 1e-11) of the thermosyphon truth
  equations written out in numpy from the system's docstring (mnemode.systems.thermosyphon);
- hashlib.sha256 (the manifest's file hashes);
- torchdiffeq's dopri5 (the adaptive solver an exported RK4 stands in for);
- onnxruntime (the ONNX programs against the .pt2 programs).

The closures are test-only: the exact heat-storing-wall law as a continuous hidden field,
its explicit-Euler discretisation as a discrete cell, and a memoryless tanh network with
fixed random weights.
"""

from __future__ import annotations

import hashlib
import json
import math
import sys

import numpy as np
import pytest
import torch
from scipy.integrate import solve_ivp

from mnemode.validity import validity_times
from mnemode.closures.base import Closure, Scaling
from mnemode.data import generate
from mnemode.errors import CheckpointError, ConfigError, FitDiverged, MnemodeError
from mnemode.export import CAUTIONS, ParityError, check_exportable, export_simulator
from mnemode.hybrid import HybridField, HybridFlowMap, simulate, warm_up
from mnemode.simulator import load_simulator
from mnemode.solvers import RK4, Adaptive, FlowMap
from mnemode.systems.thermosyphon import IdealWallLoopField, thermosyphon

torch.set_num_threads(1)

DT = 0.02
W = 25  # warm-up intervals (0.5 time units)
NAMES = ["flow_rate", "temp_horizontal", "temp_vertical"]
UNITS = ["scaled flow", "scaled K", "scaled K"]
BETA, TAU = 1.0, 1.0


# -- test-only closures ------------------------------------------------------------------

class WallLawClosure(Closure):
    """The heat-storing wall exactly: dr/dt = (x_{Y,Z}/(1+β) − r)/τ, readout adds r to dY/dt, dZ/dt."""

    hidden_size = 2

    def __init__(self, dim: int = 3, beta: float = BETA, tau: float = TAU):
        super().__init__(dim)
        self.beta, self.tau = float(beta), float(tau)

    def correction(self, x, r=None, u=None):
        return torch.cat((torch.zeros_like(x[..., :1]), r), dim=-1)

    def hidden_field(self, x, r, u=None):
        return (x[..., 1:3] / (1.0 + self.beta) - r) / self.tau


class WallCell(Closure):
    """Discrete recurrent cell: explicit-Euler step of the wall law over Δt, same readout."""

    hidden_size, discrete = 2, True

    def __init__(self, dim: int = 3, dt: float = DT):
        super().__init__(dim)
        self.dt = float(dt)

    def correction(self, x, r=None, u=None):
        return torch.cat((torch.zeros_like(x[..., :1]), r), dim=-1)

    def hidden_field(self, x, r, u=None):
        return r + self.dt * (x[..., 1:3] / (1.0 + BETA) - r) / TAU


class RandomTanhClosure(Closure):
    """Memoryless m(x) = offset + scale·(W2 tanh(W1 x̃ + b1) + b2) with fixed random weights."""

    def __init__(self, dim: int = 3, width: int = 16, seed: int = 0):
        super().__init__(dim)
        gen = torch.Generator().manual_seed(seed)
        self.l1 = torch.nn.Linear(dim, width)
        self.l2 = torch.nn.Linear(width, dim)
        with torch.no_grad():
            for p in self.parameters():
                p.copy_(torch.randn(p.shape, generator=gen) * 0.5)
        self.scaling = Scaling(dim, dim).set(in_mean=[0.0, 0.0, 45.0], in_std=[8.0, 10.0, 9.0],
                                             out_offset=[0.0, 0.5, 1.0], out_scale=[0.3, 0.3, 0.3])

    def correction(self, x, r=None, u=None):
        return self.scaling.outputs(self.l2(torch.tanh(self.l1(self.scaling.inputs(x)))))


# -- shared data and exports (module scope: torch.export takes seconds) ---------------------

@pytest.fixture(scope="module")
def demo():
    """Demo thermosyphon at τ = 1: 8 test trajectories of W + 300 intervals."""
    return generate(thermosyphon(wall_response_time=TAU), n_trajectories=8, duration=(W + 300) * DT, dt=DT, seed=11,
                    spin_up=20.0)


def _continuous_model():
    return HybridField(IdealWallLoopField(), WallLawClosure(), 3)


def _discrete_model(closure):
    return HybridFlowMap(FlowMap(IdealWallLoopField(), DT, RK4(0.005)), closure, 3, DT)


def _export(model, out, demo, **kw):
    args = dict(dt=DT, solver=RK4(0.01), state_names=NAMES, state_units=UNITS, warm_up_steps=W,
                envelope=demo.envelope(), time_unit="fluid-wall thermal relaxation time")
    args.update(kw)
    return export_simulator(model, out, **args)


# The 1000-step parity exports (with the float32 figure) take 10-25 s on a shared CPU, so
# only the slow parity tests use them; the other tests share quicker exports of the same models.

@pytest.fixture(scope="module")
def continuous(tmp_path_factory, demo):
    out = tmp_path_factory.mktemp("continuous")
    model = _continuous_model().double()
    manifest = _export(model, out, demo, parity_steps=1000, check_float32=True)
    return model, out, manifest


@pytest.fixture(scope="module")
def discrete(tmp_path_factory, demo):
    out = tmp_path_factory.mktemp("discrete")
    model = _discrete_model(RandomTanhClosure()).double()
    manifest = _export(model, out, demo, solver=None, parity_steps=1000, check_float32=False)
    return model, out, manifest


@pytest.fixture(scope="module")
def continuous_quick(tmp_path_factory, demo):
    out = tmp_path_factory.mktemp("continuous_quick")
    model = _continuous_model().double()
    manifest = _export(model, out, demo, metrics={"validity_time_median": 1.0}, config={"seed": 0},
                       parity_steps=100, check_float32=False)
    return model, out, manifest


@pytest.fixture(scope="module")
def discrete_quick(tmp_path_factory, demo):
    out = tmp_path_factory.mktemp("discrete_quick")
    model = _discrete_model(RandomTanhClosure()).double()
    manifest = _export(model, out, demo, solver=None, parity_steps=20, check_float32=False)
    return model, out, manifest


# -- parity -------------------------------------------------------------------------

def _eager_vs_loaded(model, out, x0, n, solver):
    sim = load_simulator(out, on_envelope="ignore")
    r0 = model.closure.initial_hidden(x0.shape[:-1], x0.dtype) if model.hidden_size else None
    with torch.no_grad():
        eager = simulate(model, x0, n, DT, solver, r0=r0)
    return (sim.rollout(x0, n, r0=r0) - eager).abs().max().item()


@pytest.mark.slow
@pytest.mark.parametrize("batch", [1, 8])
def test_parity_continuous_memory_model(continuous, demo, batch):
    """Loaded program vs eager over 1000 steps, float64: ≤ 1e-6 (the export contract)."""
    model, out, manifest = continuous
    p = manifest["parity"]
    assert p["steps"] == 1000 and p["batches"] == [1, 8] and p["passed"]
    assert p["step_program"][f"batch_{batch}"] <= 1e-6
    assert p["warm_up_program"]["max_abs_diff"] <= 1e-6
    x0 = torch.as_tensor(demo.states[0, :batch], dtype=torch.float64)
    assert _eager_vs_loaded(model, out, x0, 1000, RK4(0.01)) <= 1e-6


@pytest.mark.slow
@pytest.mark.parametrize("batch", [1, 8])
def test_parity_discrete_flow_map(discrete, demo, batch):
    model, out, manifest = discrete
    assert manifest["parity"]["step_program"][f"batch_{batch}"] <= 1e-6
    x0 = torch.as_tensor(demo.states[5, :batch], dtype=torch.float64)
    assert _eager_vs_loaded(model, out, x0, 1000, None) <= 1e-6


@pytest.mark.slow
def test_float32_figure_is_recorded(continuous):
    f32 = continuous[2]["parity"]["float32"]
    assert f32["steps"] == 1000 and math.isfinite(f32["max_abs_diff"])
    # One RK4 interval in float32 loses about float32 epsilon × |state| (|state| ≲ 100 here):
    # 2⁻²³·100 ≈ 1.2e-5 (IEEE 754 single precision), a few roundings per interval.
    assert 0 < f32["one_step_max_abs_diff_vs_float64"] < 1e-4


def test_discrete_memory_model_warm_up_program(tmp_path, demo):
    """Discrete recurrent cell: warm-up program equals hybrid.warm_up; rollout equals simulate."""
    model = _discrete_model(WallCell()).double()
    manifest = _export(model, tmp_path, demo, solver=None, parity_steps=20, check_float32=False)
    assert manifest["hidden_init"]["method"] == "warm_up" and manifest["parity"]["passed"]
    sim = load_simulator(tmp_path, on_envelope="ignore")
    hist = torch.as_tensor(demo.states[: W + 1], dtype=torch.float64)
    with torch.no_grad():
        r_eager = warm_up(model, hist, DT)
        x_eager = simulate(model, hist[-1], 50, DT, r0=r_eager)
    assert (sim.warm_up(hist) - r_eager).abs().max().item() <= 1e-12
    assert (sim.rollout(None, 50, history=hist) - x_eager).abs().max().item() <= 1e-6


def test_parity_error_when_the_program_cannot_reproduce_the_model(tmp_path, demo):
    """A closure with Python-side state (a call counter) is frozen by torch.export: parity must fail."""

    class Drifting(Closure):
        def __init__(self):
            super().__init__(3)
            self.calls = 0

        def correction(self, x, r=None, u=None):
            self.calls += 1
            return torch.zeros_like(x) + 1e-3 * self.calls

    model = _discrete_model(Drifting()).double()
    with pytest.raises(ParityError, match="differs from the eager model"):
        _export(model, tmp_path, demo, solver=None, parity_steps=20, check_float32=False)
    assert not (tmp_path / "simulator.json").exists()


# -- the exported simulator against outside references ---------------------------------------

def test_validity_times_equal_eager(continuous_quick, demo):
    """Demo τ = 1: the loaded program's validity times equal the eager model's on the same forecasts."""
    model, out, _ = continuous_quick
    states = torch.as_tensor(demo.states, dtype=torch.float64)
    hist, truth = states[: W + 1], states[W:]
    n = truth.shape[0] - 1
    solver = RK4(0.01)
    with torch.no_grad():
        r = warm_up(model, hist, DT, solver)
        eager = simulate(model, hist[-1], n, DT, solver, r0=r)
    sim = load_simulator(out, on_envelope="ignore")
    exported = sim.rollout(None, n, history=hist)
    t_eager, c_eager = validity_times(eager.numpy(), truth.numpy(), DT)
    t_exp, c_exp = validity_times(exported.numpy(), truth.numpy(), DT)
    np.testing.assert_array_equal(t_exp, t_eager)
    np.testing.assert_array_equal(c_exp, c_eager)
    assert (~c_eager).sum() >= 4, "most forecasts should fail within the horizon for the check to bite"


def _truth_rhs(t, z, sigma=6.0, rayleigh=50.0):
    # Thermosyphon with a heat-storing wall, written out from mnemode.systems.thermosyphon's docstring.
    X, Y, Z, P, Q = z
    g = 1.0 / (1.0 + BETA)
    return [sigma * (Y - X), rayleigh * X - X * Z - Y + P, X * Y - Z + Q, (g * Y - P) / TAU, (g * Z - Q) / TAU]


def test_exported_oracle_follows_scipy_truth(continuous_quick, demo):
    """With the true wall temperatures as hidden state the exported model is the truth system.

    Against scipy DOP853 over one time unit (50 intervals) the error is RK4's
    (step 0.01, global error O(h⁴)); halving the step must cut it by about 2⁴ = 16
    (the classical order, Hairer–Nørsett–Wanner §II.1), which an export error would not.
    """
    _, out, _ = continuous_quick
    z0 = np.concatenate((demo.states[0, 0], demo.hidden[0, 0]))
    ref = solve_ivp(_truth_rhs, (0, 50 * DT), z0, method="DOP853", rtol=1e-11, atol=1e-11,
                    t_eval=np.arange(51) * DT).y.T
    sim = load_simulator(out, on_envelope="ignore")
    x, r = sim.rollout(z0[:3], 50, r0=z0[3:], return_hidden=True)
    got = torch.cat((x, r), -1)[:, 0].numpy()
    err = np.abs(got - ref).max()
    scale = np.abs(ref).max()
    assert err < 1e-6 * scale
    fine = simulate(_continuous_model().double(), torch.as_tensor(z0[None, :3]), 50, DT, RK4(0.005),
                    r0=torch.as_tensor(z0[None, 3:]), return_hidden=True)
    err_fine = np.abs(torch.cat(fine, -1)[:, 0].numpy() - ref).max()
    assert 8 < err / err_fine < 32


# -- manifest ---------------------------------------------------------------------------

def test_manifest_contents_and_hashes(continuous_quick, discrete_quick):
    _, out, manifest = continuous_quick
    on_disk = json.loads((out / "simulator.json").read_text())
    assert on_disk["format"] == "mnemode-simulator" and on_disk["format_version"] == 1
    st = on_disk["state"]
    assert st["names"] == NAMES and st["units"] == UNITS and st["dim"] == 3 and st["hidden_size"] == 2
    assert on_disk["time"] == {"dt": DT, "unit": "fluid-wall thermal relaxation time"}
    assert on_disk["dtype"] == "float64"
    hi = on_disk["hidden_init"]
    assert hi["method"] == "warm_up" and hi["history_length"] == W + 1 and hi["initial_vector"] == [0.0, 0.0]
    assert hi["initial_vector_kind"] == "zeros"
    assert on_disk["model"]["kind"] == "continuous" and on_disk["model"]["substeps_per_interval"] == 2
    assert on_disk["normalisation"]["baked_in"] is True
    assert on_disk["envelope"]["default_margin"] == 0.1
    assert set(on_disk["envelope"]["components"]) == set(NAMES)
    assert on_disk["metrics"] == {"validity_time_median": 1.0} and on_disk["config"] == {"seed": 0}
    assert on_disk["versions"]["torch"] == torch.__version__
    assert on_disk["versions"]["python"] == ".".join(map(str, sys.version_info[:3]))
    assert on_disk["cautions"] == CAUTIONS and any("safety" in c for c in CAUTIONS)
    assert set(on_disk["files"]) == {"simulator.pt2", "warm_up.pt2"}
    for name, rec in on_disk["files"].items():
        data = (out / name).read_bytes()
        assert rec["sha256"] == hashlib.sha256(data).hexdigest() and rec["bytes"] == len(data)
    # Memoryless discrete model: no warm-up program; the closure's scaling recorded for information.
    _, dout, dman = discrete_quick
    assert dman["state"]["hidden_size"] == 0 and dman["hidden_init"]["method"] == "none"
    assert set(dman["files"]) == {"simulator.pt2"} and not (dout / "warm_up.pt2").exists()
    assert dman["normalisation"]["closure_scaling"]["in_mean"] == [0.0, 0.0, 45.0]
    assert dman["model"]["kind"] == "discrete" and dman["model"]["solver"] == "RK4(step=0.005)"


def test_extra_manifest_and_margin(tmp_path, demo):
    model = _discrete_model(RandomTanhClosure()).double()
    m = _export(model, tmp_path, demo, solver=None, parity_steps=5, check_float32=False,
                extra_manifest={"model_name": "mlp", "envelope_margin": 0.25})
    assert m["model_name"] == "mlp" and m["envelope"]["default_margin"] == 0.25
    with pytest.raises(ConfigError, match="overwrite=True"):
        _export(model, tmp_path, demo, solver=None, parity_steps=5, check_float32=False)
    with pytest.raises(ConfigError, match="reserved"):
        _export(model, tmp_path, demo, solver=None, parity_steps=5, check_float32=False, overwrite=True,
                extra_manifest={"parity": 1})


def test_adaptive_solver_is_replaced_by_recorded_rk4(tmp_path, demo):
    """torchdiffeq cannot be captured: the export uses RK4 at a step matching dopri5 and says so."""
    model = HybridField(IdealWallLoopField(), RandomTanhClosure(), 3).double()
    adaptive = Adaptive("dopri5", rtol=1e-7, atol=1e-9)
    m = _export(model, tmp_path, demo, solver=adaptive, warm_up_steps=0, parity_steps=10, check_float32=False)
    sub = m["model"]["solver_substitution"]
    assert sub["fitted_with"].startswith("Adaptive(") and sub["exported_with"].startswith("RK4(")
    assert sub["one_step_max_abs_diff_vs_fitted_solver"] <= sub["tolerance"]
    sim = load_simulator(tmp_path, on_envelope="ignore")
    x0 = torch.as_tensor(demo.states[0], dtype=torch.float64)
    with torch.no_grad():
        ref = Adaptive("dopri5", rtol=1e-10, atol=1e-12).advance(model, 0.0, x0, DT)
    assert (sim.step(x0) - ref).abs().max().item() <= sub["tolerance"]


def test_adaptive_flow_map_is_replaced_in_a_copy_only(tmp_path, demo):
    flow = FlowMap(IdealWallLoopField(), DT, Adaptive("dopri5", rtol=1e-7, atol=1e-9))
    model = HybridFlowMap(flow, WallCell(), 3, DT).double()
    m = _export(model, tmp_path, demo, solver=None, parity_steps=5, check_float32=False)
    sub = m["model"]["solver_substitution"]
    assert sub["exported_with"] == m["model"]["solver"] and sub["substeps"] >= 1
    assert isinstance(model.flow_map.solver, Adaptive)  # the caller's model is untouched


def test_bad_export_arguments_are_clear(tmp_path, demo):
    model = _continuous_model().double()
    with pytest.raises(ConfigError, match="solver"):
        _export(model, tmp_path, demo, solver=None)
    with pytest.raises(ConfigError, match="state_names"):
        _export(model, tmp_path, demo, state_names=["a", "b"])
    with pytest.raises(ConfigError, match="envelope"):
        _export(model, tmp_path, demo, envelope={"flow_rate": [0, 1]})
    with pytest.raises(ConfigError, match="HybridField or HybridFlowMap"):
        _export(WallLawClosure(), tmp_path, demo)
    with pytest.raises(ConfigError, match="dt"):
        _export(_discrete_model(RandomTanhClosure()), tmp_path, demo, solver=None, dt=0.05)
    with pytest.raises(ConfigError, match="forcing_names.*discrete"):
        _export(_discrete_model(RandomTanhClosure()), tmp_path, demo, solver=None, forcing_names=["q"],
                forcing_envelope={"q": [0, 1]})
    with pytest.raises(ConfigError, match="forcing_envelope"):
        _export(model, tmp_path, demo, forcing_names=["q"], forcing_envelope={"p": [0, 1]})
    assert not any(tmp_path.iterdir())


# -- ONNX -----------------------------------------------------------------------------

def test_onnx_without_the_extra_names_the_install(tmp_path, demo, monkeypatch):
    monkeypatch.setitem(sys.modules, "onnxscript", None)  # makes `import onnxscript` fail
    with pytest.raises(ConfigError, match=r'pip install "mnemode\[onnx\]"'):
        _export(_continuous_model().double(), tmp_path, demo, onnx=True)


@pytest.mark.slow
def test_onnx_matches_pt2_in_float32(tmp_path, demo):
    ort = pytest.importorskip("onnxruntime", reason='ONNX checks need the extra: pip install "mnemode[onnx]"')
    pytest.importorskip("onnx", reason='ONNX checks need the extra: pip install "mnemode[onnx]"')
    pytest.importorskip("onnxscript", reason='ONNX checks need the extra: pip install "mnemode[onnx]"')
    model = _continuous_model()
    m = _export(model, tmp_path, demo, dtype=torch.float32, onnx=True, parity_steps=20)
    assert {"simulator.onnx", "warm_up.onnx"} <= set(m["files"])
    sim = load_simulator(tmp_path, on_envelope="ignore")
    x = torch.as_tensor(demo.states[7], dtype=torch.float32)
    state = torch.cat((x, torch.as_tensor(demo.hidden[7], dtype=torch.float32)), -1)
    step = ort.InferenceSession(str(tmp_path / "simulator.onnx"), providers=["CPUExecutionProvider"])
    got = step.run(None, {"state": state.numpy()})[0]
    assert np.abs(got - sim.step(state).numpy()).max() <= 1e-5
    warm = ort.InferenceSession(str(tmp_path / "warm_up.onnx"), providers=["CPUExecutionProvider"])
    xb = torch.as_tensor(demo.states[8], dtype=torch.float32)
    r = state[:, 3:]
    got_r = warm.run(None, {"x_a": x.numpy(), "x_b": xb.numpy(), "r": r.numpy()})[0]
    with pytest.warns(UserWarning, match="history has 2 samples"):
        want_r = sim.warm_up(torch.stack((x, xb)), r0=r)
    assert np.abs(got_r - want_r.numpy()).max() <= 1e-5
    assert m["onnx"]["one_step_max_abs_diff_vs_pt2"] <= 1e-5


# -- run-level refusals -----------------------------------------------------------------

def test_check_exportable(tmp_path):
    path = tmp_path / "models" / "hybrid.pt"
    with pytest.raises(CheckpointError, match="missing"):
        check_exportable(path, None)
    path.parent.mkdir()
    path.write_bytes(b"")
    with pytest.raises(CheckpointError, match="empty"):
        check_exportable(path, None)
    path.write_bytes(b"not a torch file")
    with pytest.raises(CheckpointError, match="corrupt"):
        check_exportable(path, None)
    good = {"state_dict": {"w": torch.ones(3)}, "name": "hybrid"}
    torch.save(good, path)
    check_exportable(path, {"train_error": 0.1, "val_error": 0.2, "fit_seconds": 1.0})
    for diag in ({"train_error": float("nan")}, {"val_error": None}, {"diverged": True}):
        with pytest.raises(FitDiverged, match="diverged"):
            check_exportable(path, diag)
    torch.save({"state_dict": {"w": torch.tensor([1.0, float("inf")])}}, path)
    with pytest.raises(FitDiverged, match=r"state_dict\.w"):
        check_exportable(path, None)
    # a diverged model reaches the command line as a MnemodeError: one line and its exit code, no traceback
    try:
        check_exportable(path, None)
    except MnemodeError as exc:
        assert exc.exit_code != 0 and "\n" not in str(exc)
