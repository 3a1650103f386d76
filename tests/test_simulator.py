"""Loading and running an exported simulator: checks, envelope guard, files, the torch-only script.

Outside references used here:
- hashlib.sha256 and byte-level tampering of the exported files;
- the envelope rule recomputed by hand from the manifest (min − m·range, max + m·range);
- numpy's CSV reader and mnemode's own trajectory loader for the written files;
- a Python process in which mnemode cannot be imported (isolated interpreter, no site
  processing, an import blocker), running scripts/run_exported_simulator.py.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch

from mnemode.closures.base import Closure
from mnemode.data import generate, load_trajectories
from mnemode.errors import CheckpointError, ConfigError, DataError, MnemodeError
from mnemode.export import export_simulator
from mnemode.hybrid import HybridField, HybridFlowMap, warm_up
from mnemode.simulator import EnvelopeError, EnvelopeWarning, load_simulator, rollout_to_file
from mnemode.solvers import RK4, FlowMap
from mnemode.systems.thermosyphon import IdealWallLoopField, thermosyphon

torch.set_num_threads(1)

DT, W = 0.02, 25
NAMES = ["flow_rate", "temp_horizontal", "temp_vertical"]
SCRIPT = Path(__file__).resolve().parents[1] / "scripts" / "run_exported_simulator.py"


class WallLawClosure(Closure):
    """Exact heat-storing wall (β = 1, τ = 1): dr/dt = (x_{Y,Z}/2 − r), readout adds r to dY/dt, dZ/dt."""

    hidden_size = 2

    def correction(self, x, r=None, u=None):
        return torch.cat((torch.zeros_like(x[..., :1]), r), dim=-1)

    def hidden_field(self, x, r, u=None):
        return x[..., 1:3] / 2.0 - r


class ZeroClosure(Closure):
    """Memoryless closure that adds nothing (the physics-only model through the hybrid path)."""

    def correction(self, x, r=None, u=None):
        return torch.zeros_like(x)


@pytest.fixture(scope="module")
def demo():
    return generate(thermosyphon(wall_response_time=1.0), n_trajectories=4, duration=(W + 60) * DT, dt=DT, seed=5,
                    spin_up=20.0)


# Ranges covering the demo attractor at τ = 1 (as long training runs would give; the short
# test trajectories above stay inside).
WIDE = {"flow_rate": [-14.0, 16.0], "temp_horizontal": [-18.0, 22.0], "temp_vertical": [25.0, 75.0]}


@pytest.fixture(scope="module")
def memory(tmp_path_factory, demo):
    """Continuous model with memory, float64."""
    out = tmp_path_factory.mktemp("memory")
    model = HybridField(IdealWallLoopField(), WallLawClosure(3), 3).double()
    export_simulator(model, out, dt=DT, solver=RK4(0.01), state_names=NAMES, state_units=["u", "K", "K"],
                     warm_up_steps=W, envelope=WIDE, time_unit="tu", parity_steps=20,
                     check_float32=False)
    return model, out, load_simulator(out)


NARROW = {"flow_rate": [-2.0, 2.0], "temp_horizontal": [-2.0, 2.0], "temp_vertical": [40.0, 50.0]}


@pytest.fixture(scope="module")
def narrow(tmp_path_factory):
    """Memoryless discrete model with an envelope far smaller than the attractor: rollouts leave it."""
    out = tmp_path_factory.mktemp("narrow")
    model = HybridFlowMap(FlowMap(IdealWallLoopField(), DT, RK4(0.01)), ZeroClosure(3), 3, DT).double()
    export_simulator(model, out, dt=DT, state_names=NAMES, state_units=["u", "K", "K"], warm_up_steps=0,
                     envelope=NARROW, parity_steps=20, check_float32=False)
    return model, out, load_simulator(out)


# -- loading and running ---------------------------------------------------------------

def test_load_from_directory_pt2_or_json(memory, tmp_path):
    _, out, loaded = memory  # the fixture loaded it from the directory
    assert loaded.directory == out
    for p in (out / "simulator.pt2", out / "simulator.json"):
        sim = load_simulator(p)
        assert sim.state_names == tuple(NAMES) and sim.dt == DT and sim.hidden_size == 2
        assert sim.manifest["format"] == "mnemode-simulator" and sim.warm_up_steps == W
    with pytest.raises(CheckpointError, match="not an exported simulator"):
        load_simulator(tmp_path / "nowhere")
    with pytest.raises(CheckpointError, match="manifest is missing"):
        load_simulator(tmp_path)


def test_step_batch_one_and_n(memory, demo):
    _, out, sim = memory
    x = torch.as_tensor(demo.states[0], dtype=torch.float64)          # (4, 3)
    full = torch.cat((x, torch.zeros(4, 2, dtype=torch.float64)), -1)  # zeros = the initial vector
    batch = sim.step(full)
    assert batch.shape == (4, 5)
    for b in range(4):
        one = sim.step(full[b])
        assert one.shape == (5,)
        assert torch.allclose(one, batch[b], rtol=0, atol=1e-12)
    assert torch.equal(sim.step(x), batch)  # observed-only input starts r from the initial vector


def test_warm_up_and_rollout_with_history(memory, demo):
    model, out, sim = memory
    hist = torch.as_tensor(demo.states[: W + 1], dtype=torch.float64)
    with torch.no_grad():
        r_eager = warm_up(model, hist, DT, RK4(0.01))
    r = sim.warm_up(hist)
    assert r.shape == (4, 2) and (r - r_eager).abs().max().item() <= 1e-12
    via_history = sim.rollout(None, 30, history=hist)
    via_r0 = sim.rollout(hist[-1], 30, r0=r)
    assert via_history.shape == (31, 4, 3)
    assert torch.equal(via_history, via_r0) and torch.equal(via_history[0], hist[-1])
    x, rr = sim.rollout(None, 3, history=hist, return_hidden=True)
    assert rr.shape == (4, 4, 2) and torch.equal(rr[0], r)
    with pytest.warns(UserWarning, match=f"fitted with warm-ups of {W + 1}"):
        sim.warm_up(hist[:5])


# -- envelope guard -----------------------------------------------------------------------

def _outside_x0(sim):
    lo, hi = sim.envelope["temp_vertical"]
    return [0.0, 0.0, hi + 0.5 * (hi - lo)]  # beyond the default margin of 0.1 × range


def test_envelope_warns_by_default(memory):
    sim = memory[2]
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        sim.rollout(_outside_x0(sim), 2, cold_start=True)
    assert len(caught) == 1 and issubclass(caught[0].category, EnvelopeWarning)
    assert caught[0].filename == __file__  # points at the caller's line
    assert "x0, trajectory 0: component 'temp_vertical'" in str(caught[0].message)
    assert "outside the training envelope" in str(caught[0].message)


def test_envelope_error_and_ignore(memory):
    sim = memory[2].with_envelope(on_envelope="error")
    with pytest.raises(EnvelopeError, match="temp_vertical") as info:
        sim.rollout(_outside_x0(sim), 2, cold_start=True)
    assert isinstance(info.value, MnemodeError) and "on_envelope='ignore'" in str(info.value)
    sim.on_envelope = "ignore"
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # any warning fails the test
        sim.rollout(_outside_x0(sim), 2, cold_start=True)
    with pytest.raises(ConfigError, match="on_envelope"):
        load_simulator(memory[1], on_envelope="shout")
    with pytest.raises(ConfigError, match="on_envelope"):
        sim.on_envelope = "loud"
    with pytest.raises(ConfigError, match="envelope_margin"):
        load_simulator(memory[1], envelope_margin=-1)


def test_envelope_margin_rule(memory):
    """Inside: min − m·range ≤ x ≤ max + m·range, recomputed here from the manifest."""
    sim = memory[2].with_envelope(on_envelope="error")
    env = sim.manifest["envelope"]["components"]
    lo, hi = env["temp_vertical"]
    m = sim.manifest["envelope"]["default_margin"]
    assert m == 0.1
    inside = [float(np.mean(env["flow_rate"])), float(np.mean(env["temp_horizontal"])), hi + 0.9 * m * (hi - lo)]
    sim.rollout(inside, 0, cold_start=True)  # within the margin: no error
    sim.envelope_margin = 0.0
    with pytest.raises(EnvelopeError):
        sim.rollout(inside, 0, cold_start=True)
    lower, upper = sim.bounds()
    assert upper[2].item() == hi and lower[2].item() == lo


def test_rollout_leaving_envelope_is_reported_at_the_first_step(narrow):
    sim = narrow[2].with_envelope(on_envelope="ignore")
    x0 = [1.0, 1.0, 45.0]
    traj = sim.rollout(x0, 200)[:, 0].numpy()
    lo = np.array([NARROW[n][0] - 0.1 * (NARROW[n][1] - NARROW[n][0]) for n in NAMES])
    hi = np.array([NARROW[n][1] + 0.1 * (NARROW[n][1] - NARROW[n][0]) for n in NAMES])
    outside = ((traj < lo) | (traj > hi)).any(axis=1)
    assert outside.any() and not outside[0]
    first = int(np.argmax(outside))
    sim.on_envelope = "error"
    with pytest.raises(EnvelopeError, match=f"rollout at step {first} "):
        sim.rollout(x0, 200)
    sim.on_envelope = "warn"
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        sim.rollout(x0, 200)
    env_warnings = [w for w in caught if issubclass(w.category, EnvelopeWarning)]
    assert len(env_warnings) == 1 and f"step {first} " in str(env_warnings[0].message)


class _Growth(torch.nn.Module):
    """dx/dt = x: overflows float64 after about 710 time units."""

    autonomous = True

    def forward(self, t, x, u=None):
        return x


def test_blow_up_deep_in_a_rollout_is_reported_at_its_step(tmp_path):
    # The rollout checks a chunk of steps at a time; the step it names must be the one a
    # step-by-step loop finds (the reference here: Simulator.step called once per interval).
    model = HybridField(_Growth(), None, 1).double()
    export_simulator(model, tmp_path / "g", dt=1.0, solver=RK4(1.0), state_names=["a"], state_units=["m"],
                     warm_up_steps=0, envelope={"a": [-1.0, 1.0]}, parity_steps=5, check_float32=False)
    from mnemode.simulator import NonFiniteStateError

    sim = load_simulator(tmp_path / "g", on_envelope="ignore")
    s, first = torch.ones(1, 1, dtype=torch.float64), None
    for k in range(1, 1000):
        try:
            s = sim.step(s)
        except NonFiniteStateError:  # one step at a time: this step turned non-finite
            first = k
            break
    assert first is not None and first > 64  # beyond the first chunk
    with pytest.raises(NonFiniteStateError, match=f"rollout at step {first} "):
        sim.rollout([1.0], 1000)


# -- input checks ---------------------------------------------------------------------

def test_shape_errors_name_argument_shape_and_components(memory, narrow):
    sim = memory[2]
    with pytest.raises(DataError, match=r"x0.*\(2, 4\).*\(B, 3\) with components \(flow_rate, temp_horizontal, "
                                        r"temp_vertical\).*Fix:"):
        sim.rollout(torch.zeros(2, 4, dtype=torch.float64), 1)
    with pytest.raises(DataError, match=r"history.*\(T, B, 3\)"):
        sim.rollout(None, 1, history=torch.zeros(10, 2, 2, dtype=torch.float64))
    with pytest.raises(DataError, match="T ≥ 2"):
        sim.warm_up(torch.zeros(1, 2, 3, dtype=torch.float64))
    with pytest.raises(DataError, match=r"r0.*\(B, 2\)"):
        sim.rollout([0.0, 0.0, 45.0], 1, r0=[1.0, 2.0, 3.0])
    with pytest.raises(DataError, match="r0.*rows"):
        sim.rollout(torch.full((3, 3), 45.0, dtype=torch.float64), 1, r0=torch.zeros(2, 2, dtype=torch.float64))
    with pytest.raises(DataError, match="needs a starting point"):
        sim.rollout(None, 1)
    with pytest.raises(ConfigError, match="n_steps"):
        sim.rollout([0.0, 0.0, 45.0], -1)
    with pytest.raises(DataError, match=r"state.*\(B, 5\) for \[x, r\]"):
        sim.step(torch.zeros(2, 4, dtype=torch.float64))
    memoryless = narrow[2]
    with pytest.raises(DataError, match="memoryless"):
        memoryless.rollout([0.0, 0.0, 45.0], 1, r0=[0.0, 0.0])
    assert memoryless.warm_up(torch.zeros(3, 1, 3, dtype=torch.float64) + 45) is None


def test_dtype_and_value_errors(memory):
    sim = memory[2]
    with pytest.raises(DataError, match=r"torch.float32 tensor.*float64.*x0.to\(torch.float64\)"):
        sim.rollout(torch.tensor([0.0, 0.0, 45.0]), 1, cold_start=True)
    with pytest.raises(DataError, match="torch.int64"):
        sim.rollout(torch.tensor([0, 0, 45]), 1, cold_start=True)
    with pytest.raises(DataError, match="non-finite"):
        sim.rollout([0.0, float("nan"), 45.0], 1, cold_start=True)
    with pytest.raises(DataError, match="not an array of numbers"):
        sim.rollout(["a", "b", "c"], 1, cold_start=True)
    # numpy arrays and lists of any float type are converted
    a = sim.rollout(np.array([1.0, 2.0, 45.0], dtype=np.float32), 2, cold_start=True)
    b = sim.rollout([1.0, 2.0, 45.0], 2, cold_start=True)
    assert a.dtype == torch.float64 and torch.equal(a, b)


# -- integrity ------------------------------------------------------------------------------

def _copy(out: Path, dest: Path) -> Path:
    shutil.copytree(out, dest)
    return dest


def test_tampered_or_truncated_files_are_detected(memory, tmp_path):
    _, out, _ = memory
    flipped = _copy(out, tmp_path / "flipped")
    data = bytearray((flipped / "simulator.pt2").read_bytes())
    data[len(data) // 2] ^= 0x01
    (flipped / "simulator.pt2").write_bytes(bytes(data))
    with pytest.raises(CheckpointError, match="SHA-256.*modified or truncated"):
        load_simulator(flipped)

    cut = _copy(out, tmp_path / "cut")
    raw = (cut / "warm_up.pt2").read_bytes()
    (cut / "warm_up.pt2").write_bytes(raw[: len(raw) // 2])
    with pytest.raises(CheckpointError, match="warm_up.pt2.*SHA-256"):
        load_simulator(cut)

    gone = _copy(out, tmp_path / "gone")
    (gone / "warm_up.pt2").unlink()
    with pytest.raises(CheckpointError, match="missing"):
        load_simulator(gone)

    future = _copy(out, tmp_path / "future")
    text = (future / "simulator.json").read_text().replace('"format_version": 1', '"format_version": 99')
    (future / "simulator.json").write_text(text)
    with pytest.raises(CheckpointError, match="format version 99"):
        load_simulator(future)

    (future / "simulator.json").write_text("{ not json")
    with pytest.raises(CheckpointError, match="not readable JSON"):
        load_simulator(future)


# -- rollout to a file ------------------------------------------------------------------

@pytest.mark.parametrize("suffix", [".csv", ".npz"])
def test_rollout_to_file_round_trip_and_no_overwrite(memory, demo, tmp_path, suffix):
    sim = memory[2].with_envelope(on_envelope="ignore")
    hist = demo.states[: W + 1]
    path = tmp_path / f"forecast{suffix}"
    rollout_to_file(sim, None, 40, path, history=hist, progress=False)
    back = load_trajectories(path, expected_dim=3)
    want = sim.rollout(None, 40, history=hist).numpy()
    assert back.states.shape == (41, 4, 3) and back.names == tuple(NAMES)
    np.testing.assert_allclose(back.states, want, rtol=0, atol=1e-12)
    np.testing.assert_allclose(back.times, np.arange(41) * DT, rtol=0, atol=1e-12)
    before = path.read_bytes()
    with pytest.raises(MnemodeError, match="already exists.*overwrite=True"):
        rollout_to_file(sim, [0.0, 0.0, 45.0], 5, path, progress=False, cold_start=True)
    assert path.read_bytes() == before
    rollout_to_file(sim, [0.0, 0.0, 45.0], 5, path, progress=False, overwrite=True, cold_start=True)
    assert load_trajectories(path).states.shape == (6, 1, 3)


def test_rollout_to_file_rejects_unknown_suffix_and_shows_progress(narrow, tmp_path, capsys):
    sim = narrow[2].with_envelope(on_envelope="ignore")
    with pytest.raises(DataError, match=r"\.csv or \.npz"):
        rollout_to_file(sim, [1.0, 1.0, 45.0], 5, tmp_path / "out.txt")
    path = rollout_to_file(sim, [1.0, 1.0, 45.0], 1000, tmp_path / "long.npz", progress=True)
    assert "rollout" in capsys.readouterr().err  # the progress bar's label
    assert np.load(path)["states"].shape == (1001, 1, 3)


# -- the torch-only script ------------------------------------------------------------------

_BOOT = r"""
import sys, runpy
sys.path[:0] = SITES
class _Block:
    def find_spec(self, name, path=None, target=None):
        if name == "mnemode" or name.startswith("mnemode."):
            raise ImportError("mnemode is blocked in this process")
        return None
sys.meta_path.insert(0, _Block())
try:
    import mnemode
    print("MNEMODE-IMPORTABLE")
except ImportError:
    print("MNEMODE-NOT-IMPORTABLE")
script = sys.argv[1]
sys.argv = sys.argv[1:]
runpy.run_path(script, run_name="__main__")
"""


def _run_isolated(tmp_path: Path, *args) -> subprocess.CompletedProcess:
    """Run the script in a fresh interpreter that sees torch and numpy but cannot import mnemode.

    ``-I`` ignores PYTHON* variables and the user site; ``-S`` skips site-packages'
    ``.pth`` files, which is where the editable install of mnemode hooks in; only the
    directories holding torch and numpy are put back on the path, and a meta-path
    blocker refuses mnemode whatever else is there.
    """
    sites = sorted({str(Path(torch.__file__).parents[1]), str(Path(np.__file__).parents[1])})
    script = shutil.copy(SCRIPT, tmp_path / "run_exported_simulator.py")
    boot = f"SITES = {sites!r}\n" + _BOOT
    return subprocess.run([sys.executable, "-I", "-S", "-c", boot, str(script), *map(str, args)],
                          cwd=tmp_path, env={"PATH": "/usr/bin:/bin"}, capture_output=True, text=True,
                          timeout=300)


def test_script_runs_without_mnemode_and_matches_the_loader(memory, demo, tmp_path):
    _, out, sim = memory
    export = _copy(out, tmp_path / "export")
    hist = demo.select([2]).time_slice(0, W + 1)
    hist.save(tmp_path / "history.csv")
    proc = _run_isolated(tmp_path, export, "--steps", 50, "--history", tmp_path / "history.csv",
                         "--out", tmp_path / "forecast.csv")
    assert proc.returncode == 0, proc.stderr
    assert "MNEMODE-NOT-IMPORTABLE" in proc.stdout
    want = sim.rollout(None, 50, history=hist.states)[:, 0].numpy()
    # the script writes the layout mnemode rollout writes: byte for byte the same file
    rollout_to_file(sim, None, 50, tmp_path / "same.csv", history=hist.states, t0=float(hist.times[-1]),
                    progress=False)
    assert (tmp_path / "forecast.csv").read_text() == (tmp_path / "same.csv").read_text()
    back = load_trajectories(tmp_path / "forecast.csv", expected_dim=3)
    assert back.states.shape == (51, 1, 3)
    # times continue from the history's last time
    np.testing.assert_allclose(back.times, hist.times[-1] + np.arange(51) * DT, rtol=0, atol=1e-12)
    np.testing.assert_allclose(back.states[:, 0], want, rtol=0, atol=1e-12)
    final = [float(part.split("=")[1]) for part in proc.stdout.split("final state: ")[1].strip().split(", ")]
    np.testing.assert_allclose(final, want[-1], rtol=1e-9)


@pytest.mark.slow  # two fresh interpreters importing torch: about 10 s on a shared CPU
def test_script_x0_envelope_report_and_tamper_check(narrow, tmp_path):
    _, out, sim = narrow
    export = _copy(out, tmp_path / "export")
    proc = _run_isolated(tmp_path, export, "--steps", 100, "--x0", "1,1,45")
    assert proc.returncode == 0, proc.stderr
    assert "MNEMODE-NOT-IMPORTABLE" in proc.stdout
    assert "left the training envelope" in proc.stderr
    final = [float(part.split("=")[1]) for part in proc.stdout.split("final state: ")[1].strip().split(", ")]
    want = sim.with_envelope(on_envelope="ignore").rollout([1.0, 1.0, 45.0], 100)[-1, 0].numpy()
    np.testing.assert_allclose(final, want, rtol=1e-9)
    data = bytearray((export / "simulator.pt2").read_bytes())
    data[100] ^= 0xFF
    (export / "simulator.pt2").write_bytes(bytes(data))
    proc = _run_isolated(tmp_path, export, "--steps", 1, "--x0", "1,1,45")
    assert proc.returncode != 0 and "SHA-256" in proc.stderr
