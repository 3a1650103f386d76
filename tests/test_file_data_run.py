"""`mnemode run` on a user's own files, as another tool wrote them: no manual adaptation.

The data come from a heated tank with a slow, unobserved wall (tests/scenarios/heated_tank.py:
forcing and memory): three CSV files with their own column names, trajectories of
different lengths starting at different times, times written with 10 significant
digits, one gap. The expected trajectories, segments and splits are counted from the
files this test writes.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
SCENARIOS = ROOT / "tests" / "scenarios"
pytestmark = pytest.mark.slow

DT = 0.1
# name -> (start time, samples, drive phase); B loses rows 300..311 (one gap)
TRAIN = {"A": (3.7, 420, 0.0), "B": (12.15, 700, 1.0), "C": (101.3, 520, 2.0)}
VAL = {"D": (7.9, 450, 3.0)}
TEST = {"E": (55.55, 600, 4.0), "F": (250.05, 480, 5.0)}
GAP = ("B", 300, 312)


def mnemode(*args, cwd: Path, env_extra: dict | None = None, timeout=600):
    env = dict(os.environ, MNEMODE_RUNS=str(cwd / "runs"), PYTHONPATH=str(SCENARIOS))
    env.update(env_extra or {})
    return subprocess.run([sys.executable, "-m", "mnemode", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=timeout)


def _write(path: Path, trajectories: dict, gap=None, dt=DT):
    sys.path.insert(0, str(SCENARIOS))
    try:
        from heated_tank import simulate
    finally:
        sys.path.remove(str(SCENARIOS))
    lines = ["# heated tank, exported by the plant historian", "t_s,batch_id,level_m,temp_C,inflow_m3s,heater_kW"]
    for run, (t0, n, phase) in trajectories.items():
        t, x, u = simulate(t0, n, dt, phase)
        for i in range(n):
            if gap and gap[0] == run and gap[1] <= i < gap[2]:
                continue
            lines.append(f"{t[i]:.10g},{run},{x[i, 0]:.10g},{x[i, 1]:.10g},{u[i, 0]:.10g},{u[i, 1]:.10g}")
    path.write_text("\n".join(lines) + "\n")
    return path


COMMON = ["system=custom", "system.nominal._target_=heated_tank.NominalTank", "system.state_names=[level_m,temp_C]",
          "data=file", "data.time_column=t_s", "data.trajectory_column=batch_id",
          "data.forcing_columns=[inflow_m3s,heater_kW]", "progress=false"]


@pytest.fixture(scope="module")
def tank_files(tmp_path_factory):
    cwd = tmp_path_factory.mktemp("tank_run")
    folder = cwd / "tank"
    folder.mkdir()
    _write(folder / "train.csv", TRAIN, GAP)
    _write(folder / "val.csv", VAL)
    _write(folder / "test.csv", TEST)
    return cwd


def test_run_on_three_files_with_own_columns_grids_and_a_gap(tank_files):
    cwd = tank_files
    r = mnemode("run", *COMMON, "data.train=tank/train.csv", "data.val=tank/val.csv", "data.test=tank/test.csv",
                "closure=random_features", "fit=derivative", "compare=none", "model.name=memoryless", "warm_up=0",
                "solver.step=0.05", "assess.n_starts=6", "assess.horizon=5", "assess.free_run_length=10", "assess.stability_length=0",
                "assess.acf_max_lag=1", cwd=cwd)
    assert r.returncode == 0, r.stderr[-3000:]
    run = Path(next(s for s in r.stdout.splitlines() if s.startswith("run directory:")).split(":", 1)[1].strip())
    # filed under the data's folder name, not the demo's
    assert run.parent.name == "tank"
    metrics = json.loads((run / "metrics.json").read_text())
    layout = metrics["data_layout"]
    # counted from the files: train A, B (cut in two by the gap), C; val D; test E, F
    assert (layout["train"]["trajectories"], layout["train"]["segments"]) == (3, 4)
    assert (layout["val"]["trajectories"], layout["val"]["segments"]) == (1, 1)
    assert (layout["test"]["trajectories"], layout["test"]["segments"]) == (2, 2)
    assert layout["train"]["samples"] == 420 + 700 - 12 + 520
    assert layout["gaps"] == 1 and layout["dropped_segments"] == 0
    assert layout["dt"] == pytest.approx(DT, rel=1e-9)
    # the run's own copy keeps each segment's true start time: B resumes after the gap at 12.15 + 312 Δt
    from mnemode.data import load_trajectories

    train = load_trajectories(run / "data" / "train.npz")
    starts = sorted(round(s["start_time"], 6) for s in train.meta["segments"])
    assert starts == sorted(round(v, 6) for v in (3.7, 12.15, 12.15 + 312 * DT, 101.3))
    lengths = sorted(s["length"] for s in train.meta["segments"])
    assert lengths == sorted([420, 300, 700 - 312, 520])
    assert np.all(np.diff(train.times) == pytest.approx(DT))
    # fitted and assessed: the corrected model beats the uncorrected physics on held-out data
    models = metrics["models"]
    assert models["memoryless"]["validity_time_median"] > models["physics_only"]["validity_time_median"]
    log = (run / "mnemode.log").read_text()
    assert "train data: 3 trajectories, 4 segments" in log and "1 gap(s)" in log


@pytest.mark.parametrize("case, expected", [
    ("dt", ["trajectory G", "0.11", "10 % apart", "Fix:"]),
    ("semicolon", ["';'", "data.delimiter", "Fix:"]),
])
def test_bad_input_is_one_line_and_a_failing_exit(tank_files, case, expected):
    cwd = tank_files
    bad = cwd / f"bad_{case}.csv"
    if case == "dt":
        _write(bad, {"G": (0.0, 200, 0.0)}, dt=0.11)
    else:
        bad.write_text((cwd / "tank" / "val.csv").read_text().replace(",", ";"))
    r = mnemode("diagnose", *COMMON, "data.train=tank/train.csv", f"data.test={bad.name}", cwd=cwd)
    assert r.returncode == 2, r.stdout[-2000:] + r.stderr[-2000:]
    errors = [line for line in r.stderr.splitlines() if line.startswith("mnemode: error:")]
    assert len(errors) == 1 and "Traceback" not in r.stderr
    for part in expected:
        assert part in errors[0], errors[0]
    # a failed diagnose leaves no result files behind
    assert not list((cwd / "runs").rglob("diagnosis.json"))
