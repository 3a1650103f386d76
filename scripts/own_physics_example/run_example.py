"""Run the bring-your-own-physics example from any folder: diagnose first, then fit what it advises.

    python path/to/scripts/own_physics_example/run_example.py [extra overrides ...]

It puts this folder on the Python path (so ``circuit_physics`` imports), points the
data at ``observations.csv`` beside this file, and calls ``mnemode diagnose`` and
``mnemode run`` with the ``circuit`` preset. Runs go under ``./mnemode-runs/circuit``
of the folder you run it from (or ``$MNEMODE_RUNS``).
"""

import os
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent


def main(extra: list[str]) -> int:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(HERE), env.get("PYTHONPATH", "")) if p)
    args = ["-cd", str(HERE), "experiment=circuit", f"data.path={HERE / 'observations.csv'}", *extra]
    for command in ("diagnose", "run"):
        code = subprocess.call([sys.executable, "-m", "mnemode", command, *args], env=env)
        if code:
            return code
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
