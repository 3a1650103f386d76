"""The main job as a newcomer meets it: `mnemode run` end to end, re-assess, export, rollout,
resume after a kill, and the bring-your-own-physics example.

These exercise our own pipeline and file layout (no outside reference applies); the
numerical parts they run are checked against references in the other test modules.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import torch

ROOT = Path(__file__).resolve().parents[1]
pytestmark = pytest.mark.slow


def mnemode(*args, cwd: Path, env_extra: dict | None = None, timeout=600):
    env = dict(os.environ, MNEMODE_RUNS=str(cwd / "runs"))
    env.update(env_extra or {})
    return subprocess.run([sys.executable, "-m", "mnemode", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=timeout)


def run_dir_from(stdout: str) -> Path:
    line = next(s for s in stdout.splitlines() if s.startswith("run directory:"))
    return Path(line.split(":", 1)[1].strip())


@pytest.fixture(scope="module")
def tiny_run(tmp_path_factory):
    cwd = tmp_path_factory.mktemp("main_job")
    r = mnemode("run", "experiment=tiny", "progress=false", cwd=cwd)
    assert r.returncode == 0, r.stderr[-3000:]
    return cwd, run_dir_from(r.stdout), r


def test_run_leaves_a_complete_run_directory(tiny_run):
    cwd, run, r = tiny_run
    assert "| physics_only |" in r.stdout and "| memory |" in r.stdout and "| oracle |" in r.stdout
    metrics = json.loads((run / "metrics.json").read_text())
    for name in ("memory", "memoryless", "data_only", "physics_only", "oracle"):
        m = metrics["models"][name]
        assert set(m) >= {"validity_time_q25", "validity_time_q75", "kl_invariant", "acf_error"}
        # quartiles bracket the median, and no forecast lasts beyond the horizon
        assert 0 < m["validity_time_q25"] <= m["validity_time_median"] <= m["validity_time_q75"] <= 4.0 + 1e-9
    # even 20 steps from a ridge start beat the physics alone on the memory regime
    assert metrics["models"]["memory"]["validity_time_median"] > metrics["models"]["physics_only"][
        "validity_time_median"]
    assert metrics["gamma"] == 0.5
    assert "lyapunov_time" in metrics and "floor" in metrics
    assert set(metrics["fit"]) == {"memory", "memoryless", "data_only"}
    report = (run / "report.md").read_text()
    for name in ("memory", "memoryless", "data_only", "physics_only", "oracle"):  # a table row per model
        assert any(line.startswith(f"| {name}") for line in report.splitlines()), name
    pngs = list((run / "figures").glob("*.png"))
    assert len(pngs) >= 4
    assert list((run / "tb").glob("events.out.tfevents.*"))
    assert (run / "export" / "memory" / "simulator.pt2").exists()
    manifest = json.loads((run / "export" / "memory" / "simulator.json").read_text())
    assert manifest["state"]["names"] == ["flow_rate", "temp_horizontal", "temp_vertical"]
    assert manifest["parity"]["step_program"]["max_abs_diff"] <= 1e-6
    assert any("safety" in c for c in manifest["cautions"])
    status = json.loads((run / "status.json").read_text())
    assert status["state"] == "finished"
    # every fitted model reloads with weights_only=True (tensors and plain data only)
    for p in (run / "models").glob("*.pt"):
        torch.load(p, weights_only=True)


def test_reassess_never_refits(tiny_run):
    cwd, run, _ = tiny_run
    before = {p: p.stat().st_mtime_ns for p in (run / "models").glob("*.pt")}
    # the run directory alone suffices: the shared data cache is not needed
    cache = cwd / "runs" / "data-cache"
    cache.rename(cwd / "moved-cache")
    r = mnemode("assess", str(run), cwd=cwd)
    (cwd / "moved-cache").rename(cache)
    assert sorted(p.name for p in (run / "data").iterdir()) == [
        "test.npz", "train.npz", "val.npz"]
    assert r.returncode == 0, r.stderr[-3000:]
    assert {p: p.stat().st_mtime_ns for p in (run / "models").glob("*.pt")} == before
    assert "| memory |" in r.stdout


def test_export_refuses_to_overwrite_then_replaces_on_request(tiny_run):
    cwd, run, _ = tiny_run
    r = mnemode("export", str(run), cwd=cwd)
    assert r.returncode != 0 and "Fix:" in r.stderr and "Traceback" not in r.stderr
    r = mnemode("export", str(run), "--model", "memoryless", cwd=cwd)
    assert r.returncode == 0, r.stderr[-3000:]
    assert json.loads((run / "export" / "memoryless" / "simulator.json").read_text())["state"]["hidden_size"] == 0
    # the main model's export is still there, and stays the default
    assert json.loads((run / "export" / "memory" / "simulator.json").read_text())["state"]["hidden_size"] > 0
    assert json.loads((run / "export" / "exports.json").read_text())["default"] == "memory"


def test_rollout_command_writes_a_trajectory(tiny_run):
    cwd, run, _ = tiny_run
    out = cwd / "forecast.csv"
    r = mnemode("rollout", str(run / "export"), "--x0", "1.0,2.0,45.0", "--steps", "50", "--out", str(out),
                "--cold-start", cwd=cwd)
    assert r.returncode == 0, r.stderr[-3000:]
    from mnemode.data import load_trajectories

    traj = load_trajectories(out)
    assert traj.states.shape == (51, 1, 3)
    np.testing.assert_allclose(traj.states[0, 0], [1.0, 2.0, 45.0])
    r = mnemode("rollout", str(run / "export"), "--x0", "1,2,45", "--steps", "5", "--out", str(out), "--cold-start",
                cwd=cwd)
    assert r.returncode != 0 and "already exists" in r.stderr


def test_killed_run_resumes_and_finishes(tmp_path):
    env = dict(os.environ, MNEMODE_RUNS=str(tmp_path / "runs"))
    run = tmp_path / "runs" / "killed"
    args = [sys.executable, "-m", "mnemode", "fit", "experiment=tiny", "progress=false", "compare=none",
            "fit.steps=200", "fit.checkpoint_every=5", f"hydra.run.dir={run}"]
    proc = subprocess.Popen(args, cwd=tmp_path, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    ckpt = run / "checkpoints" / "memory"
    deadline = time.time() + 300
    while time.time() < deadline and not (ckpt.exists() and any(ckpt.iterdir())):
        time.sleep(0.2)
    time.sleep(1.0)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    assert json.loads((run / "status.json").read_text())["state"] == "running"
    # a plain re-run into the same directory is refused and changes nothing
    r = subprocess.run(args, cwd=tmp_path, env=env, capture_output=True, text=True, timeout=300)
    assert r.returncode != 0 and "mnemode resume" in r.stderr
    r = subprocess.run([sys.executable, "-m", "mnemode", "resume", str(run)], cwd=tmp_path, env=env,
                       capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr[-3000:]
    status = json.loads((run / "status.json").read_text())
    assert status["state"] == "finished" and status["stages"]["fit:memory"] == "finished"
    fit = json.loads((run / "metrics.json").read_text())["fit"]["memory"]
    assert fit["resumed_from"] is not None and fit["resumed_from"] > 0
    assert fit["steps"] == 200
    # TensorBoard: the resumed fit continues the same curve; events the killed run wrote after
    # its checkpoint are purged, so every step appears once (read back with all points kept)
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    events = EventAccumulator(str(run / "tb"), size_guidance={"scalars": 0})
    events.Reload()
    tag = next(t for t in events.Tags()["scalars"] if t.endswith("train/loss"))
    steps = [e.step for e in events.Scalars(tag)]
    assert len(steps) == len(set(steps)) and max(steps) == 199 and min(steps) == 0


def test_bring_your_own_physics_example_runs_end_to_end(tmp_path):
    # from a folder of its own, as a user would: diagnose first, then the preset fits what it advised
    example = ROOT / "scripts" / "own_physics_example"
    env = dict(os.environ, MNEMODE_RUNS=str(tmp_path / "runs"))
    r = subprocess.run([sys.executable, str(example / "run_example.py"), "progress=false", "assess.n_starts=8",
                        "assess.free_run_length=20", "assess.stability_length=0", "assess.stability_length=0"], cwd=tmp_path, env=env, capture_output=True, text=True,
                       timeout=600)
    assert r.returncode == 0, r.stderr[-3000:]
    assert "recommendation: derivative targets" in r.stdout and "recommendation: memoryless ->" in r.stdout
    run = run_dir_from(r.stdout)
    assert run.parent.name == "circuit"
    metrics = json.loads((run / "metrics.json").read_text())
    assert set(metrics["models"]) >= {"memoryless", "memory", "physics_only"}
    m = {k: v["validity_time_median"] for k, v in metrics["models"].items() if k != "oracle"}
    # the model diagnose recommended is the best of the run
    assert m["memoryless"] > m["physics_only"] and m["memoryless"] >= m["memory"]
    # a system without a truth generator has no oracle, and the report claims none
    assert "oracle" not in metrics["models"]
    assert not any(line.startswith("| oracle |") for line in (run / "report.md").read_text().splitlines())
    manifest = json.loads((run / "export" / "memoryless" / "simulator.json").read_text())  # the main model
    assert manifest["state"]["names"] == ["v", "i"]


def test_multirun_sweep_writes_one_finished_run_per_job_and_resume_skips_them(tmp_path):
    r = mnemode("fit", "-m", "experiment=tiny", "progress=false", "compare=none", "fit.steps=4",
                "system.wall_response_time=0.1,1.0", "hydra.sweep.dir=runs/sweep", cwd=tmp_path)
    assert r.returncode == 0, r.stderr[-3000:]
    jobs = sorted((tmp_path / "runs" / "sweep").glob("job*"))
    assert len(jobs) == 2
    taus = set()
    for job in jobs:
        assert json.loads((job / "status.json").read_text())["state"] == "finished"
        taus.add(float(__import__("yaml").safe_load((job / "config.yaml").read_text())["system"]["wall_response_time"]))
    assert taus == {0.1, 1.0}
    r = mnemode("resume", str(tmp_path / "runs" / "sweep"), cwd=tmp_path)
    assert r.returncode == 0 and r.stdout.count("finished, skipped") == 2


def test_diagnose_recommends_memory_on_the_memory_regime(tmp_path):
    r = mnemode("diagnose", "experiment=tiny", "progress=false", cwd=tmp_path)
    assert r.returncode == 0, r.stderr[-3000:]
    assert "recommendation: memory ->" in r.stdout


def test_forcing_inputs_reach_physics_and_closure_through_the_main_job(tmp_path):
    example = ROOT / "scripts" / "own_physics_example"
    sys.path.insert(0, str(example))
    try:
        from circuit_physics import DrivenCircuitWithHeatingResistor
    finally:
        sys.path.remove(str(example))
    from mnemode.data import generate
    from mnemode.solvers import RK4
    from mnemode.systems import System

    rig = DrivenCircuitWithHeatingResistor()
    lab = System(name="driven_lab", state_names=("v", "i"), state_units=("V", "A"), time_unit="s",
                 nominal=rig.nominal, truth=rig, observed_index=(0, 1), spin_up=20.0,
                 initial_mean=(0.0, 0.0, 0.5), initial_scale=(2.0, 2.0, 0.2))
    data = generate(lab, n_trajectories=5, duration=30.0, dt=0.05, solver=RK4(0.01), seed=1)
    # the drive the rig applied, on the generator's absolute clock (spin-up first)
    u = rig.drive(torch.as_tensor(data.times) + 20.0).numpy()
    data.forcing = np.repeat(u[:, None, None], 5, axis=1)
    data.forcing_names, data.hidden = ("drive",), None
    csv = data.save(tmp_path / "driven.csv")
    r = mnemode("run", "system=custom", "system.nominal._target_=circuit_physics.DrivenVanDerPolCircuit",
                "system.state_names=[v,i]", "data=file", f"data.path={csv}", "data.forcing_columns=[drive]",
                "closure=random_features", "fit=derivative", "compare=none", "model.name=memoryless",
                "warm_up=0", "assess.n_starts=10", "assess.horizon=20", "assess.free_run_length=20", "assess.stability_length=0",
                "assess.acf_max_lag=1", "progress=false", "solver.step=0.05",
                cwd=tmp_path, env_extra={"PYTHONPATH": str(example)})
    assert r.returncode == 0, r.stderr[-3000:]
    run = run_dir_from(r.stdout)
    status = json.loads((run / "status.json").read_text())
    assert status["stages"]["export"] == "finished"
    manifest = json.loads((run / "export" / "memoryless" / "simulator.json").read_text())
    assert manifest["forcing"]["names"] == ["drive"] and manifest["parity"]["passed"]
    metrics = json.loads((run / "metrics.json").read_text())
    # the rig is not chaotic: the corrected model should track it longer than the uncorrected one
    assert metrics["models"]["memoryless"]["validity_time_median"] > metrics["models"]["physics_only"]["validity_time_median"]
    # the closure was built with the forcing among its inputs
    state = torch.load(run / "models" / "memoryless.pt", weights_only=True)["state_dict"]
    assert state["closure.scaling.in_mean"].shape == (3,)
