"""Kill a `mnemode fit` again and again with SIGKILL, resume it each time, and compare with a clean fit.

Usage::

    python scripts/kill_resume_trials.py [--kills 10] [--seed 0] [--steps 300] [--workdir DIR]

One run directory is fitted by a chain of processes: the first is ``mnemode fit``,
each later one ``mnemode resume RUN_DIR``; each is killed with SIGKILL at a random
point, chosen among three kinds:

* ``fitting``  -- a random delay after the process has written its first checkpoint;
* ``write``    -- the moment a checkpoint's temporary ``.part`` file appears, i.e.
  during a checkpoint write;
* ``startup``  -- a random delay after launch (imports, config, data, run-directory
  claims and lock take-over).

After the requested number of kills the last resume runs to the end. Meanwhile an
uninterrupted ``mnemode fit`` of the same config runs in another directory. The
fitted model (``models/memory.pt``) and the final checkpoint (model, best model and
optimiser state) of both must be equal bit for bit, and no temporary file may be
left. Prints one line per kill and a summary; exits 1 on any difference.
"""

from __future__ import annotations

import argparse
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

OVERRIDES = [
    "experiment=tiny", "compare=none", "progress=false", "seed=3",
    "data.n_train=2", "data.n_val=1", "data.n_test=1", "data.duration=6", "data.test_duration=6",
    "data.spin_up=5", "warm_up=1", "fit.batch_size=4", "fit.val_every=5", "fit.checkpoint_every=1",
    "fit.val_horizon=1", "fit.val_windows=2", "fit.horizon=[0.1,0.3]",
]
MODEL = "memory"


def _env(workdir: Path) -> dict:
    return dict(os.environ, MNEMODE_RUNS=str(workdir / "runs"), MNEMODE_CACHE=str(workdir / "cache"),
                OMP_NUM_THREADS="1", MKL_NUM_THREADS="1", PYTHONHASHSEED="0")


def _mnemode(args: list[str], workdir: Path) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "mnemode", *args], cwd=workdir, env=_env(workdir),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _ckpt(run: Path) -> Path:
    return run / "checkpoints" / MODEL / "state.pt"


def _mtime(path: Path) -> float | None:
    try:
        return path.stat().st_mtime_ns
    except OSError:
        return None


def _step(run: Path) -> int | None:
    import torch

    try:
        return int(torch.load(_ckpt(run), weights_only=True, map_location="cpu")["step"])
    except Exception:  # absent (or, never expected, unreadable)
        return None


def _kill_one(proc: subprocess.Popen, run: Path, kind: str, rng: random.Random, timeout: float) -> str | None:
    """Kill ``proc`` at a point of the given kind; ``None`` if it finished first."""
    launched = time.time()
    if kind == "startup":
        deadline = launched + rng.uniform(0.05, 3.0)
        while time.time() < deadline:
            if proc.poll() is not None:
                return None
            time.sleep(0.005)
    else:
        start_mtime = _mtime(_ckpt(run))
        while _mtime(_ckpt(run)) == start_mtime:  # wait until this process is fitting
            if proc.poll() is not None:
                return None
            if time.time() - launched > timeout:
                raise RuntimeError("the fit never wrote a checkpoint")
            time.sleep(0.002)
        if kind == "fitting":
            deadline = time.time() + rng.uniform(0.0, 1.0)
            while time.time() < deadline:
                if proc.poll() is not None:
                    return None
                time.sleep(0.002)
        else:  # during a checkpoint write: the temporary file exists
            ckpt_dir = _ckpt(run).parent
            while not any(p.name.endswith(".part") for p in ckpt_dir.iterdir()):
                if proc.poll() is not None:
                    return None
                time.sleep(0.0005)
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait(timeout=30)
    return f"{kind} after {time.time() - launched:.2f} s"


def _state_dicts(run: Path):
    import torch

    model = torch.load(run / "models" / f"{MODEL}.pt", weights_only=True, map_location="cpu")["state_dict"]
    final = torch.load(_ckpt(run), weights_only=True, map_location="cpu")
    return model, final


def _compare(a, b, where: str, out: list[str]) -> None:
    import torch

    if isinstance(a, torch.Tensor) or isinstance(b, torch.Tensor):
        if not (isinstance(a, torch.Tensor) and isinstance(b, torch.Tensor) and a.dtype == b.dtype
                and a.shape == b.shape and torch.equal(a, b)):
            out.append(where)
    elif isinstance(a, dict) and isinstance(b, dict):
        for key in sorted(set(a) | set(b), key=str):
            _compare(a.get(key), b.get(key), f"{where}[{key}]", out)
    elif isinstance(a, (list, tuple)) and isinstance(b, (list, tuple)) and len(a) == len(b):
        for i, (x, y) in enumerate(zip(a, b)):
            _compare(x, y, f"{where}[{i}]", out)
    elif a != b:
        out.append(where)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--kills", type=int, default=10, help="SIGKILLs before the last resume (default 10)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the kill schedule")
    parser.add_argument("--steps", type=int, default=300, help="optimiser steps of the fit")
    parser.add_argument("--workdir", default=None, help="keep everything here (default: a temporary folder)")
    args = parser.parse_args(argv)
    rng = random.Random(args.seed)
    workdir = Path(args.workdir) if args.workdir else Path(tempfile.mkdtemp(prefix="mnemode-kill-"))
    workdir.mkdir(parents=True, exist_ok=True)
    overrides = [*OVERRIDES, f"fit.steps={args.steps}"]
    t0 = time.time()

    gen = _mnemode(["generate", *overrides], workdir)  # data cached once for every process
    if gen.wait(timeout=600) != 0:
        print(gen.stderr.read()[-3000:], file=sys.stderr)
        return 1
    ref_dir, run_dir = workdir / "reference", workdir / "killed"
    reference = _mnemode(["fit", *overrides, f"hydra.run.dir={ref_dir}"], workdir)

    kinds = ["write", "fitting", "startup"]
    kills, launches = [], 0
    while len(kills) < args.kills:
        launches += 1
        if launches > 6 * args.kills:
            print(f"gave up: only {len(kills)} kills landed in {launches - 1} launches", file=sys.stderr)
            return 1
        from mnemode.rundir import RunDir

        fresh = not RunDir(run_dir).is_run()
        proc = _mnemode(["fit", *overrides, f"hydra.run.dir={run_dir}"] if fresh else ["resume", str(run_dir)],
                        workdir)
        kind = kinds[len(kills) % len(kinds)] if len(kills) < len(kinds) else rng.choice(
            ["write", "write", "fitting", "fitting", "startup"])
        at = _kill_one(proc, run_dir, kind, rng, timeout=300)
        if at is None:
            if proc.returncode != 0:
                print(proc.stderr.read()[-3000:], file=sys.stderr)
                return 1
            print(f"the fit finished before kill {len(kills) + 1}; raise --steps", file=sys.stderr)
            return 1
        kills.append(at)
        print(f"kill {len(kills):2d}: {'fit' if fresh else 'resume'} killed during {at}, checkpoint step "
              f"{_step(run_dir)}", flush=True)

    last = _mnemode(["resume", str(run_dir)] if RunDir(run_dir).is_run()
                    else ["fit", *overrides, f"hydra.run.dir={run_dir}"], workdir)
    _, err = last.communicate(timeout=600)
    if last.returncode != 0:
        print(err[-3000:], file=sys.stderr)
        return 1
    _, err = reference.communicate(timeout=600)
    if reference.returncode != 0:
        print(err[-3000:], file=sys.stderr)
        return 1

    model_a, final_a = _state_dicts(ref_dir)
    model_b, final_b = _state_dicts(run_dir)
    differ: list[str] = []
    _compare(model_a, model_b, "models/memory.pt", differ)
    for key in ("step", "finished", "model", "best_model", "optimiser"):
        _compare(final_a.get(key), final_b.get(key), f"state.pt[{key}]", differ)
    parts = sorted(str(p.relative_to(run_dir)) for p in run_dir.rglob("*.part"))
    print(f"{len(kills)} kills ({sum('write' in k for k in kills)} during checkpoint writes), "
          f"{launches + 1} processes, {time.time() - t0:.0f} s")
    if differ:
        print(f"DIFFERENT from the uninterrupted fit: {differ[:10]}")
    else:
        print(f"bit-identical to the uninterrupted fit: model and final checkpoint (step {final_b['step']})")
    if parts:
        print(f"temporary files left: {parts}")
    if not args.workdir:
        shutil.rmtree(workdir, ignore_errors=True)
    return 1 if differ or parts else 0


if __name__ == "__main__":
    sys.exit(main())
