"""Ahead-of-time compiled programs beside the exported ones: listed in the manifest, loaded only when asked.

The reference is the exported ``.pt2`` program itself (PyTorch's own loader); the compiled
package must agree with it to 1e-6 in float64 over a rollout, as the plain program agrees
with the eager model.
"""

from __future__ import annotations

import shutil

import numpy as np
import pytest
import torch

from mnemode.closures import RecurrentClosure
from mnemode.export import export_simulator
from mnemode.hybrid import HybridField
from mnemode.simulator import load_simulator
from mnemode.solvers import RK4
from mnemode.systems import thermosyphon

pytestmark = [pytest.mark.slow,
              pytest.mark.skipif(shutil.which("c++") is None and shutil.which("g++") is None,
                                 reason="ahead-of-time compilation needs a C++ compiler")]


def test_compiled_programs_agree_with_the_exported_ones(tmp_path):
    system = thermosyphon(wall_response_time=1.0)
    closure = RecurrentClosure(3, hidden_size=4, dtype="float64")
    model = HybridField(system.nominal, closure, 3).double()
    envelope = {"flow_rate": [-14.0, 16.0], "temp_horizontal": [-18.0, 22.0], "temp_vertical": [25.0, 75.0]}
    manifest = export_simulator(model, tmp_path / "sim", dt=0.02, solver=RK4(0.02),
                                state_names=system.state_names, state_units=system.state_units, warm_up_steps=5,
                                envelope=envelope, parity_steps=50, check_float32=False, compiled=True)
    rec = manifest["compiled"]
    # an autonomous model also gets a block program: several intervals per call of native code
    assert set(rec) == {"step", "warm_up", "block"}
    assert rec["step"]["kind"] == "aoti" and rec["step"]["parity"] <= 1e-6, rec
    assert rec["block"]["kind"] == "aoti" and rec["block"]["parity"] <= 1e-6 and rec["block"]["steps"] > 1, rec
    assert {"simulator_compiled.pt2", "block_compiled.pt2"} <= set(manifest["files"])

    plain = load_simulator(tmp_path / "sim")
    fast = load_simulator(tmp_path / "sim", compiled=True)
    assert fast._block is not None
    history = np.stack([np.linspace([1.0, 2.0, 45.0], [1.5, 2.5, 46.0], 6)] * 2, axis=1)  # (6, 2, 3)
    # 100 intervals: whole blocks, then single steps for the rest
    a = plain.rollout(None, 100, history=history)
    b = fast.rollout(None, 100, history=history)
    assert torch.as_tensor(np.asarray(a)).shape == torch.as_tensor(np.asarray(b)).shape
    np.testing.assert_allclose(np.asarray(b), np.asarray(a), atol=1e-6, rtol=0)


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
