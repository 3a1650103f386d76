"""Unforced models whose physics reads t export the timed step program ``(t, state) ↦ state'``.

The scenario: a nominal field driven by a clock, ``dx/dt = −x + A sin(ω t)``, plus a small
memoryless closure (an untrained, seeded MLP) -- and, for the warm-up path, a lagged memory
closure. Without forcing inputs such a model used to be exported with the autonomous program,
which starts every interval at t = 0.

Outside references used here:
- scipy.integrate.solve_ivp (DOP853, rtol 1e-10, atol 1e-14) on the physics written out in numpy plus the
  same closure evaluated by torch on each state scipy asks for;
- the eager model, ``hybrid.simulate(..., time_origin=t0)`` and ``hybrid.warm_up``;
- onnxruntime for the ONNX copy (slow test).
Each rollout check is repeated from t0 = 0 to show that it fails when the clock is lost.
"""

from __future__ import annotations

import json
import math
import shutil

import numpy as np
import pytest
import torch
from scipy.integrate import solve_ivp
from torch import nn

from mnemode.closures import MLPClosure
from mnemode.closures.base import Closure
from mnemode.data import TrajectorySet
from mnemode.errors import CheckpointError, MnemodeError
from mnemode.export import export_simulator
from mnemode.hybrid import HybridField, simulate, warm_up
from mnemode.simulator import FORMAT_VERSION, load_simulator, rollout_to_file
from mnemode.solvers import RK4

from test_export_tampering import run_script_without_mnemode

torch.set_num_threads(1)

A, OMEGA = 1.5, 1.3
DT, STEP = 0.05, 0.025
T0, N = 3.7, 100                     # rollouts start at true time 3.7 and run 5 time units
ENV = {"x": [-2.5, 2.5]}
X0 = np.array([[-1.2], [0.3], [1.4]])


class ClockDrive(nn.Module):
    """``−x + A sin(ω t)``: ``t`` a float, a 0-d tensor or one time per state ``(B, 1)``."""

    def forward(self, t, x, u=None):
        return -x + A * torch.sin(OMEGA * torch.as_tensor(t, dtype=x.dtype))


class Decay(nn.Module):
    """``−x``, declared autonomous like the built-in systems."""

    autonomous = True

    def forward(self, t, x, u=None):
        return -x


class Lag(Closure):
    """Memory: ``r`` lags ``x`` (``dr/dt = (x − r)/τ``) and pulls it back by ``g (r − x)``."""

    hidden_size = 1

    def __init__(self, dim: int = 1, g: float = 0.8, tau: float = 0.7):
        super().__init__(dim)
        self.g, self.tau = g, tau

    def correction(self, x, r=None, u=None):
        return self.g * (r - x)

    def hidden_field(self, x, r, u=None):
        return (x - r) / self.tau


def memoryless_model() -> HybridField:
    return HybridField(ClockDrive(), MLPClosure(1, width=8, depth=1, seed=0, dtype=torch.float64), 1)


def _export(model, out, **kw):
    args = dict(dt=DT, solver=RK4(STEP), state_names=["x"], state_units=["m"], warm_up_steps=0, envelope=ENV,
                parity_steps=200, check_float32=False, parity_t0=T0, time_unit="s")
    args.update(kw)
    return export_simulator(model, out, **args)


def scipy_reference(closure, z0: np.ndarray, t0: float, n: int, memory: bool = False) -> np.ndarray:
    """``(n + 1, dim)`` from ``z0`` at true time ``t0``: the physics in numpy, the closure through torch."""

    def rhs(t, z):
        x = z[:1]
        zt = torch.as_tensor(z[None], dtype=torch.float64)
        with torch.no_grad():
            if memory:
                m = closure.correction(zt[:, :1], zt[:, 1:]).numpy()[0]
                g = closure.hidden_field(zt[:, :1], zt[:, 1:]).numpy()[0]
                return np.concatenate((-x + A * math.sin(OMEGA * t) + m, g))
            return -x + A * math.sin(OMEGA * t) + closure.correction(zt).numpy()[0]

    times = t0 + DT * np.arange(n + 1)
    sol = solve_ivp(rhs, (times[0], times[-1]), z0, t_eval=times, method="DOP853", rtol=1e-10, atol=1e-14)
    assert sol.success
    return sol.y.T


@pytest.fixture(scope="module")
def timed(tmp_path_factory):
    model = memoryless_model().double()
    out = tmp_path_factory.mktemp("timed")
    return model, out, _export(model, out)


# -- the program and its manifest ---------------------------------------------------------------

def test_time_reading_physics_gets_the_timed_program_and_parity_from_t0(timed):
    _, out, manifest = timed
    assert manifest["programs"]["step"]["inputs"] == {"t": [], "state": ["batch", 1]}
    assert manifest["format_version"] == 3 == FORMAT_VERSION
    assert manifest["model"]["step_program"] == "timed" and "reads t" in manifest["model"]["time_dependence"]
    assert manifest["forcing"] is None
    par = manifest["parity"]
    assert par["passed"] and par["t0"] == T0 and par["step_program"]["max_abs_diff"] <= 1e-6
    sim = load_simulator(out)
    assert sim.step_kind == "timed" and sim.timed and not sim.forced and "reads t" in repr(sim)


def test_autonomous_physics_keeps_the_one_input_program(tmp_path):
    model = HybridField(Decay(), MLPClosure(1, width=8, depth=1, seed=0, dtype=torch.float64), 1).double()
    manifest = _export(model, tmp_path / "auto", parity_steps=20)
    assert manifest["programs"]["step"]["inputs"] == {"state": ["batch", 1]}
    assert manifest["format_version"] == 1 and "step_program" not in manifest["model"]
    assert "t0" not in manifest["parity"]
    assert load_simulator(tmp_path / "auto").step_kind == "autonomous"


# -- rollouts against scipy and the eager model -------------------------------------------------

def test_rollout_from_t0_follows_scipy_and_the_eager_model(timed):
    model, out, _ = timed
    sim = load_simulator(out, on_envelope="ignore")
    got = sim.rollout(X0, N, t0=T0).numpy()
    ref = np.stack([scipy_reference(model.closure, x0, T0, N) for x0 in X0], axis=1)
    # RK4 at h = 0.025 over 5 time units: global error ~h⁴ (Hairer–Nørsett–Wanner II.1); measured 3e-9
    assert np.abs(got - ref).max() < 1e-7
    with torch.no_grad():
        eager = simulate(model, torch.as_tensor(X0), N, DT, RK4(STEP), time_origin=T0).numpy()
    assert np.abs(got - eager).max() <= 1e-10            # same arithmetic up to rounding of t0 + t
    # the same rollout on a clock started at 0 is a different forecast, far beyond the tolerance
    lost = sim.rollout(X0, N, t0=0.0).numpy()
    assert np.abs(lost - ref).max() > 0.5
    # one interval at a time through Simulator.step, the clock passed by hand
    s = torch.as_tensor(X0)
    for k in range(3):
        s = sim.step(s, t=T0 + k * DT)
    np.testing.assert_allclose(s.numpy(), got[3], rtol=0, atol=1e-12)


def test_memory_model_warms_up_autonomously_and_rolls_out_on_the_clock(tmp_path):
    model = HybridField(ClockDrive(), Lag(), 1).double()
    w = 20
    manifest = _export(model, tmp_path / "mem", warm_up_steps=w)
    assert manifest["programs"]["step"]["inputs"] == {"t": [], "state": ["batch", 2]}
    # a warm-up evaluates no physics: its program keeps the inputs of an autonomous export
    assert manifest["programs"]["warm_up"]["inputs"] == {"x_a": ["batch", 1], "x_b": ["batch", 1],
                                                         "r": ["batch", 1]}
    assert manifest["parity"]["warm_up_program"]["max_abs_diff"] <= 1e-6
    sim = load_simulator(tmp_path / "mem", on_envelope="ignore")
    # history: the scipy solution over the w intervals before T0, from [x, r] = [0.5, 0]
    hist_ref = scipy_reference(model.closure, np.array([0.5, 0.0]), T0 - w * DT, w, memory=True)
    hist = torch.as_tensor(hist_ref[:, None, :1])
    x, r = sim.rollout(None, N, history=hist, t0=T0, return_hidden=True)
    with torch.no_grad():
        r_eager = warm_up(model, hist, DT, RK4(STEP), t0=T0 - w * DT)
        eager = simulate(model, hist[-1], N, DT, RK4(STEP), r0=r_eager, time_origin=T0)
    assert float((r[0] - r_eager).abs().max()) <= 1e-12
    assert float((x - eager).abs().max()) <= 1e-10
    ref = scipy_reference(model.closure, np.array([hist_ref[-1, 0], float(r_eager[0, 0])]), T0, N, memory=True)
    # RK4's error as above; measured 1.5e-8 here (9e-10 at h/2: the h⁴ ratio of 16)
    assert np.abs(torch.cat((x, r), -1)[:, 0].numpy() - ref).max() < 1e-7
    lost = sim.rollout(None, N, history=hist, t0=0.0)
    assert np.abs(lost[:, 0].numpy() - ref[:, :1]).max() > 0.5


# -- command line, plain-torch script, older manifests --------------------------------------------

def test_command_and_plain_torch_script_run_the_clock_from_t0(timed, tmp_path):
    from mnemode.cli import main

    model, out, _ = timed
    main(["rollout", str(out), "--x0", "0.3", "--t0", str(T0), "--steps", str(N), "--out",
          str(tmp_path / "cli.csv"), "--on-envelope", "ignore"])
    rows = np.loadtxt(tmp_path / "cli.csv", delimiter=",", comments="#", skiprows=3)
    np.testing.assert_allclose(rows[:, 1], T0 + DT * np.arange(N + 1), rtol=0, atol=1e-12)
    ref = scipy_reference(model.closure, X0[1], T0, N)
    assert np.abs(rows[:, 2] - ref[:, 0]).max() < 1e-7
    proc = run_script_without_mnemode(tmp_path, out, "--x0", "0.3", "--t0", T0, "--steps", N, "--out",
                                      tmp_path / "script.csv")
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert (tmp_path / "script.csv").read_text() == (tmp_path / "cli.csv").read_text()


def test_history_with_different_start_times_is_refused_for_a_timed_simulator(timed, tmp_path, capsys):
    from mnemode.cli import main

    _, out, _ = timed
    times = DT * np.arange(3)
    ts = TrajectorySet(times, np.zeros((3, 2, 1)), ("x",), ("m",), start_times=np.array([0.0, 1.0]))
    ts.save(tmp_path / "hist.npz")
    with pytest.raises(SystemExit) as exc:
        main(["rollout", str(out), "--history", str(tmp_path / "hist.npz"), "--steps", "2", "--out",
              str(tmp_path / "x.csv")])
    assert exc.value.code == MnemodeError.exit_code
    err = capsys.readouterr().err
    assert "different true times" in err and "one trajectory per history file" in err
    assert not (tmp_path / "x.csv").exists()
    # one clock for both (shared start time 2.0): the rollout continues from the history's last true time
    TrajectorySet(times, np.zeros((3, 2, 1)), ("x",), ("m",), start_times=np.array([2.0, 2.0])).save(
        tmp_path / "same.npz")
    main(["rollout", str(out), "--history", str(tmp_path / "same.npz"), "--steps", "2", "--out",
          str(tmp_path / "y.npz")])
    with np.load(tmp_path / "y.npz") as z:
        np.testing.assert_allclose(z["times"], 2.0 + DT * np.arange(2, 5), rtol=0, atol=1e-12)


def test_manifests_without_input_records_load_and_mismatched_ones_are_refused(timed, tmp_path):
    _, out, _ = timed
    auto = tmp_path / "auto"
    model = HybridField(Decay(), None, 1)
    _export(model, auto, parity_steps=5)
    manifest = json.loads((auto / "simulator.json").read_text())
    del manifest["programs"]["step"]["inputs"]          # as format 1 wrote it before programs listed inputs
    (auto / "simulator.json").write_text(json.dumps(manifest))
    sim = load_simulator(auto)
    assert sim.step_kind == "autonomous"
    np.testing.assert_allclose(sim.rollout([[1.0]], 10).numpy()[-1], [[math.exp(-10 * DT)]], rtol=1e-8)  # e^{−t}
    bad = tmp_path / "bad"
    shutil.copytree(out, bad)
    manifest = json.loads((bad / "simulator.json").read_text())
    manifest["programs"]["step"]["inputs"] = {"t": [], "state": ["batch", 1], "u_a": ["batch", 1],
                                              "u_b": ["batch", 1]}
    (bad / "simulator.json").write_text(json.dumps(manifest))
    with pytest.raises(CheckpointError, match="step program inputs"):
        load_simulator(bad)


# -- ONNX copy and the ahead-of-time compiled package ---------------------------------------------

@pytest.mark.slow  # ONNX capture and an inductor compilation: a minute or more on a shared CPU
def test_onnx_and_compiled_copies_of_the_timed_program(tmp_path):
    ort = pytest.importorskip("onnxruntime")
    pytest.importorskip("onnxscript")
    model = memoryless_model().double()
    compiled = shutil.which("c++") is not None or shutil.which("g++") is not None
    manifest = _export(model, tmp_path / "sim", parity_steps=20, onnx=True, compiled=compiled)
    assert manifest["onnx"]["one_step_max_abs_diff_vs_pt2"] < 1e-6
    sess = ort.InferenceSession(str(tmp_path / "sim" / "simulator.onnx"), providers=["CPUExecutionProvider"])
    assert [i.name for i in sess.get_inputs()] == ["t", "state"]
    got = sess.run(None, {"t": np.array(T0), "state": X0})[0]
    with torch.no_grad():
        want = simulate(model, torch.as_tensor(X0), 1, DT, RK4(STEP), time_origin=T0)[-1].numpy()
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-6)   # ONNX keeps Python constants in float32
    if compiled:
        assert manifest["compiled"]["step"]["kind"] == "aoti", manifest["compiled"]
        fast = load_simulator(tmp_path / "sim", compiled=True, on_envelope="ignore")
        plain = load_simulator(tmp_path / "sim", on_envelope="ignore")
        np.testing.assert_allclose(fast.rollout(X0, 50, t0=T0).numpy(), plain.rollout(X0, 50, t0=T0).numpy(),
                                   rtol=0, atol=1e-6)
        out = rollout_to_file(fast, X0, 5, tmp_path / "fast.npz", t0=T0, progress=False)
        assert out.exists()
