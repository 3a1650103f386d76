"""A forced scenario of the user's own physics through run → export → rollout, from the command line.

The heated slab (tests/forced_slab/slab_physics.py) with its heat load recorded in the data
file goes through `mnemode run`; the exported simulator is driven from a forcing CSV by
`mnemode rollout` and by the plain-torch script in a process that cannot import mnemode,
and both match the eager model rebuilt from the run directory (mnemode.pipeline.load_model
and hybrid.simulate / warm_up, the computation the assessment uses). A second export of the
run goes to a folder of the user's choice (two models side by side: tests/test_main_job.py).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch

from mnemode.data import generate, load_trajectories
from mnemode.hybrid import Forcing, simulate, warm_up
from mnemode.simulator import load_simulator
from mnemode.solvers import RK4
from mnemode.systems import System

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE / "forced_slab"))
from slab_physics import NominalSlab, TrueSlab, heat_load  # noqa: E402
from test_export_tampering import run_script_without_mnemode  # noqa: E402

DT = 0.1


def mnemode(*args, cwd: Path, timeout=600):
    env = dict(os.environ, MNEMODE_RUNS=str(cwd / "runs"), PYTHONPATH=str(HERE / "forced_slab"),
               OMP_NUM_THREADS="1")
    return subprocess.run([sys.executable, "-m", "mnemode", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=timeout)


@pytest.mark.slow  # a whole run, two exports, six fresh interpreters: about a minute unloaded (4.7 min at load 10 on 2 cores)
def test_forced_slab_run_export_rollout_and_plain_torch_script(tmp_path):
    lab = System(name="slab", state_names=("T1", "T2"), state_units=("K", "K"), time_unit="s", nominal=NominalSlab(),
                 truth=TrueSlab(), observed_index=(0, 1), initial_mean=(3.0, 2.0, 2.5), initial_scale=(1.0, 1.0, 1.0))
    data = generate(lab, n_trajectories=5, duration=30.0, dt=DT, solver=RK4(0.01), seed=7, spin_up=0.0)
    data.forcing = heat_load(torch.as_tensor(data.times)).numpy()[:, None, None].repeat(5, axis=1)
    data.forcing_names, data.hidden = ("load",), None
    csv = data.save(tmp_path / "slab.csv")
    r = mnemode("run", "system=custom", "system.nominal._target_=slab_physics.NominalSlab",
                "system.state_names=[T1,T2]", "system.state_units=[K,K]", "data=file", f"data.path={csv}",
                "data.forcing_columns=[load]", "+data.forcing_units=[W]", "closure=reservoir_filter_bank", "fit=readout_ridge",
                "compare=none", "warm_up=2.0", "assess.n_starts=6", "assess.horizon=5",
                "assess.free_run_length=10", "assess.stability_length=0", "assess.acf_max_lag=1", "progress=false", "solver.step=0.05",
                "name=slab", "hydra.run.dir=runs/slab", cwd=tmp_path)
    assert r.returncode == 0, r.stderr[-3000:]
    run = tmp_path / "runs" / "slab"
    assert json.loads((run / "status.json").read_text())["stages"]["export"] == "finished"
    manifest = json.loads((run / "export" / "memory" / "simulator.json").read_text())
    assert manifest["forcing"]["names"] == ["load"] and manifest["forcing"]["units"] == ["W"]
    assert manifest["parity"]["passed"] and manifest["parity"]["steps"] == 1000
    w = manifest["hidden_init"]["warm_up_steps"]
    assert w == 20

    # history and forcing files as a user would hold them: the history's last row at t = 7.0
    test = load_trajectories(run / "data" / "test.npz")
    b, s, n = 0, 70, 50
    hist = test.select([b]).time_slice(s - w, s + 1)
    hist.forcing, hist.forcing_names = None, ()
    hist.save(tmp_path / "history.csv")
    times = test.times[s - w: s + n + 1]
    (tmp_path / "load.csv").write_text("time,load\n" + "".join(
        f"{float(t)!r},{float(u)!r}\n" for t, u in zip(times, test.forcing[s - w: s + n + 1, b, 0])))

    # a short history is refused with the row count a warm-up needs
    hist.time_slice(0, 5).save(tmp_path / "short.csv")
    r = mnemode("rollout", str(run / "export"), "--history", str(tmp_path / "short.csv"), "--forcing",
                str(tmp_path / "load.csv"), "--steps", "3", "--out", str(tmp_path / "x.csv"), cwd=tmp_path)
    assert r.returncode != 0 and f"needs {w + 1}" in r.stderr and "Traceback" not in r.stderr
    # x0 alone on a memory model is refused unless told to start cold
    r = mnemode("rollout", str(run / "export"), "--x0", "3,2", "--forcing", str(tmp_path / "load.csv"),
                "--steps", "3", "--out", str(tmp_path / "x.csv"), cwd=tmp_path)
    assert r.returncode != 0 and "--cold-start" in r.stderr and "Traceback" not in r.stderr

    r = mnemode("rollout", str(run / "export"), "--history", str(tmp_path / "history.csv"), "--forcing",
                str(tmp_path / "load.csv"), "--steps", str(n), "--out", str(tmp_path / "forecast.csv"),
                "--on-envelope", "ignore", cwd=tmp_path)
    assert r.returncode == 0, r.stderr[-3000:]
    got = load_trajectories(tmp_path / "forecast.csv", forcing_columns=["load"])
    np.testing.assert_allclose(got.times, test.times[s: s + n + 1], rtol=0, atol=1e-12)  # times continue

    # the eager model rebuilt from the run directory, driven the way the assessment drives it
    from mnemode import pipeline
    from mnemode.rundir import RunDir

    rd = RunDir(run)
    cfg = rd.load_config()
    system = pipeline.make_system(cfg)
    model, _ = pipeline.load_model(rd, "memory", cfg, system, DT, n_forcing=1)
    u = torch.as_tensor(test.forcing[s - w: s + n + 1, b:b + 1])
    x = torch.as_tensor(test.states[s - w: s + 1, b:b + 1])
    solver = RK4(0.05)
    with torch.no_grad():
        r0 = warm_up(model, x, DT, solver, t0=-w * DT, forcing=Forcing(-w * DT, DT, u))
        eager = simulate(model, x[-1], n, DT, solver, r0=r0, forcing=Forcing(-w * DT, DT, u)).numpy()
    assert np.abs(got.states - eager).max() <= 1e-6

    # the plain-torch script, mnemode blocked, writes the same file
    proc = run_script_without_mnemode(tmp_path, run / "export" / "memory", "--history", tmp_path / "history.csv",
                                      "--forcing", tmp_path / "load.csv", "--steps", n, "--out",
                                      tmp_path / "script.csv")
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert (tmp_path / "script.csv").read_text() == (tmp_path / "forecast.csv").read_text()

    # a second export of the run in a folder of the user's choice; the first is untouched and both load
    before = (run / "export" / "memory" / "simulator.pt2").read_bytes()
    r = mnemode("export", str(run), "--out", str(tmp_path / "mine"), cwd=tmp_path)
    assert r.returncode == 0, r.stderr[-3000:]
    main, mine = load_simulator(run / "export"), load_simulator(tmp_path / "mine")
    assert (run / "export" / "memory" / "simulator.pt2").read_bytes() == before
    assert main.manifest["model_name"] == mine.manifest["model_name"] == "memory" and mine.forced
    assert json.loads((run / "export" / "exports.json").read_text()) == {"default": "memory", "models": ["memory"]}
