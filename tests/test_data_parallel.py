"""Data-parallel trajectory fitting under torchrun (gloo, 2 processes) against one process.

With the same global batch, averaging the gradients of the two halves (what
DistributedDataParallel does) is the gradient of the whole batch's mean loss, so the loss
curve must be the one process's curve up to floating-point summation order. Stated
tolerance: relative 1e-6 over 12 updates (rounding differences of 1e-16 grow through the
chaotic unroll, but not to that size in so few steps).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

pytestmark = pytest.mark.slow

FIT_SCRIPT = textwrap.dedent("""
    import json, sys
    import torch
    from mnemode import distributed
    from mnemode.closures import RecurrentClosure
    from mnemode.data import generate
    from mnemode.fitting import FitContext, TrajectoryFit
    from mnemode.hybrid import HybridField
    from mnemode.solvers import RK4
    from mnemode.systems import thermosyphon

    torch.set_num_threads(1)
    distributed.init_from_env()
    system = thermosyphon(wall_response_time=1.0)
    data = generate(system, n_trajectories=3, duration=12.0, dt=0.02, solver=RK4(0.01), seed=4, spin_up=10.0)
    train, val = data.split_by_trajectory([2, 1])
    model = HybridField(system.nominal, RecurrentClosure(3, hidden_size=3, dtype="float64"), 3)

    class Record:  # a TensorBoard stand-in that keeps the training losses
        losses = []
        def add_scalar(self, tag, value, step):
            if tag.endswith("train/loss"):
                self.losses.append(float(value))
        def flush(self):
            pass

    writer = Record()
    fit = TrajectoryFit(steps=12, batch_size=8, lr=5e-3, horizon=0.3, warm_up_grad=0.2, val_every=6,
                        val_windows=4, val_horizon=1.0, checkpoint_every=6, curriculum=0.0)
    ctx = FitContext(solver=RK4(0.02), warm_up=0.4, writer=writer, checkpoint_dir=sys.argv[2], seed=3, name="m")
    out = fit.fit(model, train, val, ctx)
    if distributed.is_main():
        json.dump({"losses": writer.losses, "steps": out["steps"],
                   "weights": {k: v.tolist() for k, v in model.state_dict().items()}}, open(sys.argv[1], "w"))
    distributed.finish()
""")


def _env():
    env = dict(os.environ, OMP_NUM_THREADS="1")
    for key in ("RANK", "WORLD_SIZE", "LOCAL_RANK", "MASTER_ADDR", "MASTER_PORT"):
        env.pop(key, None)
    return env


def _torchrun(n: int, *args, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "torch.distributed.run", "--standalone", f"--nproc_per_node={n}",
                           *args], cwd=cwd, env=_env(), capture_output=True, text=True, timeout=600)


def test_two_processes_give_the_one_process_loss_curve(tmp_path):
    script = tmp_path / "fit.py"
    script.write_text(FIT_SCRIPT)
    one = subprocess.run([sys.executable, str(script), str(tmp_path / "one.json"), str(tmp_path / "ck1")],
                         env=_env(), capture_output=True, text=True, timeout=600)
    assert one.returncode == 0, one.stderr[-3000:]
    two = _torchrun(2, str(script), str(tmp_path / "two.json"), str(tmp_path / "ck2"), cwd=tmp_path)
    assert two.returncode == 0, two.stderr[-3000:]
    a, b = (json.loads((tmp_path / f).read_text()) for f in ("one.json", "two.json"))
    assert a["steps"] == b["steps"] == 12 and len(a["losses"]) == len(b["losses"]) == 12
    np.testing.assert_allclose(b["losses"], a["losses"], rtol=1e-6)
    for key in a["weights"]:
        np.testing.assert_allclose(b["weights"][key], a["weights"][key], rtol=1e-6, atol=1e-9)
    # rank 0 alone wrote the checkpoint
    assert sorted(p.name for p in (tmp_path / "ck2").iterdir()) == ["state.pt"]


def test_mnemode_fit_under_torchrun_writes_one_run_directory(tmp_path):
    runs = tmp_path / "runs"
    r = _torchrun(2, "-m", "mnemode", "fit", "experiment=tiny", "compare=none", "progress=false",
                  "fit.steps=6", "fit.val_every=3", "fit.checkpoint_every=3", f"runs_root={runs}",
                  f"data.cache_dir={tmp_path / 'cache'}", cwd=tmp_path)
    assert r.returncode == 0, r.stderr[-3000:]
    run_dirs = [p.parent for p in runs.rglob("status.json")]
    assert len(run_dirs) == 1, run_dirs
    run = run_dirs[0]
    assert (run / "models" / "memory.pt").exists()
    status = json.loads((run / "status.json").read_text())
    assert status["state"] == "finished" and status["stages"]["fit:memory"] == "finished"
    # TensorBoard from rank 0 only: one event file for the fit
    assert len(list((run / "tb").rglob("events.out.tfevents.*"))) == 1
    # the fit made its 6 steps, checkpointed by rank 0
    import torch

    state = torch.load(run / "checkpoints" / "memory" / "state.pt", weights_only=True)
    assert state["step"] == 6 and state["finished"]
