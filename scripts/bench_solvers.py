"""Cost of mnemode's fixed-step solvers on the demo truth, measured side by side in one run.

Prints two tables:

1. Euler against RK4: wall time per observation interval (Δt = 0.02, solver step
   0.005, i.e. 4 sub-steps) on the thermosyphon truth field, for batch sizes 1, 16
   and 256 in float32 and float64, with the RK4/Euler and float64/float32 ratios
   and each solver's error after the run against a fine-step reference.
2. mnemode's RK4 against torchdiffeq's fixed-grid ``rk4`` (explicit ``step_size``)
   on the same problem: time ratio and largest absolute difference. torchdiffeq's
   ``rk4`` is the 3/8-rule variant, so the two differ at the level of their
   truncation errors, not of rounding.

Timing: one thread, one warm-up run, then the fastest of several repeats (the least disturbed by other load) measured
with ``time.perf_counter``; the runs compared in a row are interleaved. Run::

    python scripts/bench_solvers.py [--repeats 9] [--intervals 50]
"""

from __future__ import annotations

import argparse
import time

import torch

from mnemode.solvers import RK4, Euler
from mnemode.systems import thermosyphon

OBS_DT = 0.02  # the demo's observation interval
STEP = 0.005   # solver step: 4 sub-steps per interval


def _race(fns, repeats: int) -> list[float]:
    """Fastest wall time of each function; runs are interleaved so all see the same load."""
    for fn in fns:
        fn()  # warm-up (allocator, dispatch caches)
    best = [float("inf")] * len(fns)
    for _ in range(repeats):
        for i, fn in enumerate(fns):
            t0 = time.perf_counter()
            fn()
            best[i] = min(best[i], time.perf_counter() - t0)
    return best


def _start_states(system, batch: int, dtype) -> torch.Tensor:
    """States on the attractor: random starts spun up with a fine RK4 in float64."""
    gen = torch.Generator().manual_seed(0)
    z = system.random_truth_states(batch, gen, torch.float64)
    with torch.no_grad():
        z = RK4(STEP).advance(system.truth, 0.0, z, 20.0)
    return z.to(dtype)


def euler_vs_rk4(system, repeats: int, intervals: int) -> None:
    print(f"Euler vs RK4 on the thermosyphon truth (dim {system.truth_dim}): {intervals} observation "
          f"intervals of {OBS_DT}, step {STEP} ({round(OBS_DT / STEP)} sub-steps each)")
    head = (f"{'batch':>6} {'dtype':>8} {'Euler µs/int':>13} {'RK4 µs/int':>11} {'RK4/Euler':>10} "
            f"{'Euler err':>10} {'RK4 err':>10}")
    print(head)
    print("-" * len(head))
    per_interval = {}
    for batch in (1, 16, 256):
        z64 = _start_states(system, batch, torch.float64)
        with torch.no_grad():
            reference = RK4(STEP / 10).unroll(system.truth, z64, 0.0, OBS_DT, intervals)[-1]
        runs = {}
        for dtype in (torch.float32, torch.float64):
            z = z64.to(dtype)
            for name, solver in (("Euler", Euler(STEP)), ("RK4", RK4(STEP))):
                def run(solver=solver, z=z):
                    with torch.no_grad():
                        return solver.unroll(system.truth, z, 0.0, OBS_DT, intervals)
                runs[(dtype, name)] = run
        seconds = dict(zip(runs, _race(list(runs.values()), repeats)))
        for dtype in (torch.float32, torch.float64):
            row = {}
            for name in ("Euler", "RK4"):
                err = float((runs[(dtype, name)]()[-1].double() - reference).abs().max())
                row[name] = (seconds[(dtype, name)] / intervals * 1e6, err)
                per_interval[(batch, dtype, name)] = seconds[(dtype, name)] / intervals
            print(f"{batch:>6} {str(dtype).split('.')[-1]:>8} {row['Euler'][0]:>13.1f} {row['RK4'][0]:>11.1f} "
                  f"{row['RK4'][0] / row['Euler'][0]:>10.2f} {row['Euler'][1]:>10.2e} {row['RK4'][1]:>10.2e}")
    print()
    print("float64 / float32 time ratio per interval")
    print(f"{'batch':>6} {'Euler':>8} {'RK4':>8}")
    for batch in (1, 16, 256):
        ratios = [per_interval[(batch, torch.float64, n)] / per_interval[(batch, torch.float32, n)]
                  for n in ("Euler", "RK4")]
        print(f"{batch:>6} {ratios[0]:>8.2f} {ratios[1]:>8.2f}")
    print()


def mnemode_vs_torchdiffeq(system, repeats: int, intervals: int) -> None:
    import torchdiffeq

    print(f"mnemode RK4 vs torchdiffeq rk4 (step_size={STEP}), float64, {intervals} intervals of {OBS_DT}")
    head = f"{'batch':>6} {'mnemode ms':>11} {'torchdiffeq ms':>15} {'tdq/mnemode':>12} {'max |diff|':>11}"
    print(head)
    print("-" * len(head))
    for batch in (1, 16, 256):
        z = _start_states(system, batch, torch.float64)
        times = torch.arange(intervals + 1, dtype=torch.float64) * OBS_DT

        def ours():
            with torch.no_grad():
                return RK4(STEP).integrate(system.truth, z, times)

        def theirs():
            with torch.no_grad():
                return torchdiffeq.odeint(system.truth, z, times, method="rk4", options={"step_size": STEP})

        a, b = _race([ours, theirs], repeats)
        diff = float((ours() - theirs()).abs().max())
        print(f"{batch:>6} {a * 1e3:>11.2f} {b * 1e3:>15.2f} {b / a:>12.2f} {diff:>11.2e}")
    print()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=9)
    parser.add_argument("--intervals", type=int, default=50)
    args = parser.parse_args()
    torch.set_num_threads(1)
    system = thermosyphon(wall_response_time=1.0)  # the demo's memory regime
    start = time.perf_counter()
    print(f"torch {torch.__version__}, 1 thread\n")
    euler_vs_rk4(system, args.repeats, args.intervals)
    mnemode_vs_torchdiffeq(system, args.repeats, args.intervals)
    print(f"total {time.perf_counter() - start:.1f} s")


if __name__ == "__main__":
    main()
