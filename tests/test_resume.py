"""Checkpoints and exact resume of trajectory fits.

A fit killed with SIGKILL after a mid-run checkpoint and then resumed must end with the
same weights, bit for bit, as an uninterrupted fit (CPU, one thread, deterministic
algorithms). Checkpoints must load with ``torch.load(weights_only=True)``, must never be
overwritten without resume, and damaged or mismatching ones must fail with a message
naming the file and the tensor. These are behaviour checks of our own format (no outside
reference applies); each asserts a concrete outcome.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest
import torch

from mnemode.closures import RecurrentClosure
from mnemode.data import generate, load_trajectories
from mnemode.errors import CheckpointError
from mnemode.fitting import FitContext, TrajectoryFit, checkpoint_step
from mnemode.fitting.checkpoint import checkpoint_path, load_state_checked
from mnemode.hybrid import HybridField
from mnemode.solvers import RK4
from mnemode.systems import thermosyphon

torch.set_num_threads(1)

SETTINGS = dict(steps=40, batch_size=4, horizon=(0.1, 0.3), warm_up_grad=0.2, val_every=5, val_windows=4,
                val_horizon=1.0, checkpoint_every=10, readout_init="offset", lr=1e-2)

SCRIPT = textwrap.dedent('''
    import sys, time
    from pathlib import Path
    import torch
    torch.set_num_threads(1)
    torch.use_deterministic_algorithms(True)
    from mnemode.closures import RecurrentClosure
    from mnemode.data import load_trajectories
    from mnemode.fitting import FitContext, TrajectoryFit
    from mnemode.hybrid import HybridField
    from mnemode.solvers import RK4
    from mnemode.systems import thermosyphon

    data_path, ckpt_dir, out_path, mode = sys.argv[1:5]
    settings = eval(sys.argv[5])

    class Writer:
        """Writes a marker and stalls at update 15, so the parent can kill the fit there."""
        def add_scalar(self, tag, value, step):
            if mode == "stall" and step == 15:
                Path(out_path + ".stalled").write_text("15")
                time.sleep(120)
        def flush(self):
            pass

    data = load_trajectories(data_path)
    train, val = data.split_by_trajectory([2, 1])
    model = HybridField(thermosyphon().nominal, RecurrentClosure(3, hidden_size=3), 3).double()
    ctx = FitContext(solver=RK4(0.02), warm_up=0.4, checkpoint_dir=ckpt_dir, resume=(mode == "resume"),
                     writer=Writer(), seed=5, name="m")
    out = TrajectoryFit(**settings).fit(model, train, val, ctx)
    torch.save(model.state_dict(), out_path)
    print("RESUMED_FROM", out["resumed_from"], "STEPS", out["steps"])
''')


@pytest.fixture(scope="module")
def data_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("data") / "demo.npz"
    generate(thermosyphon(), n_trajectories=3, duration=8.0, dt=0.02, solver=RK4(0.02), seed=2,
             spin_up=10.0).save(path)
    return path


def _launch(tmp_path, data_file, ckpt, out, mode):
    script = tmp_path / "fit_script.py"
    script.write_text(SCRIPT)
    env = dict(os.environ, OMP_NUM_THREADS="1", MKL_NUM_THREADS="1", CUBLAS_WORKSPACE_CONFIG=":4096:8")
    return subprocess.Popen([sys.executable, str(script), str(data_file), str(ckpt), str(out), mode, repr(SETTINGS)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)


def _finish(proc, timeout=120):
    out, err = proc.communicate(timeout=timeout)
    assert proc.returncode == 0, err[-3000:]
    return out


def _reference_fit(data_file, ckpt):
    """The uninterrupted fit, in this process, under the same deterministic settings as the script."""
    previous = torch.are_deterministic_algorithms_enabled()
    torch.use_deterministic_algorithms(True)
    try:
        data = load_trajectories(data_file)
        train, val = data.split_by_trajectory([2, 1])
        model = HybridField(thermosyphon().nominal, RecurrentClosure(3, hidden_size=3), 3).double()
        ctx = FitContext(solver=RK4(0.02), warm_up=0.4, checkpoint_dir=ckpt, seed=5, name="m")
        out = TrajectoryFit(**SETTINGS).fit(model, train, val, ctx)
    finally:
        torch.use_deterministic_algorithms(previous)
    assert out["resumed_from"] is None and out["steps"] == 40
    return model.state_dict()


@pytest.mark.slow
def test_killed_fit_resumes_to_the_same_weights_bit_for_bit(tmp_path, data_file):
    # the fit to be killed (SIGKILL: no clean-up runs) after its step-10 checkpoint, at update 15;
    # while it starts, the uninterrupted reference runs here
    victim_out = tmp_path / "victim.pt"
    victim = _launch(tmp_path, data_file, tmp_path / "ckpt", victim_out, "stall")
    a = _reference_fit(data_file, tmp_path / "ckpt_ref")
    marker = Path(str(victim_out) + ".stalled")
    deadline = time.time() + 120
    while not marker.exists():
        assert victim.poll() is None, victim.communicate()[1][-3000:]
        assert time.time() < deadline, "the fit never reached update 15"
        time.sleep(0.05)
    assert checkpoint_step(tmp_path / "ckpt") == 10
    victim.send_signal(signal.SIGKILL)
    victim.wait(timeout=30)
    assert victim.returncode == -signal.SIGKILL
    assert not victim_out.exists()
    state = torch.load(checkpoint_path(tmp_path / "ckpt"), weights_only=True)
    assert state["step"] == 10 and not state["finished"]

    resumed = _launch(tmp_path, data_file, tmp_path / "ckpt", tmp_path / "resumed.pt", "resume")
    assert "RESUMED_FROM 10 STEPS 40" in _finish(resumed)

    b = torch.load(tmp_path / "resumed.pt", weights_only=True)
    assert a.keys() == b.keys()
    for key in a:
        assert torch.equal(a[key], b[key]), key
    # the final checkpoints agree too (the best model and the optimiser's state)
    fa = torch.load(checkpoint_path(tmp_path / "ckpt_ref"), weights_only=True)
    fb = torch.load(checkpoint_path(tmp_path / "ckpt"), weights_only=True)
    assert fa["finished"] and fb["finished"] and fa["step"] == fb["step"] == 40
    for key in fa["optimiser"]["state"]:
        for name, value in fa["optimiser"]["state"][key].items():
            assert torch.equal(value, fb["optimiser"]["state"][key][name]), (key, name)


# -- in-process checks of the checkpoint format and its failures ------------------------------------

def _fit_once(data_file, ckpt, resume=False, hidden=3, **changes):
    data = load_trajectories(data_file)
    train, val = data.split_by_trajectory([2, 1])
    model = HybridField(thermosyphon().nominal, RecurrentClosure(3, hidden_size=hidden), 3).double()
    settings = dict(SETTINGS, steps=10, checkpoint_every=5)
    settings.update(changes)
    ctx = FitContext(solver=RK4(0.02), warm_up=0.4, checkpoint_dir=ckpt, resume=resume, seed=5, name="m")
    return model, TrajectoryFit(**settings).fit(model, train, val, ctx)


def test_checkpoint_is_plain_tensors_and_protected(tmp_path, data_file):
    ckpt = tmp_path / "ckpt"
    model, out = _fit_once(data_file, ckpt)
    state = torch.load(checkpoint_path(ckpt), weights_only=True)
    assert state["finished"] and state["step"] == 10 and checkpoint_step(ckpt) == 10
    for key in ("model", "optimiser", "generator", "torch_rng", "best_model", "settings", "diagnostics"):
        assert key in state
    assert state["diagnostics"]["val_validity"] == out["val_validity"]
    assert not list(ckpt.glob("*.part")), "no temporary files are left behind"

    before = checkpoint_path(ckpt).read_bytes()
    with pytest.raises(CheckpointError, match="already holds a checkpoint"):
        _fit_once(data_file, ckpt)
    assert checkpoint_path(ckpt).read_bytes() == before

    # resuming a finished fit loads its result without training again
    again, out2 = _fit_once(data_file, ckpt, resume=True)
    assert out2["resumed_from"] == 10 and out2["val_validity"] == out["val_validity"]
    for key, value in model.state_dict().items():
        assert torch.equal(value, again.state_dict()[key]), key
    assert checkpoint_path(ckpt).read_bytes() == before
    assert checkpoint_step(tmp_path / "nothing_here") is None


def test_damaged_or_mismatching_checkpoints_fail_clearly(tmp_path, data_file):
    ckpt = tmp_path / "ckpt"
    _fit_once(data_file, ckpt)
    with pytest.raises(CheckpointError, match=r"A_rel\].*shape \(3, 3\).*expects \(4, 4\)"):
        _fit_once(data_file, ckpt, resume=True, hidden=4)
    with pytest.raises(CheckpointError, match="fit.batch_size"):
        _fit_once(data_file, ckpt, resume=True, batch_size=3)
    # the learning rate is one of the settings a resume may change (e.g. after a divergence)
    _fit_once(data_file, ckpt, resume=True, lr=5e-3)

    path = checkpoint_path(ckpt)
    path.write_bytes(path.read_bytes()[:1000])  # truncated, as by a full disk
    with pytest.raises(CheckpointError, match="cannot be read"):
        _fit_once(data_file, ckpt, resume=True)
    with pytest.raises(CheckpointError, match="cannot be read"):
        checkpoint_step(ckpt)
    path.write_bytes(b"not a checkpoint at all")
    with pytest.raises(CheckpointError, match=str(path.name)):
        _fit_once(data_file, ckpt, resume=True)

    closure = RecurrentClosure(3, hidden_size=2).double()
    bad = closure.state_dict()
    bad["C"] = torch.full_like(bad["C"], float("nan"))
    with pytest.raises(CheckpointError, match=r"\[C\].*non-finite"):
        load_state_checked(closure, bad, "saved.pt")
    del bad["C"]
    with pytest.raises(CheckpointError, match=r"\[C\].*missing"):
        load_state_checked(closure, bad, "saved.pt")
