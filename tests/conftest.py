"""Fixtures shared by the test files: demo trajectories, small runs, and the command line.

Data sets are generated once per session for each distinct set of arguments (they are
pure functions of their arguments and seed), so files that need the same demo data share
it instead of regenerating it.
"""

from __future__ import annotations

import functools
import os
import subprocess
import sys
from pathlib import Path

import pytest


def pytest_configure(config):
    """Under pytest-xdist, give each worker its share of the cores (torch and the subprocesses it starts)."""
    workers = int(os.environ.get("PYTEST_XDIST_WORKER_COUNT", "1"))
    if workers > 1:
        share = str(max(1, (os.cpu_count() or 1) // workers))
        os.environ.setdefault("OMP_NUM_THREADS", share)
        import torch

        torch.set_num_threads(int(os.environ["OMP_NUM_THREADS"]))


@functools.lru_cache(maxsize=None)
def _trajectories(system_name: str, system_kw: tuple, kw: tuple):
    from mnemode import systems
    from mnemode.data import generate
    from mnemode.solvers import RK4

    system = getattr(systems, system_name)(**dict(system_kw))
    kw = dict(kw)
    if "solver_step" in kw:
        kw["solver"] = RK4(kw.pop("solver_step"))
    return system, generate(system, **kw)


@pytest.fixture(scope="session")
def trajectories():
    """``trajectories(system_name, system_kw, **generate_kw) -> (system, TrajectorySet)``, cached.

    ``system_name`` is a factory of :mod:`mnemode.systems` (``"thermosyphon"``,
    ``"lorenz63"``, ...); ``solver_step`` gives an RK4 truth solver of that step. The result
    is shared between tests asking for the same arguments, so treat it as read-only.
    """
    def make(system_name: str, system_kw: dict | None = None, **kw):
        return _trajectories(system_name, tuple(sorted((system_kw or {}).items())), tuple(sorted(kw.items())))

    return make


def _mnemode(*args, cwd: Path, env_extra: dict | None = None, timeout: float = 600):
    env = dict(os.environ, MNEMODE_RUNS=str(Path(cwd) / "runs"))
    env.update(env_extra or {})
    return subprocess.run([sys.executable, "-m", "mnemode", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=timeout)


@pytest.fixture(scope="session")
def mnemode_cli():
    """``mnemode_cli(*args, cwd=..., env_extra=None, timeout=600)``: the command in a subprocess."""
    return _mnemode


def _run_dir_from(stdout: str) -> Path:
    line = next(s for s in stdout.splitlines() if s.startswith("run directory:"))
    return Path(line.split(":", 1)[1].strip())


@pytest.fixture(scope="session")
def run_dir_from():
    """``run_dir_from(stdout) -> Path``: the run directory a finished command printed."""
    return _run_dir_from


@pytest.fixture
def small_run(tmp_path):
    """``small_run(overrides, stages=("fit",), name="run") -> Path``: a run of the pipeline in ``tmp_path``.

    Uses the data cache under ``tmp_path`` and no progress bars; the overrides are Hydra's.
    """
    from mnemode.pipeline import compose_config, run_pipeline

    def make(overrides, stages=("fit",), name="run"):
        cfg = compose_config(["progress=false", f"data.cache_dir={tmp_path / 'cache'}", *overrides])
        return run_pipeline(cfg, tmp_path / name, stages=stages).path

    return make
