"""One writer per run directory; files respect the umask; leftovers never block the next attempt.

Behaviour checks of our own run-directory rules (no outside reference applies). The
lock is held by a real second process, killed with SIGKILL where a dead holder is
needed, since a lock that survives crashes is the point.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from mnemode import cli
from mnemode.errors import CheckpointError, RunLocked
from mnemode.fileio import atomic_path, clean_stale_parts, write_json, write_text
from mnemode.pipeline import compose_config
from mnemode.rundir import RunDir

HOLDER = textwrap.dedent('''
    import sys, time
    from pathlib import Path
    from mnemode.rundir import RunDir
    run = RunDir(sys.argv[1])
    run.acquire("fit")
    Path(sys.argv[2]).write_text("held")
    time.sleep(120)
''')


def _hold(tmp_path: Path, run_path: Path) -> subprocess.Popen:
    """A second process that takes the run's lock and keeps it until killed."""
    ready = tmp_path / "held.flag"
    proc = subprocess.Popen([sys.executable, "-c", HOLDER, str(run_path), str(ready)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.time() + 120
    while not ready.exists():
        assert proc.poll() is None, proc.communicate()[1][-2000:]
        assert time.time() < deadline, "the holder never took the lock"
        time.sleep(0.05)
    return proc


@pytest.fixture
def run(tmp_path):
    cfg = compose_config(["experiment=tiny", "progress=false"])
    r = RunDir(tmp_path / "run")
    r.start(cfg, resume=False, command="fit")
    r.mark("fit:memory")
    r.finish("failed")
    return r


def test_second_writer_is_refused_with_the_holders_pid(tmp_path, run, capsys):
    holder = _hold(tmp_path, run.path)
    try:
        with pytest.raises(RunLocked, match=rf"PID {holder.pid}\b.*mnemode fit.*started 20"):
            run.acquire("assess")
        # the command line says the same, once, with its own exit code, and changes nothing
        before = run.status_path.read_bytes(), run.config_path.read_bytes()
        for argv in (["assess", str(run.path)], ["export", str(run.path)], ["resume", str(run.path)]):
            with pytest.raises(SystemExit) as info:
                cli.main(argv)
            err = capsys.readouterr().err
            assert info.value.code == RunLocked.exit_code == 4, err
            assert f"PID {holder.pid}" in err and "Traceback" not in err and err.count("mnemode: error:") == 1
        assert (run.status_path.read_bytes(), run.config_path.read_bytes()) == before
        # a fresh start in the same place is refused too (it is a run, and it is busy)
        with pytest.raises(CheckpointError):
            run.start(compose_config(["experiment=tiny"]), resume=True)
    finally:
        holder.kill()
        holder.wait(timeout=30)


def test_lock_of_a_killed_process_is_taken_over(tmp_path, run, caplog):
    holder = _hold(tmp_path, run.path)
    holder.send_signal(signal.SIGKILL)
    holder.wait(timeout=30)
    assert run.holder()["pid"] == holder.pid  # the dead holder's record is still there
    with caplog.at_level("WARNING", logger="mnemode"):
        run.acquire("assess")
    try:
        assert f"PID {holder.pid}" in caplog.text and "no longer running" in caplog.text
        assert run.holder()["pid"] == os.getpid() and run.holder()["command"] == "assess"
    finally:
        run.release()
    assert run.lock_path.read_text() == ""  # released: no holder recorded


def test_lock_is_reentrant_within_a_process(run):
    with run.lock("resume"):
        with run.lock("fit"):
            assert run.holder()["command"] == "resume"
        assert run.holder()["pid"] == os.getpid()  # still held by the outer block
    assert run.lock_path.read_text() == ""


@pytest.mark.parametrize("umask, mode", [(0o022, 0o644), (0o077, 0o600), (0o002, 0o664)])
def test_written_files_follow_the_umask(tmp_path, umask, mode):
    old = os.umask(umask)
    try:
        write_text(tmp_path / "a.txt", "x")
        write_json(tmp_path / "b.json", {"a": 1})
        with atomic_path(tmp_path / "c.bin") as tmp:
            tmp.write_bytes(b"\0")
    finally:
        os.umask(old)
    for name in ("a.txt", "b.json", "c.bin"):
        assert (tmp_path / name).stat().st_mode & 0o777 == mode, name


def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_stale_part_files_are_cleaned_on_the_next_write(tmp_path):
    target = tmp_path / "state.pt"
    dead = tmp_path / f".state.pt.{_dead_pid()}.abc123.part"      # left by a killed writer
    live = tmp_path / f".state.pt.{os.getppid()}.def456.part"     # a live writer's, left alone
    legacy_old = tmp_path / ".state.pt.zz9xq.part"                # old naming, long abandoned
    other = tmp_path / f".other.pt.{_dead_pid()}.abc.part"        # another file's: not ours to judge
    for p in (dead, live, legacy_old, other):
        p.write_bytes(b"")
    os.utime(legacy_old, (time.time() - 3600, time.time() - 3600))
    write_text(target, "new")
    assert target.read_text() == "new"
    assert not dead.exists() and not legacy_old.exists()
    assert live.exists() and other.exists()
    assert clean_stale_parts(tmp_path / "other.pt") == [other]


def test_a_folder_that_is_not_a_run_is_never_written_into(tmp_path):
    cfg = compose_config(["experiment=tiny", "progress=false"])
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "config.yaml").write_text("my: own\n")
    with pytest.raises(CheckpointError, match="not a mnemode run and is not empty"):
        RunDir(mine).start(cfg, resume=False)
    assert sorted(p.name for p in mine.iterdir()) == ["config.yaml"]
    assert (mine / "config.yaml").read_text() == "my: own\n"
    # an empty folder, or one with only Hydra's log in it, is fine
    empty = tmp_path / "empty"
    empty.mkdir()
    (empty / "mnemode.log").write_text("[...] log line\n")
    r = RunDir(empty)
    r.start(cfg, resume=False)
    r.finish()
    assert r.is_run() and (empty / "mnemode.log").read_text() == "[...] log line\n"


def test_a_failed_attempt_does_not_block_a_retry_but_a_fitted_run_does(tmp_path):
    cfg = compose_config(["experiment=tiny", "progress=false"])
    r = RunDir(tmp_path / "run")
    r.start(cfg, resume=False)
    r.update_metrics(data={"n_train": 1})
    (r.path / "data").mkdir()
    (r.path / "data" / "train.npz").write_bytes(b"from the failed attempt")
    r.finish("failed", error="data.path: file not found")
    r.start(cfg, resume=False)  # the retry is accepted and starts clean
    assert not (r.path / "data" / "train.npz").exists() and not r.metrics_path.exists()
    r.mark("fit:memory")
    r.finish("failed", error="diverged")
    with pytest.raises(CheckpointError, match="already holds a run"):
        r.start(cfg, resume=False)


def test_unwritable_run_directory_is_a_message(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("x")
    with pytest.raises(CheckpointError, match="cannot be created"):
        RunDir(blocker / "run").start(compose_config(["experiment=tiny"]), resume=False)


def test_python_api_assess_is_refused_while_another_process_writes(tmp_path, run):
    from mnemode import pipeline

    holder = _hold(tmp_path, run.path)
    try:
        with pytest.raises(RunLocked, match=f"PID {holder.pid}"):
            pipeline.assess_run(run)
        with pytest.raises(RunLocked, match=f"PID {holder.pid}"):
            pipeline.export_run(run)
    finally:
        holder.kill()
        holder.wait(timeout=30)
