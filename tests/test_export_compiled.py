"""Ahead-of-time compiled programs beside the exported ones: listed in the manifest, loaded only when asked.

The reference is the exported ``.pt2`` program itself (PyTorch's own loader); the compiled
package must agree with it to 1e-6 in float64 over a rollout, as the plain program agrees
with the eager model, from Python and from C++ (libtorch's AOTIModelPackageLoader, no
Python in the process).
"""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest
import torch

from mnemode.closures import RecurrentClosure
from mnemode.export import export_simulator
from mnemode.hybrid import HybridField
from mnemode.simulator import load_simulator
from mnemode.solvers import RK4
from mnemode.systems import thermosyphon

ROOT = Path(__file__).resolve().parents[1]

pytestmark = [pytest.mark.slow,
              pytest.mark.skipif(shutil.which("c++") is None and shutil.which("g++") is None,
                                 reason="ahead-of-time compilation needs a C++ compiler")]


@pytest.fixture(scope="module")
def compiled_export(tmp_path_factory):
    """A demo model exported with its programs compiled ahead of time (about a minute)."""
    out = tmp_path_factory.mktemp("compiled") / "sim"
    system = thermosyphon(wall_response_time=1.0)
    closure = RecurrentClosure(3, hidden_size=4, dtype="float64")
    model = HybridField(system.nominal, closure, 3).double()
    envelope = {"flow_rate": [-14.0, 16.0], "temp_horizontal": [-18.0, 22.0], "temp_vertical": [25.0, 75.0]}
    manifest = export_simulator(model, out, dt=0.02, solver=RK4(0.02),
                                state_names=system.state_names, state_units=system.state_units, warm_up_steps=5,
                                envelope=envelope, parity_steps=50, check_float32=False, compiled=True)
    return out, manifest


def test_compiled_programs_agree_with_the_exported_ones(compiled_export):
    out, manifest = compiled_export
    rec = manifest["compiled"]
    # an autonomous model also gets a block program: several intervals per call of native code
    assert set(rec) == {"step", "warm_up", "block"}
    assert rec["step"]["kind"] == "aoti" and rec["step"]["parity"] <= 1e-6, rec
    assert rec["block"]["kind"] == "aoti" and rec["block"]["parity"] <= 1e-6 and rec["block"]["steps"] > 1, rec
    assert {"simulator_compiled.pt2", "block_compiled.pt2"} <= set(manifest["files"])

    plain = load_simulator(out)
    fast = load_simulator(out, compiled=True)
    assert fast._block is not None
    history = np.stack([np.linspace([1.0, 2.0, 45.0], [1.5, 2.5, 46.0], 6)] * 2, axis=1)  # (6, 2, 3)
    # 100 intervals: whole blocks, then single steps for the rest
    a = plain.rollout(None, 100, history=history)
    b = fast.rollout(None, 100, history=history)
    assert torch.as_tensor(np.asarray(a)).shape == torch.as_tensor(np.asarray(b)).shape
    np.testing.assert_allclose(np.asarray(b), np.asarray(a), atol=1e-6, rtol=0)


def test_compiled_step_runs_from_cpp_without_python(compiled_export, tmp_path):
    """scripts/cpp/run_compiled_step.cpp, built against the torch wheel's libtorch, against the Python loader."""
    import subprocess

    from torch.utils.cpp_extension import include_paths, library_paths

    out, _ = compiled_export
    compiler = shutil.which("g++") or shutil.which("c++")
    lib = library_paths()[0]
    binary = tmp_path / "run_compiled_step"
    abi = int(torch._C._GLIBCXX_USE_CXX11_ABI)
    build = subprocess.run([compiler, "-std=c++20", "-O1", str(ROOT / "scripts" / "cpp" / "run_compiled_step.cpp"),
                            *(f"-I{p}" for p in include_paths()), f"-L{lib}", f"-D_GLIBCXX_USE_CXX11_ABI={abi}",
                            "-ltorch", "-ltorch_cpu", "-lc10", f"-Wl,-rpath,{lib}", "-o", str(binary)],
                           capture_output=True, text=True, timeout=600)
    assert build.returncode == 0, build.stderr[-3000:]
    start = [1.0, 2.0, 45.0, 0.1, 0.2, 0.3, 0.4]
    env = {k: v for k, v in __import__("os").environ.items() if not k.startswith("PYTHON")}
    run = subprocess.run([str(binary), str(out / "simulator_compiled.pt2"), "100", *map(str, start)],
                         capture_output=True, text=True, timeout=300, env=env)
    assert run.returncode == 0, run.stderr[-3000:]
    from_cpp = np.array([float(v) for v in run.stdout.split()])
    # the reference: the same 100 steps through the Python loader's plain .pt2 program
    sim = load_simulator(out, on_envelope="ignore")
    s = torch.tensor([start], dtype=torch.float64)
    for _ in range(100):
        s = sim.step(s)
    np.testing.assert_allclose(from_cpp, s.numpy().ravel(), rtol=0, atol=1e-9)


def test_compiled_loading_is_refused_where_none_were_made(tmp_path):
    from mnemode.errors import CheckpointError

    system = thermosyphon(wall_response_time=1.0)
    model = HybridField(system.nominal, None, 3)
    envelope = {"flow_rate": [-14.0, 16.0], "temp_horizontal": [-18.0, 22.0], "temp_vertical": [25.0, 75.0]}
    export_simulator(model, tmp_path / "sim", dt=0.02, solver=RK4(0.02), state_names=system.state_names,
                     state_units=system.state_units, warm_up_steps=0, envelope=envelope, parity_steps=20,
                     check_float32=False)
    with pytest.raises(CheckpointError, match="lists no compiled programs"):
        load_simulator(tmp_path / "sim", compiled=True)
