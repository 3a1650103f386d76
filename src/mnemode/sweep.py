"""Jobs of a sweep: threads per job, each job's overrides, and the end-of-sweep report.

:class:`SweepHooks` is a Hydra callback (``hydra.callbacks.sweep`` in the primary
config). At the start of every job, in the process that runs it (a joblib worker,
a SLURM task), it limits torch to the job's share of the cores, and a sweep job
records the overrides that made it in ``overrides.yaml`` beside the run's
``config.yaml``. When a sweep ends it reports every job's state from its
``status.json``, so a failed job is never hidden behind the sweep's exit status.
"""

from __future__ import annotations

import logging
import os
import sys
from pathlib import Path
from typing import Any

from omegaconf import DictConfig, OmegaConf

__all__ = ["SweepHooks", "check_launcher", "failure_recorded", "in_sweep", "job_threads", "set_threads", "usable_cores", "OVERRIDES_FILE"]

log = logging.getLogger("mnemode")

OVERRIDES_FILE = "overrides.yaml"

try:  # Hydra >= 1.1; the hooks below are plain methods either way
    from hydra.experimental.callback import Callback as _Callback
except ImportError:  # pragma: no cover
    _Callback = object


def usable_cores() -> int:
    """Cores this process may run on (its CPU affinity where the OS reports it)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def job_threads(threads: Any, launcher: Any, cores: int | None = None) -> int | None:
    """Torch threads for one job of a sweep.

    An explicit ``threads`` wins. Otherwise, under Hydra's joblib launcher with
    ``n_jobs`` jobs at once, each job gets ``max(1, cores // n_jobs)`` (``n_jobs``
    counted as joblib does: -1 is every core, -2 all but one, ...); under the submitit
    launchers each job gets its ``cpus_per_task``. Otherwise ``None`` (torch's default).

    Args:
        threads: the config's ``threads`` (``None`` or a positive integer).
        launcher: the ``hydra.launcher`` config node (or ``None``).
        cores: usable cores (default :func:`usable_cores`).

    Returns:
        the thread count, or ``None`` to leave torch's default.

    Raises:
        ConfigError: ``threads`` is not a positive integer.
    """
    from .errors import ConfigError

    if threads is not None:
        try:
            n = int(threads)
        except (TypeError, ValueError):
            n = 0
        if n < 1 or str(n) != str(threads).strip():
            raise ConfigError("threads", f"is {threads!r}; expected a positive integer or null",
                              "e.g. threads=2, or threads=null for torch's default.")
        return n
    if launcher is None:
        return None
    target = str(_get(launcher, "_target_") or "")
    cores = usable_cores() if cores is None else int(cores)
    if "joblib" in target.lower():
        n_jobs = int(_get(launcher, "n_jobs") or -1)
        parallel = n_jobs if n_jobs > 0 else max(1, cores + 1 + n_jobs)
        return max(1, cores // parallel)
    if "submitit" in target.lower():
        cpus = _get(launcher, "cpus_per_task")
        if cpus:
            return max(1, int(cpus))
        slurm = os.environ.get("SLURM_CPUS_PER_TASK")
        return max(1, int(slurm)) if slurm and slurm.isdigit() else 1
    return None


def set_threads(n: int) -> None:
    """Limit torch (and OpenMP/MKL/BLAS in anything started later) to ``n`` threads."""
    import torch

    for var in ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
        os.environ[var] = str(n)
    torch.set_num_threads(n)


def _get(node: Any, key: str) -> Any:
    try:
        return node.get(key) if hasattr(node, "get") else getattr(node, key, None)
    except Exception:  # a missing or unresolvable value means "not set"
        return None


class SweepHooks(_Callback):
    """Hydra callback: threads per job, each sweep job's overrides, end-of-sweep report."""

    def on_job_start(self, config: DictConfig, **kwargs: Any) -> None:
        hydra_cfg = config.get("hydra")
        launcher = hydra_cfg.get("launcher") if hydra_cfg is not None else None
        n = job_threads(config.get("threads"), launcher)
        if n is not None:
            set_threads(n)
            log.info("torch threads for this job: %d", n)
        if hydra_cfg is not None and _is_multirun(hydra_cfg):
            _record_overrides(Path(hydra_cfg.runtime.output_dir), list(hydra_cfg.overrides.task),
                              int(hydra_cfg.job.num))

    def on_multirun_end(self, config: DictConfig, **kwargs: Any) -> None:
        from .errors import MnemodeError
        from .study import read_jobs

        sweep_dir = Path(str(config.hydra.sweep.dir))
        try:
            jobs = [j for j in read_jobs([sweep_dir]) if j.state != "no run"]
        except MnemodeError:  # no job directory at all: nothing to report
            return
        if not jobs:
            return  # a sweep of commands that leave no run directory (generate, diagnose)
        bad = [j for j in jobs if j.state != "finished"]
        print(f"\nsweep {sweep_dir}: {len(jobs)} jobs, {len(jobs) - len(bad)} finished, {len(bad)} not")
        for job in bad:
            print(f"  {job.name}: {job.state}: {job.reason}")
        print(f"  summary: mnemode study {sweep_dir}")
        if bad:
            print(f"  retry the jobs that did not finish (finished ones are skipped): mnemode resume {sweep_dir}")
            sys.exit(1)


# shipped launcher configs (configs/hydra/launcher/) and the plugin package each needs
_LAUNCHER_PLUGINS = {
    "workstation": ("hydra_plugins.hydra_joblib_launcher", "hydra-joblib-launcher"),
    "joblib": ("hydra_plugins.hydra_joblib_launcher", "hydra-joblib-launcher"),
    "slurm": ("hydra_plugins.hydra_submitit_launcher", "hydra-submitit-launcher"),
    "slurm_local": ("hydra_plugins.hydra_submitit_launcher", "hydra-submitit-launcher"),
    "submitit_slurm": ("hydra_plugins.hydra_submitit_launcher", "hydra-submitit-launcher"),
    "submitit_local": ("hydra_plugins.hydra_submitit_launcher", "hydra-submitit-launcher"),
}


def check_launcher(overrides: list[str]) -> None:
    """Raise a clear error when ``hydra/launcher=NAME`` names a launcher whose plugin is not installed.

    Raises:
        ConfigError: the plugin package is missing (the fix names the pip extra).
    """
    import importlib.util

    from .errors import ConfigError

    for item in overrides:
        key, _, name = item.partition("=")
        if key.lstrip("+~") != "hydra/launcher" or name not in _LAUNCHER_PLUGINS:
            continue
        module, package = _LAUNCHER_PLUGINS[name]
        if importlib.util.find_spec(module) is None:
            raise ConfigError(f"hydra/launcher={name}", f"needs Hydra's {package} plugin, which is not installed",
                              f"pip install 'mnemode[cluster]' (or pip install {package}).")


def in_sweep() -> bool:
    """Whether the running Hydra job is one job of a sweep (``-m``)."""
    from hydra.core.hydra_config import HydraConfig

    try:
        return _is_multirun(HydraConfig.get())
    except ValueError:  # no Hydra job running
        return False


def failure_recorded(run_dir: Path, exc: BaseException) -> bool:
    """Whether the run in ``run_dir`` records ``exc`` as what made it fail.

    A sweep job whose failure its own ``status.json`` records is left to the
    end-of-sweep report. A failure before the job claimed its directory (such as a
    refusal to write over an earlier run) is not recorded there.
    """
    from .rundir import RunDir

    status = RunDir(run_dir).status()
    return status.get("state") == "failed" and status.get("error") == (str(exc) or type(exc).__name__)


def _is_multirun(hydra_cfg) -> bool:
    from hydra.types import RunMode

    return hydra_cfg.get("mode") == RunMode.MULTIRUN


def _record_overrides(run_dir: Path, overrides: list[str], num: int) -> None:
    """Write the job's overrides beside its run, unless the directory already holds a run."""
    from .fileio import write_text

    if (run_dir / "status.json").exists() or (run_dir / OVERRIDES_FILE).exists():
        return  # never write into an existing run; the job itself refuses to start there
    run_dir.mkdir(parents=True, exist_ok=True)
    write_text(run_dir / OVERRIDES_FILE, OmegaConf.to_yaml({"job": num, "overrides": overrides}))
