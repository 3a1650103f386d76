"""Forced simulators: export, parity, forcing inputs, clock, guards and signing.

The scenario is a user's own physics (tests/forced_slab/slab_physics.py): a slab heated by a
load u(t) whose slow core temperature is not observed. With the exact memory closure
(r = the core temperature) the hybrid model *is* the true system, which gives an outside
reference.

Outside references used here:
- scipy.integrate.solve_ivp (RK45, tight tolerances) on the true slab equations written out
  in slab_physics.py, driven by the same piecewise-linear load (numpy.interp);
- the eager mnemode model (hybrid.simulate / warm_up / assessment forecasts) for parity;
- onnxruntime for the ONNX copies;
- Python's hmac module (RFC 2104 HMAC-SHA256) recomputed here for the signature.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import shutil
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch
from scipy.integrate import solve_ivp

from mnemode.archive import archive_problem
from mnemode.forecasting import Starts, run_forecasts
from mnemode.validity import validity_times
from mnemode.closures.base import Closure
from mnemode.data import generate
from mnemode.errors import CheckpointError, ConfigError, DataError
from mnemode.export import export_simulator
from mnemode.hybrid import Forcing, HybridField, simulate, warm_up
from mnemode.simulator import (EnvelopeError, EnvelopeWarning, NonFiniteStateError, load_simulator,
                               read_forcing)
from mnemode.solvers import RK4
from mnemode.systems import System

sys.path.insert(0, str(Path(__file__).resolve().parent / "forced_slab"))
from slab_physics import G, H, K, Q, TAU, NominalSlab, TrueSlab, heat_load  # noqa: E402

torch.set_num_threads(1)

DT, W, STEP = 0.1, 30, 0.05
NAMES, FNAMES = ["T1", "T2"], ["load"]
ENV = {"T1": [0.0, 9.0], "T2": [0.0, 6.0]}
FENV = {"load": [0.2, 1.8]}


class CoreClosure(Closure):
    """The missing term with its memory: r follows the core, dr/dt = (T1 − r)/τ, and adds g (r − T1)."""

    hidden_size = 1

    def __init__(self, dim: int = 2, g: float = G, tau: float = TAU):
        super().__init__(dim)
        self.g, self.tau = float(g), float(tau)

    def correction(self, x, r=None, u=None):
        return torch.cat((self.g * (r[..., :1] - x[..., :1]), torch.zeros_like(x[..., 1:2])), dim=-1)

    def hidden_field(self, x, r, u=None):
        return (x[..., :1] - r) / self.tau


class ClockedSlab(NominalSlab):
    """Physics that depends on time itself: a day-like ambient swing 0.2 sin(0.5 t) on the back face."""

    def forward(self, t, x, u=None):
        d = super().forward(t, x, u)
        swing = 0.2 * torch.sin(0.5 * torch.as_tensor(t, dtype=x.dtype))
        return torch.stack((d[..., 0], d[..., 1] + swing), dim=-1)


def _export(model, out, **kw):
    args = dict(dt=DT, solver=RK4(STEP), state_names=NAMES, state_units=["K", "K"], warm_up_steps=W,
                envelope=ENV, forcing_names=FNAMES, forcing_units=["W"], forcing_envelope=FENV, time_unit="s",
                check_float32=False)
    args.update(kw)
    return export_simulator(model, out, **args)


def _load_samples(n: int, batch: int, t0: float = 0.0) -> torch.Tensor:
    """The rig's heat load sampled every Δt from ``t0``: ``(n, batch, 1)``."""
    t = t0 + DT * torch.arange(n, dtype=torch.float64)
    return heat_load(t)[:, None, None].expand(n, batch, 1).clone()


@pytest.fixture(scope="module")
def exact(tmp_path_factory):
    """The exact hybrid model, exported with the default 1000-step parity check."""
    out = tmp_path_factory.mktemp("forced")
    model = HybridField(NominalSlab(), CoreClosure(), 2).double()
    manifest = _export(model, out)
    return model, out, manifest


@pytest.fixture(scope="module")
def slab_data():
    lab = System(name="slab", state_names=("T1", "T2"), state_units=("K", "K"), time_unit="s", nominal=NominalSlab(),
                 truth=TrueSlab(), observed_index=(0, 1), initial_mean=(3.0, 2.0, 2.5),
                 initial_scale=(1.0, 1.0, 1.0))
    data = generate(lab, n_trajectories=3, duration=40.0, dt=DT, solver=RK4(0.01), seed=3, spin_up=0.0)
    data.forcing = heat_load(torch.as_tensor(data.times)).numpy()[:, None, None].repeat(3, axis=1)
    data.forcing_names = ("load",)
    return data


# -- parity and outside references ----------------------------------------------------------

def test_manifest_names_the_forcing_and_parity_passed(exact):
    _, out, manifest = exact
    f = manifest["forcing"]
    assert f["names"] == ["load"] and f["units"] == ["W"] and f["envelope"] == FENV
    assert "piecewise linear" in f["interpolation"]
    assert manifest["programs"]["step"]["inputs"] == {"t": [], "state": ["batch", 3], "u_a": ["batch", 1],
                                                      "u_b": ["batch", 1]}
    assert manifest["programs"]["warm_up"]["inputs"]["u_b"] == ["batch", 1]
    par = manifest["parity"]
    assert par["steps"] == 1000 and par["batches"] == [1, 8] and par["passed"]
    assert par["step_program"]["max_abs_diff"] <= 1e-6 and par["warm_up_program"]["max_abs_diff"] <= 1e-6
    assert manifest["format_version"] == 2
    for name, rec in manifest["files"].items():
        assert hashlib.sha256((out / name).read_bytes()).hexdigest() == rec["sha256"]


@pytest.mark.parametrize("batch", [1, 8])
def test_1000_steps_match_the_eager_model_in_float64(exact, batch):
    model, out, _ = exact
    sim = load_simulator(out, on_envelope="ignore")
    gen = torch.Generator().manual_seed(batch)
    x0 = torch.tensor([1.0, 0.5], dtype=torch.float64) + 4 * torch.rand((batch, 2), generator=gen, dtype=torch.float64)
    r0 = torch.rand((batch, 1), generator=gen, dtype=torch.float64) * 3
    u = _load_samples(1001, batch)
    with torch.no_grad():
        eager = simulate(model, x0, 1000, DT, RK4(STEP), r0=r0, forcing=Forcing(0.0, DT, u))
    got = sim.rollout(x0, 1000, r0=r0, forcing=u)
    assert float((got - eager).abs().max()) <= 1e-6


def test_exact_model_follows_scipy_truth_driven_by_the_same_load(exact):
    """The exported simulator with r0 = θ0 against solve_ivp on the true equations (outside reference)."""
    _, out, _ = exact
    sim = load_simulator(out, on_envelope="ignore")
    n, t0 = 200, 2.5
    times = t0 + DT * np.arange(n + 1)
    u = heat_load(torch.as_tensor(times)).numpy()

    def rhs(t, z):  # slab_physics.py's docstring, written out; the load linear between samples
        t1, t2, th = z
        load = np.interp(t, times, u)
        return [-K * (t1 - t2) - H * t1 + Q * load + G * (th - t1), K * (t1 - t2) - H * t2, (t1 - th) / TAU]

    z0 = [3.0, 1.5, 2.0]
    ref = solve_ivp(rhs, (times[0], times[-1]), z0, t_eval=times, method="RK45", rtol=1e-11, atol=1e-12).y.T
    got = sim.rollout(z0[:2], n, r0=[z0[2]], forcing=u[:, None], t0=t0, return_hidden=True)
    states = torch.cat(got, dim=-1)[:, 0].numpy()
    # RK4 at h = 0.05 on a smooth linear system: local error ~ h^5 |λ|^5, far below 1e-6 here
    np.testing.assert_allclose(states, ref, rtol=0, atol=1e-6)


def test_warm_up_with_forcing_matches_eager(exact):
    model, out, _ = exact
    sim = load_simulator(out, on_envelope="ignore")
    x0 = torch.tensor([[2.0, 1.0], [4.0, 3.0]], dtype=torch.float64)
    u_hist = _load_samples(W + 1, 2, t0=-W * DT)
    with torch.no_grad():
        hist = simulate(model, x0, W, DT, RK4(STEP), r0=torch.ones(2, 1, dtype=torch.float64),
                        forcing=Forcing(-W * DT, DT, u_hist), t0=-W * DT)
        r_eager = warm_up(model, hist, DT, RK4(STEP), t0=-W * DT, forcing=Forcing(-W * DT, DT, u_hist))
    r = sim.warm_up(hist, forcing=u_hist)
    assert float((r - r_eager).abs().max()) <= 1e-12


def test_validity_times_equal_the_eager_models(tmp_path, slab_data):
    """An imperfect closure (g and τ off): forecasts through the assessment's own path and through the export."""
    model = HybridField(NominalSlab(), CoreClosure(g=0.1, tau=1.0), 2).double()
    _export(model, tmp_path / "x", parity_steps=20)
    sim = load_simulator(tmp_path / "x", on_envelope="ignore")
    n_h = 250
    starts = Starts(np.array([0, 1, 2, 0, 1, 2]), np.array([W, W, W, W + 60, W + 60, W + 60]))
    eager = run_forecasts(model, RK4(STEP), slab_data.states, starts, W, n_h, DT, slab_data.forcing)
    exported = []
    for b, s in zip(starts.trajectory, starts.index):
        hist = slab_data.states[s - W: s + 1, b]
        u = slab_data.forcing[s - W: s + n_h + 1, b]
        exported.append(sim.rollout(None, n_h, history=hist, forcing=u)[:, 0].numpy())
    exported = np.stack(exported, axis=1)
    truth = np.stack([slab_data.states[s: s + n_h + 1, b] for b, s in zip(starts.trajectory, starts.index)], axis=1)
    assert np.abs(exported - eager.states).max() <= 1e-6
    t_e, c_e = validity_times(eager.states, truth, DT)
    t_x, c_x = validity_times(exported, truth, DT)
    np.testing.assert_array_equal(t_x, t_e)
    np.testing.assert_array_equal(c_x, c_e)
    assert (~c_e).sum() >= 3, "most forecasts should fail within the horizon for the check to bite"


def test_time_dependent_physics_sees_the_rollout_clock(tmp_path):
    model = HybridField(ClockedSlab(), CoreClosure(), 2).double()
    _export(model, tmp_path / "clock", parity_steps=20)
    sim = load_simulator(tmp_path / "clock", on_envelope="ignore")
    t0, n = 3.7, 60
    u = _load_samples(n + 1, 1, t0=t0)
    x0, r0 = torch.tensor([[2.0, 1.0]], dtype=torch.float64), torch.tensor([[1.5]], dtype=torch.float64)
    with torch.no_grad():
        eager = simulate(model, x0, n, DT, RK4(STEP), r0=r0, t0=t0, forcing=Forcing(t0, DT, u))
        shifted = simulate(model, x0, n, DT, RK4(STEP), r0=r0, t0=0.0, forcing=Forcing(0.0, DT, u))
    got = sim.rollout(x0, n, r0=r0, forcing=u, t0=t0)
    assert float((got - eager).abs().max()) <= 1e-12
    assert float((shifted - eager).abs().max()) > 1e-3  # the clock matters for this physics


@pytest.mark.slow  # ONNX capture of two programs: about a minute on a shared CPU
def test_onnx_copies_of_forced_programs(tmp_path):
    ort = pytest.importorskip("onnxruntime")
    pytest.importorskip("onnxscript")
    model = HybridField(NominalSlab(), CoreClosure(), 2).double()
    manifest = _export(model, tmp_path / "onnx", parity_steps=5, onnx=True)
    assert manifest["onnx"]["one_step_max_abs_diff_vs_pt2"] < 1e-6
    sess = ort.InferenceSession(str(tmp_path / "onnx" / "simulator.onnx"), providers=["CPUExecutionProvider"])
    s = np.array([[2.0, 1.0, 1.5], [3.0, 2.0, 2.5]])
    ua, ub = np.array([[0.9], [1.1]]), np.array([[1.0], [1.2]])
    feeds = dict(zip([i.name for i in sess.get_inputs()], [np.array(0.4), s, ua, ub]))
    got = sess.run(None, feeds)[0]
    with torch.no_grad():
        want = simulate(model, torch.as_tensor(s[:, :2]), 1, DT, RK4(STEP), r0=torch.as_tensor(s[:, 2:]), t0=0.4,
                        forcing=Forcing(0.4, DT, torch.as_tensor(np.stack([ua, ub]))), return_hidden=True)
    np.testing.assert_allclose(got, torch.cat(want, -1)[-1].numpy(), rtol=0, atol=1e-6)


# -- forcing inputs and guards ------------------------------------------------------------------

def test_forcing_shapes_lengths_and_presence_are_checked(exact):
    _, out, _ = exact
    sim = load_simulator(out, on_envelope="ignore")
    x0, r0 = [2.0, 1.0], [1.0]
    with pytest.raises(DataError, match=r"forcing.*missing.*load"):
        sim.rollout(x0, 5, r0=r0)
    with pytest.raises(DataError, match=r"forcing.*\(5, 1\).*\(6, 1, 1\) or \(6, 1\)"):
        sim.rollout(x0, 5, r0=r0, forcing=np.ones((5, 1)))
    hist = np.full((W + 1, 2), 2.0)
    with pytest.raises(DataError, match=r"history rows \+ steps"):
        sim.rollout(None, 5, history=hist, forcing=np.ones((6, 1)))
    sim.rollout(None, 5, history=hist, forcing=np.ones((W + 1 + 5, 1)))
    with pytest.raises(DataError, match="non-finite"):
        sim.rollout(x0, 2, r0=r0, forcing=[[1.0], [np.nan], [1.0]])


def test_forcing_outside_its_envelope_is_guarded(exact):
    _, out, _ = exact
    sim = load_simulator(out, on_envelope="error")
    u = np.ones((4, 1))
    u[2, 0] = 5.0  # far above the training range [0.2, 1.8]
    with pytest.raises(EnvelopeError, match="forcing input 'load' = 5"):
        sim.rollout([2.0, 1.0], 3, r0=[1.0], forcing=u)
    sim.on_envelope = "warn"
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        sim.rollout([2.0, 1.0], 3, r0=[1.0], forcing=u)
    assert any(issubclass(w.category, EnvelopeWarning) and "forcing input" in str(w.message) for w in caught)


def test_hidden_state_is_guarded(exact):
    _, out, manifest = exact
    (lo, hi), = manifest["envelope"]["hidden"]
    sim = load_simulator(out, on_envelope="error")
    far = hi + 10 * (hi - lo)
    with pytest.raises(EnvelopeError, match="hidden component 'r1'"):
        sim.rollout([2.0, 1.0], 3, r0=[far], forcing=np.ones((4, 1)))


class Exploding(Closure):
    """A correction that makes T1 grow like 1/(c − t): a rollout turns non-finite in finite time."""

    def correction(self, x, r=None, u=None):
        return torch.cat((x[..., :1] ** 2 * 50.0, torch.zeros_like(x[..., 1:])), dim=-1)


@pytest.mark.parametrize("mode", ["warn", "ignore", "error"])
def test_a_blow_up_stops_the_rollout_in_every_mode(tmp_path_factory, mode):
    out = tmp_path_factory.getbasetemp() / "exploding"
    if not (out / "simulator.json").exists():
        model = HybridField(NominalSlab(), Exploding(2), 2).double()
        _export(model, out, parity_steps=2, warm_up_steps=0, envelope={"T1": [0.0, 1e300], "T2": [-1e300, 1e300]})
    sim = load_simulator(out, on_envelope=mode, envelope_margin=0.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(NonFiniteStateError, match=r"rollout at step \d+.*'T1' became (nan|inf)"):
            sim.rollout([1.0, 0.0], 400, forcing=np.ones((401, 1)))


def test_memory_model_refuses_a_cold_start_unless_asked(exact):
    _, out, _ = exact
    sim = load_simulator(out, on_envelope="ignore")
    with pytest.raises(DataError, match=f"history of {W + 1} observations.*cold_start=True"):
        sim.rollout([2.0, 1.0], 3, forcing=np.ones((4, 1)))
    cold = sim.rollout([2.0, 1.0], 3, forcing=np.ones((4, 1)), cold_start=True)
    assert cold.shape == (4, 1, 2)


def test_forcing_file_is_interpolated_linearly(tmp_path):
    path = tmp_path / "load.csv"
    path.write_text("# units: s,W\ntime,load,other\n0.0,1.0,9\n1.0,3.0,9\n2.0,2.0,9\n")
    u = read_forcing(path, ["load"], [0.0, 0.25, 1.5, 2.0])
    np.testing.assert_allclose(u[:, 0, 0], np.interp([0.0, 0.25, 1.5, 2.0], [0, 1, 2], [1.0, 3.0, 2.0]))
    with pytest.raises(DataError, match="covers times 0 to 2"):
        read_forcing(path, ["load"], [0.0, 2.5])
    with pytest.raises(DataError, match="lacks the column"):
        read_forcing(path, ["heat"], [0.0])


# -- signing ------------------------------------------------------------------------------------

def test_signed_export_verifies_and_tampering_is_refused(exact, tmp_path):
    model, _, _ = exact
    key = b"a key the user holds, 32 bytes.."
    out = tmp_path / "signed"
    _export(model, out, parity_steps=3, key=key)
    raw = (out / "simulator.json").read_bytes()
    # RFC 2104 HMAC-SHA256 recomputed with Python's hmac module
    assert (out / "simulator.sig").read_text().strip() == hmac.new(key, raw, hashlib.sha256).hexdigest()
    load_simulator(out, key=key)
    with pytest.raises(CheckpointError, match="does not match its signature"):
        load_simulator(out, key=b"another key of the same length..")
    (out / "simulator.json").write_bytes(raw.replace(b'"default_margin": 0.1', b'"default_margin": 9.0'))
    with pytest.raises(CheckpointError, match="tampered"):
        load_simulator(out, key=key)
    unsigned = tmp_path / "unsigned"
    shutil.copytree(exact[1], unsigned)
    with pytest.raises(CheckpointError, match="simulator.sig.*missing"):
        load_simulator(unsigned, key=key)
    with pytest.raises(ConfigError, match="at least 16"):
        _export(model, tmp_path / "short", parity_steps=3, key=b"short")


def test_exported_archives_hold_nothing_pickled(exact):
    _, out, manifest = exact
    for name in ("simulator.pt2", "warm_up.pt2"):
        assert archive_problem((out / name).read_bytes()) is None
    assert json.loads((out / "simulator.json").read_text())["programs"]["step"]["kind"] == "torch.export"
