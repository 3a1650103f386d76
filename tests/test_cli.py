"""The `mnemode` command: usage, clear failures, data generation, run-directory protection.

These are behaviour checks of our own command line (no outside reference applies);
each asserts a concrete output or exit status.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

TINY = ["data.n_train=2", "data.n_val=1", "data.n_test=1", "data.duration=4", "data.test_duration=4",
        "progress=false"]


def mnemode(*args, cwd: Path, env_extra: dict | None = None, timeout=300):
    env = dict(os.environ, MNEMODE_RUNS=str(cwd / "runs"))
    env.update(env_extra or {})
    return subprocess.run([sys.executable, "-m", "mnemode", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=timeout)


def test_usage_and_unknown_command(tmp_path):
    r = mnemode(cwd=tmp_path)
    assert r.returncode == 0 and "commands taking config overrides" in r.stdout
    r = mnemode("frobnicate", cwd=tmp_path)
    assert r.returncode == 2
    assert "unknown command 'frobnicate'" in r.stderr and "Fix:" in r.stderr


def test_generate_prints_where_the_data_went(tmp_path):
    r = mnemode("generate", *TINY, cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    line = next(s for s in r.stdout.splitlines() if s.startswith("written to:"))
    cache = Path(line.split(":", 1)[1].strip())
    assert (cache / "train_val.npz").exists() and (cache / "test.npz").exists()
    assert "2 train, 1 validation, 1 test" in r.stdout


def test_bad_config_value_is_one_clear_message(tmp_path):
    r = mnemode("generate", "data=file", "data.path=obs.csv", "data.split=bogus", "progress=false", cwd=tmp_path)
    assert r.returncode == 2
    assert "data.split" in r.stderr and "Fix:" in r.stderr
    assert "Traceback" not in r.stderr


def test_missing_data_file_names_the_file(tmp_path):
    r = mnemode("generate", "data=file", "data.path=nowhere/obs.csv", "progress=false", cwd=tmp_path)
    assert r.returncode == 2
    assert "nowhere/obs.csv" in r.stderr and "file not found" in r.stderr
    assert "Traceback" not in r.stderr


def test_assess_of_a_non_run_directory_fails_clearly(tmp_path):
    (tmp_path / "empty").mkdir()
    r = mnemode("assess", "empty", cwd=tmp_path)
    assert r.returncode == 2
    assert "config.yaml" in r.stderr and "Traceback" not in r.stderr


def test_run_directory_is_never_overwritten(tmp_path):
    from mnemode.errors import CheckpointError
    from mnemode.pipeline import compose_config
    from mnemode.rundir import RunDir

    cfg = compose_config(TINY)
    run = RunDir(tmp_path / "run")
    run.start(cfg, resume=False)
    (run.path / "models").mkdir()
    keep = run.path / "models" / "precious.pt"
    keep.write_bytes(b"user data")
    before = run.config_path.read_text()
    with pytest.raises(CheckpointError, match="never writes over an existing run"):
        RunDir(run.path).start(cfg, resume=False)
    assert keep.read_bytes() == b"user data"
    assert run.config_path.read_text() == before
