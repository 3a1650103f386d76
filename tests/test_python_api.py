"""The public API: every name in ``mnemode.__all__`` once, and README's Python example runs as written."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

import mnemode

README = Path(__file__).resolve().parents[1] / "README.md"


def test_every_public_name_is_exported_once_and_resolves():
    assert len(mnemode.__all__) == len(set(mnemode.__all__))
    for name in mnemode.__all__:
        assert getattr(mnemode, name) is not None, name
    # each public object is reachable from the package root under one name only
    objects = [getattr(mnemode, n) for n in mnemode.__all__ if n != "__version__"]
    assert len({id(o) for o in objects}) == len(objects)


def _readme_python_example() -> str:
    text = README.read_text()
    section = text[text.index("## From Python"):]
    match = re.search(r"```python\n(.*?)```", section, flags=re.S)
    assert match, "README's 'From Python' section has no python block"
    return match.group(1)


@pytest.mark.slow
def test_readme_python_example_runs(tmp_path):
    code = _readme_python_example()
    env = dict(os.environ, MNEMODE_RUNS=str(tmp_path / "runs"), MNEMODE_CACHE=str(tmp_path / "cache"),
               OMP_NUM_THREADS="1")
    r = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, env=env, capture_output=True, text=True,
                       timeout=600)
    assert r.returncode == 0, r.stderr[-3000:]
    # the example prints the main model's median validity time and a forecast's shape
    lines = [ln for ln in r.stdout.splitlines() if ln.strip()]
    assert float(lines[-2]) > 0
    assert lines[-1] == "torch.Size([101, 1, 3])"
    assert list((tmp_path / "mnemode-runs").rglob("metrics.json"))
