"""Packaging: a non-editable install ships the Hydra configs and runs from any directory."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def test_config_tree_is_the_top_level_configs_folder():
    from mnemode.configs_path import config_dir

    # In a checkout the package's configs are the top-level configs/ folder itself.
    assert (config_dir() / "mnemode.yaml").exists()
    assert {p.name for p in config_dir().iterdir() if p.is_dir()} >= {
        "system", "data", "closure", "fit", "compare", "assess", "export", "experiment"}


@pytest.mark.slow
def test_wheel_install_runs_main_job_stage_from_elsewhere(tmp_path):
    site = tmp_path / "site"
    r = subprocess.run([sys.executable, "-m", "pip", "install", "--quiet", "--no-deps", "--target", str(site),
                        str(ROOT)], capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr[-2000:]
    assert (site / "mnemode" / "configs" / "mnemode.yaml").exists()
    assert (site / "mnemode" / "configs" / "experiment" / "memoryless_regime.yaml").exists()
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    env = dict(os.environ, PYTHONPATH=str(site), MNEMODE_RUNS=str(elsewhere / "runs"))
    code = ("import mnemode, sys; assert mnemode.__file__.startswith(sys.argv[1]), mnemode.__file__; "
            "from mnemode.cli import main; main(['generate', 'data.n_train=1', 'data.n_val=1', 'data.n_test=1', "
            "'data.duration=2', 'data.test_duration=2', 'progress=false'])")
    r = subprocess.run([sys.executable, "-c", code, str(site)], cwd=elsewhere, env=env,
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr[-2000:]
    assert "written to:" in r.stdout
