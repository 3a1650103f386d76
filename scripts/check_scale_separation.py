"""Does a finished scale-separation study show what averaging theory predicts?

Averaging theory (G. A. Pavliotis & A. M. Stuart, Multiscale Methods, Springer 2008;
cited from memory): when the unresolved variables are fast, a memoryless closure
suffices; as they slow down, memory matters. On the demo this reads

- at τ = 0.01 the memoryless model's validity time is at least 0.8× the oracle's;
- at τ = 1 the memory model's validity time is at least 2× the memoryless model's.

Validity times are the seeds-pooled medians of ``mnemode study`` (every forecast of
every seed at that τ). Prints the ratios side by side; exits 1 if either criterion fails.

    mnemode run -m experiment=study_scale_separation hydra/launcher=workstation
    python scripts/check_scale_separation.py mnemode-runs/study_scale_separation/sweep_<time>
"""

from __future__ import annotations

import argparse
import sys

from mnemode.study import pooled_points, read_jobs

KEY = "system.wall_response_time"


def _validity(points, model: str, tau: float, key: str = KEY) -> float | None:
    """Seeds-pooled median validity time of ``model`` where the swept ``key`` equals ``tau``."""
    for p in points:
        if (p["parameter"], p["metric"], p["model"]) == (key, "validity_time", model) and \
                abs(float(p["value"]) - tau) < 1e-12:
            return p["centre"]
    return None


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("sweep_dir")
    args = parser.parse_args(argv)
    jobs = read_jobs([args.sweep_dir])
    points = pooled_points(jobs)
    checks = [
        ("τ = 0.01: memoryless / oracle", _validity(points, "memoryless", 0.01), _validity(points, "oracle", 0.01), 0.8),
        ("τ = 1:    memory / memoryless", _validity(points, "memory", 1.0), _validity(points, "memoryless", 1.0), 2.0),
    ]
    ok = True
    print(f"{len(jobs)} jobs, {sum(j.finished for j in jobs)} finished")
    for label, num, den, need in checks:
        if num is None or den is None or den <= 0:
            print(f"{label}: missing (no finished job at that τ)")
            ok = False
            continue
        ratio = num / den
        passed = ratio >= need
        ok &= passed
        print(f"{label}: {num:.3g} / {den:.3g} = {ratio:.2f}  (need ≥ {need})  {'PASS' if passed else 'FAIL'}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
