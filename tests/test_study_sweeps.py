"""Sweeps end to end through the `mnemode` command: jobs in parallel with Hydra's joblib
launcher, a job that fails is reported with its reason while the others finish, a re-run
skips finished jobs and retries failed ones, the study summary reads it all back; and
the SLURM launch path run by submitit's local executor.

These exercise our own pipeline, file layout and Hydra's launchers (no outside reference
applies); the summary's pooled statistics are checked against Python's statistics module
in test_study.py. Data and models are tiny so each job takes seconds.
"""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

pytestmark = pytest.mark.slow

# the demo in its memoryless regime, cut down so one job takes seconds; τ = 0.01 and 1 are
# the values whose Lyapunov exponent the system tabulates (others are estimated, which takes longer)
TINY = ["experiment=memoryless_regime", "progress=false", "compare=none", "export.enabled=false",
        "data.n_train=2", "data.n_val=1", "data.n_test=1", "data.duration=10", "data.test_duration=10",
        "data.spin_up=5", "data.solver_step=0.01", "closure.n_features=50",
        "assess.n_starts=3", "assess.horizon=2", "assess.free_run_length=5", "assess.stability_length=0", "assess.acf_max_lag=0.5"]


def mnemode(*args, cwd: Path, timeout=1200):
    env = dict(os.environ, MNEMODE_RUNS=str(cwd / "runs"), MNEMODE_CACHE=str(cwd / "cache"))
    return subprocess.run([sys.executable, "-m", "mnemode", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=timeout)


def _status(job: Path) -> dict:
    return json.loads((job / "status.json").read_text())


def _tau(job: Path) -> float:
    import yaml

    return float(yaml.safe_load((job / "config.yaml").read_text())["system"]["wall_response_time"])


@pytest.fixture(scope="module")
def joblib_sweep(tmp_path_factory):
    pytest.importorskip("hydra_plugins.hydra_joblib_launcher")
    cwd = tmp_path_factory.mktemp("joblib_sweep")
    # 2 x 2 good jobs (τ x seed) and 2 jobs whose τ < 0 makes the system refuse to build
    r = mnemode("run", "-m", *TINY, "system.wall_response_time=0.01,1.0,-1", "seed=0,1",
                "hydra/launcher=workstation", "hydra.launcher.n_jobs=2", "hydra.sweep.dir=runs/sweep", cwd=cwd)
    return cwd, cwd / "runs" / "sweep", r


def test_parallel_sweep_finishes_good_jobs_and_reports_the_failed_ones(joblib_sweep):
    cwd, sweep, r = joblib_sweep
    assert r.returncode == 1, r.stderr[-3000:]  # a failed job never hides behind a successful exit
    jobs = sorted(sweep.glob("job*"))
    assert len(jobs) == 6
    finished = [j for j in jobs if _status(j)["state"] == "finished"]
    failed = [j for j in jobs if _status(j)["state"] == "failed"]
    assert sorted(_tau(j) for j in finished) == [0.01, 0.01, 1.0, 1.0]
    assert [_tau(j) for j in failed] == [-1.0, -1.0]
    for j in failed:
        assert "wall_response_time" in _status(j)["error"]
        assert f"{j.name}: failed: system:" in r.stdout
    assert "4 finished, 2 not" in r.stdout and "mnemode resume runs/sweep" in r.stdout
    # each job limited torch to its share of the cores (joblib: n_jobs = 2)
    threads = max(1, len(os.sched_getaffinity(0)) // 2)
    assert all(f"torch threads for this job: {threads}" in (j / "mnemode.log").read_text() for j in jobs)


def test_study_table_has_a_row_per_job_with_metrics_or_the_reason(joblib_sweep):
    cwd, sweep, _ = joblib_sweep
    r = mnemode("study", str(sweep), cwd=cwd)
    assert r.returncode == 0, r.stderr[-3000:]
    with open(sweep / "study" / "study.csv") as f:
        rows = list(csv.DictReader(f))
    assert len(rows) == 6
    good = [row for row in rows if row["status"] == "finished"]
    assert len(good) == 4
    for row in good:
        metrics = json.loads((sweep / row["job"] / "metrics.json").read_text())["assessment"]["models"]
        for model in ("memoryless", "physics_only", "oracle"):
            assert float(row[f"{model}:validity_time_median"]) == metrics[model]["validity_time_median"]
            assert float(row[f"{model}:kl_invariant"]) == pytest.approx(metrics[model]["kl_invariant"])
    bad = [row for row in rows if row["status"] != "finished"]
    assert [row["system.wall_response_time"] for row in bad] == ["-1", "-1"]
    assert all("must be > 0" in row["reason"] for row in bad)
    assert len(list((sweep / "study" / "figures").glob("*_vs_system.wall_response_time.png"))) == 3
    assert "failed: system:" in r.stdout


def test_rerun_skips_finished_jobs_and_retries_failed_ones(joblib_sweep):
    cwd, sweep, _ = joblib_sweep
    finished = [j for j in sorted(sweep.glob("job*")) if _status(j)["state"] == "finished"]
    stamps = {p: p.stat().st_mtime_ns for j in finished for p in [*(j / "models").glob("*.pt"), j / "metrics.json"]}
    r = mnemode("resume", str(sweep), cwd=cwd)
    assert r.returncode != 0  # the failed jobs fail again: their τ is still invalid
    assert r.stdout.count("finished, skipped") == 4 and r.stdout.count("resuming ") == 2
    assert "2 of 6 jobs failed again" in r.stderr
    # no fitting happened in the finished jobs: their models and metrics are untouched
    assert all(p.stat().st_mtime_ns == t for p, t in stamps.items())
    for j in sweep.glob("job*"):
        if _tau(j) < 0:
            assert _status(j)["state"] == "failed" and len(_status(j)["resumed"]) == 1


def test_sweep_through_submitit_local_executor(tmp_path):
    pytest.importorskip("hydra_plugins.hydra_submitit_launcher")
    r = mnemode("run", "-m", *TINY, "system.wall_response_time=0.01,1.0", "hydra/launcher=slurm_local",
                "hydra.sweep.dir=runs/sweep", cwd=tmp_path)
    assert r.returncode == 0, r.stderr[-3000:]
    jobs = sorted((tmp_path / "runs" / "sweep").glob("job*"))
    assert sorted(_tau(j) for j in jobs) == [0.01, 1.0]
    for j in jobs:
        assert _status(j)["state"] == "finished"
        assert "torch threads for this job: 1" in (j / "mnemode.log").read_text()  # cpus_per_task: 1
    assert "2 jobs, 2 finished, 0 not" in r.stdout
