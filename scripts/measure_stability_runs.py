"""Long free runs on the demo: how many runs leave the training envelope, and what the runs cost.

Generates the default demo data (thermosyphon, memory regime; cached like `mnemode
run`), fits the demo's memoryless baseline (random features by derivative
regression, as in configs/compare/memory_regime.yaml), and free-runs the
physics-only model, the memoryless baseline and an (unfitted, cost only) leaky
memory closure from the assessment's free-run starts, side by side at two
lengths. Prints escape counts (margin 0.1 of the training range) and the wall
time of each length, so the ratio of costs is measured in one run.

    python scripts/measure_stability_runs.py [--lengths 200 1000] [--runs 8]
"""

from __future__ import annotations

import argparse
import time

import torch

from mnemode.assess.references import physics_only_model
from mnemode.assess.stability import Envelope, summarise_escapes
from mnemode.fitting.context import FitContext
from mnemode.forecasting import choose_starts, run_forecasts
from mnemode.pipeline import (build_model, compose_config, main_model_name, make_solver, make_system, model_specs,
                              prepare_data)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--lengths", type=float, nargs="+", default=[200.0, 1000.0])
    parser.add_argument("--runs", type=int, default=8)
    parser.add_argument("--margin", type=float, default=0.1)
    parser.add_argument("--overrides", nargs="*", default=[])
    args = parser.parse_args()
    torch.set_num_threads(1)

    cfg = compose_config(["progress=false", *args.overrides])
    system = make_system(cfg)
    data = prepare_data(cfg, system)
    solver = make_solver(cfg)
    specs = model_specs(cfg)

    memoryless = build_model(specs["memoryless"], system, data.dt)
    t0 = time.perf_counter()
    torch.manual_seed(int(cfg.seed))
    from hydra.utils import instantiate

    instantiate(specs["memoryless"].fit).fit(memoryless, data.train, data.val,
                                             FitContext(solver=solver, warm_up=float(cfg.warm_up)))
    print(f"memoryless baseline fitted in {time.perf_counter() - t0:.1f} s")
    memory = build_model(specs[main_model_name(cfg)], system, data.dt)
    models = {"physics_only": physics_only_model(system), "memoryless": memoryless, "memory (unfitted)": memory}

    test = data.test
    n_warm = int(round(float(cfg.warm_up) / data.dt))
    starts = choose_starts(test.n_times, test.n_trajectories, n_warm, 1, 50).subset(args.runs)
    env = data.train.envelope()
    lo = [env[n][0] for n in test.names]
    hi = [env[n][1] for n in test.names]
    envelope = Envelope.from_ranges(lo, hi, args.margin, "training data")
    print(f"demo: dt = {data.dt}, solver {solver!r}, {len(starts)} free runs per model, margin {args.margin}")
    print(f"{'model':<20}{'length':>8}{'escaped':>10}{'first exits':>30}{'seconds':>10}")
    for name, model in models.items():
        for length in args.lengths:
            n = int(round(length / data.dt))
            t0 = time.perf_counter()
            out = run_forecasts(model, solver, test.states, starts, n_warm, n, data.dt)
            sec = time.perf_counter() - t0
            e = summarise_escapes(out.states, envelope, data.dt)
            exits = ", ".join(f"{t:.0f}" for t in e["escape_times"] if t is not None) or "-"
            print(f"{name:<20}{length:>8g}{e['escaped_count']:>6}/{e['n_runs']:<3}{exits:>30}{sec:>10.1f}")


if __name__ == "__main__":
    main()
