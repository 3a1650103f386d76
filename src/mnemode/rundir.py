"""Run directories: what a run leaves behind, and the rules that protect it.

A run directory holds everything needed to resume, re-assess or re-export the run
with nothing else: ``config.yaml`` (resolved), ``models/<name>.pt``,
``checkpoints/<name>/``, ``tb/``, ``metrics.json``, ``report.md``, ``figures/``,
``export/`` and ``status.json``. ``status.json`` records which stages finished, so
an explicit resume skips them and a plain re-run never overwrites a run; its
``history`` lists resumes and the overrides they were given.

``provenance.json`` records, at creation, the ``_target_`` paths outside mnemode
the run was created with: a stored config may instantiate only those and
mnemode's own classes (:mod:`mnemode.config_safety`).

Only one process writes into a run directory at a time: writers hold an
exclusive ``flock`` on ``.mnemode.lock``, which names the holder (PID, command,
start time). The kernel drops the lock when its holder dies, even by SIGKILL, so
a lock left by a dead process is recognised without guessing from PIDs and is
taken over.

A run is never started in an existing folder that is not a mnemode run unless the
folder is empty, and a run that failed before it fitted anything (a configuration
or data error) does not block a retry in the same place.
"""

from __future__ import annotations

import json
import logging
import os
import socket
import time
from contextlib import contextmanager
from pathlib import Path

from omegaconf import DictConfig, OmegaConf

from .errors import CheckpointError, ConfigError, RunLocked
from .fileio import new_file_mode, write_json, write_text

__all__ = ["RunDir", "LOCK_FILE", "PROVENANCE_FILE", "holds_lock"]

log = logging.getLogger("mnemode")

LOCK_FILE = ".mnemode.lock"
PROVENANCE_FILE = "provenance.json"
# what may already be in a folder a new run starts in: Hydra's log, opened before mnemode runs, and a lock
# and what a start killed before it wrote config.yaml leaves (provenance.json is written first)
_HARMLESS = frozenset({"mnemode.log", LOCK_FILE, PROVENANCE_FILE, "overrides.yaml"})  # overrides: a sweep job's
# mnemode's own files of a run that failed before fitting: replaced by a retry
_RECLAIMABLE = ("config.yaml", "status.json", PROVENANCE_FILE, "metrics.json", "data/train.npz",
                "data/val.npz", "data/test.npz")
# top-level settings every stored config has
_REQUIRED_KEYS = ("system", "data", "model", "solver", "fit", "assess", "export", "seed", "warm_up")
# locks this process holds: path -> [file descriptor, depth]; re-entrant within a process
_HELD: dict[str, list] = {}


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

    @property
    def lock_path(self) -> Path:
        return self.path / LOCK_FILE

    @property
    def provenance_path(self) -> Path:
        return self.path / PROVENANCE_FILE

    def is_run(self) -> bool:
        """Whether the directory holds a mnemode run: its status record, or a config beside its provenance.

        (A start writes ``provenance.json``, then ``config.yaml``, then ``status.json``;
        a user's own ``config.yaml`` alone does not make a folder a run.)
        """
        return self.status_path.exists() or (self.config_path.exists() and self.provenance_path.exists())

    # -- protection ------------------------------------------------------------
    def check_claimable(self) -> None:
        """Refuse to start a new run in an existing folder that holds anything but a failed attempt.

        Raises:
            CheckpointError: the path is a file, a folder with other content that
                is not a mnemode run, or a run (finished, running or fitted).
        """
        if not self.path.exists():
            return
        if not self.path.is_dir():
            raise CheckpointError(str(self.path), "exists and is a file, not a folder",
                                  "choose another run directory (hydra.run.dir=... or name=...).")
        if self.is_run():
            if self._failed_before_fit():
                return
            raise CheckpointError(
                str(self.path), "already holds a run; mnemode never writes over an existing run",
                f"choose another name (name=...) or another directory, or continue it with "
                f"`mnemode resume {self.path}`.")
        try:
            others = sorted(p.name for p in self.path.iterdir() if p.name not in _HARMLESS)
        except OSError as exc:
            raise CheckpointError(str(self.path), f"cannot be listed ({exc.strerror})",
                                  "choose a folder you can read and write.") from None
        if others:
            shown = ", ".join(others[:5]) + (", ..." if len(others) > 5 else "")
            raise CheckpointError(str(self.path), f"is an existing folder that is not a mnemode run and is not "
                                  f"empty (it holds {shown}); mnemode writes runs only into new or empty folders",
                                  "choose a new folder (hydra.run.dir=... or name=...), or empty this one.")

    def _failed_before_fit(self) -> bool:
        """Whether the run failed before any model was fitted or checkpointed (nothing of value to keep)."""
        status = self.status()
        if status.get("state") != "failed":
            return False
        if any(str(k).startswith("fit:") for k in status.get("stages", {})):
            return False
        for sub in ("models", "checkpoints", "export"):
            d = self.path / sub
            if d.exists() and any(p.is_file() for p in d.rglob("*")):
                return False
        return True

    def holder(self) -> dict:
        """What ``.mnemode.lock`` says about its (last) holder: pid, command, started, host."""
        for _ in range(20):  # a new holder writes its record right after taking the lock
            try:
                text = self.lock_path.read_text()
            except OSError:
                return {}
            if text.strip():
                try:
                    return json.loads(text)
                except json.JSONDecodeError:
                    pass
            time.sleep(0.01)
        return {}

    def acquire(self, command: str) -> None:
        """Take the run directory's writer lock (re-entrant within this process).

        Raises:
            RunLocked: another live process holds it (named by PID and start time).
            CheckpointError: the lock file cannot be created (read-only folder).
        """
        key = str(self.path.resolve())
        if key in _HELD:
            _HELD[key][1] += 1
            return
        try:
            import fcntl
        except ImportError:  # no flock on this platform: run unprotected rather than not at all
            log.warning("run directory locks need fcntl (POSIX); %s is not locked", self.path)
            _HELD[key] = [None, 1]
            return
        try:
            fd = os.open(self.lock_path, os.O_RDWR | os.O_CREAT, new_file_mode())
        except OSError as exc:
            raise CheckpointError(str(self.path), f"cannot be written ({exc.strerror})",
                                  "choose a folder you can write to, or fix its permissions.") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(fd)
            h = self.holder()
            who = (f"PID {h.get('pid', '?')} on {h.get('host', '?')}, `mnemode {h.get('command', '?')}`, "
                   f"started {h.get('started', '?')}") if h else "a process that has not yet recorded itself"
            raise RunLocked(str(self.path), f"is being written by another mnemode process ({who}); "
                            "one writer per run directory",
                            "wait for it to finish or stop it, then try again; a lock left by a process "
                            "that died is taken over automatically.") from None
        previous = self.holder()
        if previous.get("pid") not in (None, os.getpid()):
            log.warning("%s: took over the lock left by PID %s (`mnemode %s`, started %s), which is no longer "
                        "running", self.path, previous.get("pid"), previous.get("command"), previous.get("started"))
        record = json.dumps({"pid": os.getpid(), "host": socket.gethostname(), "command": command,
                             "started": _now()}) + "\n"
        os.ftruncate(fd, 0)
        os.pwrite(fd, record.encode(), 0)
        _HELD[key] = [fd, 1]

    def release(self) -> None:
        """Release one level of this process's lock; the last release clears the holder record."""
        key = str(self.path.resolve())
        held = _HELD.get(key)
        if held is None:
            return
        held[1] -= 1
        if held[1] > 0:
            return
        del _HELD[key]
        fd = held[0]
        if fd is None:
            return
        try:
            os.ftruncate(fd, 0)  # never unlink: another process may already be waiting on this inode
        except OSError:
            pass
        os.close(fd)  # closing the descriptor drops the flock

    @contextmanager
    def lock(self, command: str):
        """Hold the writer lock for the duration of a ``with`` block."""
        self.acquire(command)
        try:
            yield self
        finally:
            self.release()

    # -- life cycle --------------------------------------------------------
    def start(self, cfg: DictConfig, *, resume: bool, command: str | None = None) -> None:
        """Claim the directory for a new run, or reopen it for an explicit resume; takes the writer lock.

        The lock is held until :meth:`finish`.

        Raises:
            CheckpointError: the directory already holds a run and ``resume`` is
                false (nothing is overwritten), is a non-empty folder that is not
                a run, cannot be written, or ``resume`` is true but there is no
                run to resume.
            RunLocked: another process is writing into the directory.
        """
        if resume and not (self.config_path.exists() and self.is_run()):
            raise CheckpointError(str(self.path), "has no mnemode run (config.yaml and status.json) to resume",
                                  "check the path; resume takes the directory a run printed when it started.")
        if not resume:
            self.check_claimable()
        try:
            self.path.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise CheckpointError(str(self.path), f"cannot be created ({exc.strerror})",
                                  "choose a folder you can write to (hydra.run.dir=... or MNEMODE_RUNS=...).") from None
        self.acquire(command or ("resume" if resume else "run"))
        try:
            if not resume:
                self.check_claimable()  # again under the lock: another process may have started meanwhile
                for name in _RECLAIMABLE:  # a failed attempt's files; a fresh folder has none
                    (self.path / name).unlink(missing_ok=True)
                from .config_safety import user_targets

                tree = OmegaConf.to_container(cfg, resolve=True)
                write_json(self.provenance_path, {"format": "mnemode.provenance", "version": 1,
                                                  "created": _now(), "user_targets": user_targets(tree)})
                write_text(self.config_path, OmegaConf.to_yaml(cfg, resolve=True))
                self._write_status({"state": "running", "stages": {}, "started": _now(), "updated": _now(),
                                    "history": [{"when": _now(), "event": "created"}]})
            else:
                status = self.status()
                status.update(state="running", updated=_now())
                status.setdefault("resumed", []).append(_now())
                self._write_status(status)
        except OSError as exc:
            self.release()
            raise CheckpointError(str(self.path), f"cannot be written ({exc.strerror})",
                                  "choose a folder you can write to, or fix its permissions.") from None
        except BaseException:
            self.release()
            raise

    def provenance(self) -> dict:
        """What ``provenance.json`` recorded at creation (empty for runs made before it existed)."""
        try:
            data = json.loads(self.provenance_path.read_text())
        except (OSError, json.JSONDecodeError):
            return {}
        return data if isinstance(data, dict) else {}

    def load_config(self) -> DictConfig:
        """The resolved config the run was started with, checked to be safe to instantiate.

        Raises:
            CheckpointError: there is no config.yaml.
            ConfigError: it cannot be read, or names a target mnemode will not
                instantiate from a file (see :mod:`mnemode.config_safety`).
        """
        import yaml

        from .config_safety import check_stored_config

        if not self.config_path.exists() or not self.is_run():
            raise CheckpointError(str(self.path), "has no mnemode run (config.yaml beside status.json); it is not "
                                  "a mnemode run directory", "pass the directory a `mnemode fit` or `mnemode run` "
                                  "printed.")
        try:
            text = self.config_path.read_text(encoding="utf-8")
            tree = yaml.load(text, Loader=_yaml_loader())  # a SafeLoader: builds plain data only
        except Exception as exc:  # yaml and decoding errors of several kinds
            raise ConfigError(str(self.config_path), f"cannot be read ({type(exc).__name__}: "
                              f"{str(exc).splitlines()[0][:200] if str(exc) else ''})",
                              "restore the file; it is written by mnemode and should not be edited.") from None
        allowed = self.provenance().get("user_targets") or []
        check_stored_config(tree, self.config_path, [t for t in allowed if isinstance(t, str)])
        missing = [k for k in _REQUIRED_KEYS if k not in tree]
        if missing:
            raise ConfigError(str(self.config_path), f"lacks the settings {missing}",
                              "restore the file; it is written by mnemode and should not be edited.")
        try:
            return OmegaConf.create(tree)
        except Exception as exc:
            raise ConfigError(str(self.config_path), f"cannot be read ({exc})",
                              "restore the file; it is written by mnemode and should not be edited.") from None

    def record(self, event: str, **details) -> None:
        """Append an event (a resume and its overrides, ...) to ``status.json``'s history."""
        status = self.status()
        status.setdefault("history", []).append({"when": _now(), "event": event, **details})
        status["updated"] = _now()
        self._write_status(status)

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
        """Record the run's end state and release the writer lock taken by :meth:`start`."""
        try:
            status = self.status()
            status.update(state=state, updated=_now())
            if error:
                status["error"] = error
            self._write_status(status)
        finally:
            self.release()

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


def holds_lock(command: str):
    """Decorator: run a function whose first argument is a :class:`RunDir` under that run's writer lock."""
    import functools

    def wrap(fn):
        @functools.wraps(fn)
        def locked(run, *args, **kwargs):
            with run.lock(command):
                return fn(run, *args, **kwargs)
        return locked
    return wrap


def _yaml_loader():
    """OmegaConf's YAML loader (a ``yaml.SafeLoader`` that reads ``1e-4`` as a float), else PyYAML's safe one."""
    import yaml

    try:
        from omegaconf._utils import get_yaml_loader

        loader = get_yaml_loader()
        if issubclass(loader, yaml.SafeLoader):
            return loader
    except Exception:  # a private helper: fall back quietly
        pass
    return yaml.SafeLoader


def _now() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%S%z")
