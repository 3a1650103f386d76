"""Ten or more SIGKILLs of a `mnemode fit` at random points, each resumed: the end is bit-identical.

Runs scripts/kill_resume_trials.py, which kills the fit (and its resumes) during
fitting, during checkpoint writes and during start-up, then compares the fitted model
and the final checkpoint with an uninterrupted fit of the same config, tensor by
tensor with ``torch.equal``. A behaviour check of our own resume; no outside
reference applies. About a minute on an idle two-core machine.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

SCRIPT = Path(__file__).resolve().parents[1] / "scripts" / "kill_resume_trials.py"


@pytest.mark.slow
def test_random_kills_resume_to_the_uninterrupted_fit(tmp_path):
    env = dict(os.environ, OMP_NUM_THREADS="1")
    r = subprocess.run([sys.executable, str(SCRIPT), "--kills", "10", "--seed", "1", "--workdir", str(tmp_path)],
                       capture_output=True, text=True, env=env, timeout=900)
    assert r.returncode == 0, r.stdout[-3000:] + r.stderr[-3000:]
    lines = r.stdout.splitlines()
    assert sum(line.startswith("kill ") for line in lines) == 10
    assert any("during write" in line for line in lines), "at least one kill lands in a checkpoint write"
    assert "bit-identical to the uninterrupted fit" in r.stdout
    assert not list(tmp_path.joinpath("killed").rglob("*.part"))
