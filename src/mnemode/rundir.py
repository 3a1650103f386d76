"""Run directories: what a run leaves behind, and the rules that protect it.

A run directory holds everything needed to resume, re-assess or re-export the run
with nothing else: ``config.yaml`` (resolved), ``models/<name>.pt``,
``checkpoints/<name>/``, ``tb/``, ``metrics.json``, ``report.md``, ``figures/``,
``export/`` and ``status.json``. ``status.json`` records which stages finished, so
an explicit resume skips them and a plain re-run never overwrites a run.
"""

from __future__ import annotations

import json
import time
from pathlib import Path

from omegaconf import DictConfig, OmegaConf

from .errors import CheckpointError, ConfigError
from .fileio import write_json, write_text

__all__ = ["RunDir"]


class RunDir:
    """A run directory and its status record."""

    def __init__(self, path: str | Path):
        self.path = Path(path)

    # -- layout ------------------------------------------------------------
    @property
    def config_path(self) -> Path:
        return self.path / "config.yaml"

    @property
    def status_path(self) -> Path:
        return self.path / "status.json"

    @property
    def metrics_path(self) -> Path:
        return self.path / "metrics.json"

    def model_path(self, name: str) -> Path:
        return self.path / "models" / f"{name}.pt"

    def checkpoint_dir(self, name: str) -> Path:
        return self.path / "checkpoints" / name

    @property
    def tb_dir(self) -> Path:
        return self.path / "tb"

    @property
    def export_dir(self) -> Path:
        return self.path / "export"

    # -- life cycle --------------------------------------------------------
    def start(self, cfg: DictConfig, *, resume: bool) -> None:
        """Claim the directory for a new run, or reopen it for an explicit resume.

        Raises:
            CheckpointError: the directory already holds a run and ``resume`` is
                false (nothing is overwritten), or ``resume`` is true but there is
                no run to resume.
        """
        if self.status_path.exists() and not resume:
            raise CheckpointError(
                str(self.path), "already holds a run; mnemode never writes over an existing run",
                f"choose another name (name=...) or another directory, or continue it with "
                f"`mnemode resume {self.path}`.")
        if resume and not self.config_path.exists():
            raise CheckpointError(str(self.path), "has no config.yaml, so there is no run to resume",
                                  "check the path; resume takes the directory a run printed when it started.")
        self.path.mkdir(parents=True, exist_ok=True)
        if not resume:
            write_text(self.config_path, OmegaConf.to_yaml(cfg, resolve=True))
            self._write_status({"state": "running", "stages": {}, "started": _now(), "updated": _now()})
        else:
            status = self.status()
            status.update(state="running", updated=_now())
            status.setdefault("resumed", []).append(_now())
            self._write_status(status)

    def load_config(self) -> DictConfig:
        """The resolved config the run was started with."""
        if not self.config_path.exists():
            raise CheckpointError(str(self.path), "has no config.yaml; it is not a mnemode run directory",
                                  "pass the directory a `mnemode fit` or `mnemode run` printed.")
        try:
            return OmegaConf.load(self.config_path)
        except Exception as exc:  # yaml errors of several kinds
            raise ConfigError(str(self.config_path), f"cannot be read ({exc})",
                              "restore the file; it is written by mnemode and should not be edited.") from None

    def status(self) -> dict:
        if not self.status_path.exists():
            return {"state": "unknown", "stages": {}}
        try:
            return json.loads(self.status_path.read_text())
        except json.JSONDecodeError:
            return {"state": "unknown", "stages": {}}

    def stage_done(self, stage: str) -> bool:
        return self.status().get("stages", {}).get(stage) == "finished"

    def mark(self, stage: str, state: str = "finished", **extra) -> None:
        status = self.status()
        status.setdefault("stages", {})[stage] = state
        status["updated"] = _now()
        status.update(extra)
        self._write_status(status)

    def finish(self, state: str = "finished", error: str | None = None) -> None:
        status = self.status()
        status.update(state=state, updated=_now())
        if error:
            status["error"] = error
        self._write_status(status)

    def _write_status(self, status: dict) -> None:
        write_json(self.status_path, status)

    # -- metrics -----------------------------------------------------------
    def metrics(self) -> dict:
        if not self.metrics_path.exists():
            return {}
        return json.loads(self.metrics_path.read_text())

    def update_metrics(self, **sections) -> dict:
        """Merge top-level sections into ``metrics.json`` (atomically)."""
        m = self.metrics()
        m.update(sections)
        write_json(self.metrics_path, m)
        return m


def _now() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%S%z")
