"""Learning on the demo in its memory regime (τ = 1): memory closure against memoryless and nominal.

The check: on one shared set of independent test trajectories, with the hidden state
warmed up on the preceding 10 time units of observations (the same warm-up as in
fitting), the memory closure's median validity time is at least twice the best
memoryless closure's and at least ten times the nominal model's. Validity time: first
time the error ‖x̂ − x‖ / RMS(x) exceeds 0.5 (common practice in forecast-skill studies).
The baselines are fitted in the same test on the same data: a random-feature ridge
regression on finite-difference residuals (length-scale and penalty chosen on
validation data) and the physics alone.

Running this file as a script measures the full-budget figures instead (default data
sizes, a trajectory fine-tune of up to 10 minutes):

    python tests/test_memory_demo.py --log /path/to/log.txt
"""

from __future__ import annotations

import time

import numpy as np
import pytest
import torch

from mnemode.forecasting import choose_starts, run_forecasts
from mnemode.validity import validity_times
from mnemode.closures import RandomFeatureClosure, RecurrentClosure, ReservoirClosure
from mnemode.data import generate
from mnemode.fitting import DerivativeFit, FitContext, ReadoutRidgeFit, TrajectoryFit
from mnemode.hybrid import HybridField
from mnemode.solvers import RK4
from mnemode.systems import thermosyphon

torch.set_num_threads(1)

DT, WARM_UP, HORIZON, GAMMA = 0.02, 10.0, 25.0, 0.5


def demo_data(n_train=10, n_val=2, n_test=8, duration=100.0, test_duration=60.0, solver_step=0.02):
    """Training/validation trajectories and independent test trajectories (another seed)."""
    system = thermosyphon(wall_response_time=1.0)
    solver = RK4(solver_step)
    fit_set = generate(system, n_trajectories=n_train + n_val, duration=duration, dt=DT, solver=solver, seed=0)
    test = generate(system, n_trajectories=n_test, duration=test_duration, dt=DT, solver=solver, seed=1000)
    train, val = fit_set.split_by_trajectory([n_train, n_val])
    return system, train, val, test


def validity(model, test, scale, n_starts, solver=RK4(DT)):
    """Validity times of forecasts from ``n_starts`` points of the test set (warm-up, then free run)."""
    n_warm, n_h = int(round(WARM_UP / DT)), int(round(HORIZON / DT))
    starts = choose_starts(test.n_times, test.n_trajectories, n_warm, n_h, n_starts)
    out = run_forecasts(model, solver, test.states, starts, n_warm, n_h, DT)
    rows = starts.index[None, :] + np.arange(n_h + 1)[:, None]
    truth = test.states[rows, starts.trajectory[None, :]]
    times, _ = validity_times(out.states, truth, DT, GAMMA, scale=scale)
    return times


def rms_scale(train) -> float:
    flat = train.states.reshape(-1, train.dim)
    return float(np.sqrt(((flat - flat.mean(0)) ** 2).sum(-1).mean()))


def memoryless_baseline(system, train, val, lengthscale=(1.0, 2.0, 4.0), ridge=(1e-8, 1e-6, 1e-4)):
    closure = RandomFeatureClosure(3, n_features=300, lengthscale=list(lengthscale), ridge=list(ridge))
    model = HybridField(system.nominal, closure, 3).double()
    DerivativeFit().fit(model, train, val, FitContext(solver=RK4(DT), warm_up=WARM_UP))
    return model


def quartiles(t) -> str:
    q25, q50, q75 = np.percentile(t, [25, 50, 75])
    return f"{q50:.2f} [{q25:.2f}, {q75:.2f}]"


@pytest.mark.slow
def test_memory_closure_beats_memoryless_twice_and_nominal_tenfold():
    t0 = time.perf_counter()
    system, train, val, test = demo_data()
    scale = rms_scale(train)
    ctx = FitContext(solver=RK4(DT), warm_up=WARM_UP, seed=0)

    memory = HybridField(system.nominal, ReservoirClosure(3, kind="filter_bank"), 3).double()
    fit = ReadoutRidgeFit(ridge=[1e-8, 1e-6, 1e-4]).fit(memory, train, val, ctx)
    memoryless = memoryless_baseline(system, train, val, lengthscale=(1.0, 2.0), ridge=(1e-8, 1e-6))
    nominal = HybridField(system.nominal, None, 3)

    n_starts = 24
    t_mem, t_ml, t_nom = (validity(m, test, scale, n_starts) for m in (memory, memoryless, nominal))
    assert len(t_mem) >= 20
    summary = (f"memory {quartiles(t_mem)}, memoryless {quartiles(t_ml)}, nominal {quartiles(t_nom)}; "
               f"ridge fit {fit['fit_seconds']:.1f} s, total {time.perf_counter() - t0:.0f} s")
    print(summary)
    assert np.median(t_mem) >= 2.0 * np.median(t_ml), summary
    assert np.median(t_mem) >= 10.0 * np.median(t_nom), summary


# -- full-budget measurement (run as a script) ---------------------------------------------------------

def _measure(log_path: str, budget_seconds: float, steps: int) -> None:
    def log(msg):
        line = f"[{time.strftime('%H:%M:%S')}] {msg}"
        print(line, flush=True)
        with open(log_path, "a", encoding="utf-8") as fh:
            fh.write(line + "\n")

    t0 = time.perf_counter()
    # the pipeline's default data: 10 × 100 units for training, 4 for validation, truth solver step 0.005
    system, train, val, test = demo_data(n_val=4, n_test=10, test_duration=100.0, solver_step=0.005)
    scale = rms_scale(train)
    log(f"data ready in {time.perf_counter() - t0:.0f} s; RMS(x) = {scale:.3f}; warm-up {WARM_UP} units")
    n_starts = 50

    nominal = HybridField(system.nominal, None, 3)
    log(f"nominal: validity {quartiles(validity(nominal, test, scale, n_starts))}")

    t = time.perf_counter()
    memoryless = memoryless_baseline(system, train, val)
    log(f"memoryless random-feature ridge ({time.perf_counter() - t:.0f} s): "
        f"validity {quartiles(validity(memoryless, test, scale, n_starts))}")

    t = time.perf_counter()
    bank = HybridField(system.nominal, ReservoirClosure(3, kind="filter_bank"), 3).double()
    ReadoutRidgeFit(ridge=[1e-8, 1e-6, 1e-4]).fit(bank, train, val, FitContext(solver=RK4(DT), warm_up=WARM_UP))
    log(f"filter bank + ridge ({time.perf_counter() - t:.1f} s): "
        f"validity {quartiles(validity(bank, test, scale, n_starts))}")

    t = time.perf_counter()
    closure = RecurrentClosure(3, hidden_size=18, input_init="filter_bank", coupling=False)
    model = HybridField(system.nominal, closure, 3).double()
    fitter = TrajectoryFit(steps=steps, max_seconds=budget_seconds)
    out = fitter.fit(model, train, val, FitContext(solver=RK4(DT), warm_up=WARM_UP, seed=0))
    log(f"leaky recurrent closure, ridge init + trajectory fine-tune ({time.perf_counter() - t:.0f} s, "
        f"{out['steps']} steps, best at {out['best_step']}, validation validity {out['val_validity']:.2f}): "
        f"validity {quartiles(validity(model, test, scale, n_starts))}")


if __name__ == "__main__":
    import argparse

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--log", required=True)
    parser.add_argument("--seconds", type=float, default=600.0)
    parser.add_argument("--steps", type=int, default=2000)
    args = parser.parse_args()
    _measure(args.log, args.seconds, args.steps)
