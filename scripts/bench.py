"""mnemode's speed and memory benchmark: ratios measured side by side in one run.

Sections (``--only`` picks some; all by default):

``fit``       Fitting throughput, forward + backward: (a) a forecast unroll of
              ``F`` RK4 steps; (b) a whole fitting step (warm-up on observations,
              the last part differentiated, then the forecast). mnemode's RK4
              (eager: the prepared field ``simulate`` unrolls, and for reference
              the plain field; compiled with ``compile=True`` unless
              ``--no-compile``; mnemode's warm-up is exact for the leaky closure)
              against torchdiffeq's ``odeint(method='rk4')`` with the same explicit
              step and against a plain eager Python loop of the textbook RK4. On the
              demo model (thermosyphon physics + leaky memory closure, hidden 18,
              batch 32, step 0.02) and a large case (Lorenz-96 physics with 36
              sites + a coupled leaky closure with hidden 64, batch 512). Each row
              also gives the fraction of the machine's measured matrix-product peak
              (matrix-product FLOPs counted by ``torch.utils.flop_counter``).
``export``    The exported simulator (``export_simulator`` → ``load_simulator``,
              ``Simulator.rollout``) against the eager model (``simulate``) for
              ``N`` observation steps at batch 1 and 64, and, where a C++ compiler
              is present, the ahead-of-time compiled simulator
              (``export_simulator(compiled=True)`` → ``load_simulator(compiled=True)``,
              whose rollout calls the compiled block program) with its parity.
``truth``     Cost of a forecast: the corrected simulator at its Δt against the
              truth at its accuracy-matched RK4 step over the same horizon, both
              run the same way (both eager; both compiled with ``compile=True``
              too unless ``--no-compile``): the demo at τ = 0.01 and two-scale
              Lorenz-96 (c = 10), each the main model its preset builds
              (``experiment=memoryless_regime``, ``experiment=lorenz96_two_scale``:
              closure, Δt and solver step as configured; closure untrained, which
              costs the same as a fitted one).
``memory``    Peak resident memory (``ru_maxrss``) of a short trajectory fit at 1×
              and 10× the training data length, one subprocess per measurement.
``run``       Wall time of ``mnemode run`` (the demo main job ``memory_regime``, then
              ``tiny``; ``--run-preset``), data generated afresh,
              and of its fit stages from the run's ``metrics.json``; full mode only.
``startup``   ``mnemode --help`` against ``python -c "import torch"``.
``ddp``       Data-parallel fitting throughput: the demo model's trajectory fit
              (``TrajectoryFit``, global batch 64, fixed horizon, validation and
              checkpoints off during the updates) in one process and under
              ``torchrun --standalone --nproc_per_node=2`` (DistributedDataParallel,
              gloo), one torch thread per process. Each launch times only its
              update loop (rank 0 stamps every update; the first updates are
              warm-up and not counted), so start-up, process-group set-up and data
              generation are excluded. Prints windows per second of each, the ratio
              2 processes / 1 process, and the cores this process may use: 2× is
              the ceiling, reached only with 2 idle cores.

Timing: one thread by default (``--threads``), one warm-up call, then the fastest
of ``--repeats`` runs, the variants compared in a row interleaved so all see the
same load. Only ratios are meaningful on a shared machine; absolute times are
printed for orientation. Results go to ``--json`` (default ``bench.json``) with
the machine, the torch version and the thread count.

``--quick`` (under about two minutes on an idle 2-core machine; ``ddp`` alone about a
minute) shortens every workload, skips compilation and the ``run`` section; the full
mode runs them all.
Compiling takes minutes on a loaded machine; its time is reported separately.

Usage::

    python scripts/bench.py --quick
    python scripts/bench.py --only fit export --threads 1
    python scripts/bench.py --quick --only ddp
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import resource
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import numpy as np
import torch

SECTIONS = ("fit", "export", "truth", "memory", "run", "startup", "ddp")

# Accuracy-matched truth steps: the largest RK4 step keeping the truth within 1e-3 relative error of
# DOP853 (rtol 1e-10) over 100 time units, measured once on this kind of machine (not re-derived here).
TRUTH_STEP = {"demo_tau_0.01": 1.0 / 60.0, "lorenz96_two_scale": 5e-4}


# -- timing ------------------------------------------------------------------------------

def race(fns: dict, repeats: int) -> dict:
    """Fastest wall time of each callable; one warm-up call each, then runs interleaved."""
    for fn in fns.values():
        fn()
    best = {k: math.inf for k in fns}
    for _ in range(repeats):
        for k, fn in fns.items():
            t0 = time.perf_counter()
            fn()
            best[k] = min(best[k], time.perf_counter() - t0)
    return best


def timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0


def matmul_peak(dtype=torch.float64, n: int = 512, repeats: int = 5) -> float:
    """Measured matrix-product rate (FLOP/s) of this process's threads: ``2 n³`` per product."""
    a = torch.randn(n, n, dtype=dtype)
    b = torch.randn(n, n, dtype=dtype)
    best = race({"mm": lambda: a @ b}, repeats)["mm"]
    return 2.0 * n ** 3 / best


def mm_flops(fn) -> int:
    """Matrix-product FLOPs of one call of ``fn`` (forward and backward), by torch's counter."""
    from torch.utils.flop_counter import FlopCounterMode

    counter = FlopCounterMode(display=False)
    with counter:
        fn()
    return int(counter.get_total_flops())


def row(name: str, seconds: float, base: float | None = None, flops: int | None = None, peak: float | None = None):
    r = {"seconds": seconds}
    if base is not None:
        r["speedup_vs_base"] = base / seconds
    if flops is not None and peak:
        r["peak_fraction"] = flops / seconds / peak
    return r


def print_table(title: str, rows: dict, base_name: str) -> None:
    print(f"\n{title}")
    print(f"  {'variant':<38} {'seconds':>9} {'× ' + base_name:>16} {'peak frac':>10}")
    for name, r in rows.items():
        sp = r.get("speedup_vs_base")
        pf = r.get("peak_fraction")
        print(f"  {name:<38} {r['seconds']:>9.4f} {'' if sp is None else f'{sp:.2f}':>16} "
              f"{'' if pf is None else f'{pf:.2e}':>10}")


# -- models -----------------------------------------------------------------------------

def demo_model(dtype=torch.float64):
    from mnemode.pipeline import build_model, compose_config, main_model_name, make_system, model_specs

    cfg = compose_config([])
    system = make_system(cfg)
    model = build_model(model_specs(cfg)[main_model_name(cfg)], system, float(cfg.data.dt), dtype)
    return system, model


def demo_history(system, batch: int, n_obs: int, dt: float = 0.02, dtype=torch.float64) -> torch.Tensor:
    """Observed truth ``(n_obs + 1, batch, dim)`` on the attractor (spun up for 10 time units)."""
    from mnemode.solvers import RK4

    gen = torch.Generator().manual_seed(0)
    z = system.random_truth_states(batch, gen, torch.float64)
    with torch.no_grad():
        z = RK4(0.01).advance(system.truth, 0.0, z, 10.0)
        traj = RK4(0.005).unroll(system.truth, z, 0.0, dt, n_obs)
    return system.observe(traj).to(dtype)


def large_model(dtype=torch.float64):
    """Lorenz-96 physics on 36 sites with a coupled leaky memory closure (hidden 64)."""
    from mnemode.closures import RecurrentClosure
    from mnemode.hybrid import HybridField
    from mnemode.systems.lorenz96 import Lorenz96Field

    previous = torch.get_default_dtype()
    torch.set_default_dtype(dtype)
    try:
        closure = RecurrentClosure(36, hidden_size=64, form="leaky", coupling=True, seed=0)
    finally:
        torch.set_default_dtype(previous)
    return HybridField(Lorenz96Field(36, 8.0), closure, 36).to(dtype)


# -- fit ----------------------------------------------------------------------------------

def _textbook_rk4_unroll(f, y0, dt, n):
    ys, y = [y0], y0
    for i in range(n):
        t = i * dt
        k1 = f(t, y)
        k2 = f(t + dt / 2, y + dt / 2 * k1)
        k3 = f(t + dt / 2, y + dt / 2 * k2)
        k4 = f(t + dt, y + dt * k3)
        y = y + dt / 6 * (k1 + 2 * k2 + 2 * k3 + k4)
        ys.append(y)
    return torch.stack(ys)


def _torchdiffeq_unroll(f, y0, dt, n):
    import torchdiffeq

    t = torch.arange(n + 1, dtype=y0.dtype) * dt
    return torchdiffeq.odeint(f, y0, t, method="rk4", options={"step_size": dt})


def _fit_workloads(model, history, n_warm, n_grad, n_f, dt, compile_too: bool):
    """Callables doing forward + backward of (a) the forecast alone and (b) warm-up + forecast."""
    from mnemode.hybrid import _ObservedDriving, simulate, warm_up
    from mnemode.solvers import RK4

    params = [p for p in model.parameters() if p.requires_grad]
    x0 = history[n_warm]
    target = history[n_warm + 1: n_warm + 1 + n_f]
    r_init = model.closure.initial_hidden(x0.shape[:-1], x0.dtype)
    s0 = torch.cat((x0, r_init), -1)

    def backward(xs):
        loss = (xs[1:, ..., : model.dim] - target).square().mean()
        torch.autograd.grad(loss, params)

    unroll = {
        # simulate() unrolls the prepared field (HybridField.prepared: the closure folded once per unroll)
        "mnemode RK4 (eager)": lambda: backward(RK4(dt).unroll(model.prepared(), s0, 0.0, dt, n_f)),
        "mnemode RK4 (eager, plain field)": lambda: backward(RK4(dt).unroll(model, s0, 0.0, dt, n_f)),
        "torchdiffeq rk4 (same step)": lambda: backward(_torchdiffeq_unroll(model, s0, dt, n_f)),
        "plain eager loop (textbook RK4)": lambda: backward(_textbook_rk4_unroll(model, s0, dt, n_f)),
    }
    compiled = RK4(dt, compile=True)
    if compile_too:
        unroll["mnemode RK4 (compile=True)"] = lambda: backward(compiled.unroll(model, s0, 0.0, dt, n_f))

    def fit_step(solver):
        # mnemode's warm-up: exact for the leaky closure (closed form when uncoupled), else the solver
        n_free = n_warm - n_grad
        with torch.no_grad():
            r = warm_up(model, history[: n_free + 1], dt, solver)
        r = warm_up(model, history[n_free: n_warm + 1], dt, solver, r0=r, t0=n_free * dt)
        backward(torch.cat((x0[None], simulate(model, x0, n_f, dt, solver, r0=r, t0=n_warm * dt)[1:])))

    def fit_step_torchdiffeq():
        import torchdiffeq

        n_free = n_warm - n_grad
        closure = model.closure

        def interval(i, r):
            drive = _ObservedDriving(closure, history[i], history[i + 1], i * dt, dt, None)
            t = torch.tensor([i * dt, (i + 1) * dt], dtype=history.dtype)
            return torchdiffeq.odeint(drive, r, t, method="rk4", options={"step_size": dt})[-1]

        r = r_init
        with torch.no_grad():
            for i in range(n_free):
                r = interval(i, r)
        for i in range(n_free, n_warm):
            r = interval(i, r)
        s = torch.cat((x0, r), -1)
        backward(_torchdiffeq_unroll(model, s, dt, n_f))

    step = {"mnemode RK4 (eager)": lambda: fit_step(RK4(dt)),
            "torchdiffeq rk4 (same step)": fit_step_torchdiffeq}
    if compile_too:
        step["mnemode RK4 (compile=True)"] = lambda: fit_step(compiled)
    return unroll, step, compiled


def bench_fit(args, out: dict) -> None:
    peak = matmul_peak()
    out["matmul_peak_gflops"] = peak / 1e9
    print(f"\nmeasured float64 matrix-product peak: {peak / 1e9:.2f} GFLOP/s ({torch.get_num_threads()} thread(s))")
    dt = 0.02
    cases = []
    system, model = demo_model()
    q = args.quick
    n_warm, n_grad, n_f = (50, 25, 50) if q else (500, 100, 200)
    if "demo" in args.fit_cases:
        cases.append(("demo (hidden 18, batch 32)", model, demo_history(system, 32, n_warm + n_f + 1, dt),
                      n_warm, n_grad, n_f))
    big = large_model()
    bw, bg, bf = (10, 5, 10) if q else (50, 25, 100)
    gen = torch.Generator().manual_seed(1)
    hist = torch.randn(bw + bf + 2, 512, 36, dtype=torch.float64, generator=gen)  # observations: any bounded data
    hist = hist.cumsum(0) * 0.05 + 2.0
    if "large" in args.fit_cases:
        cases.append(("large (state 36, hidden 64, batch 512)", big, hist, bw, bg, bf))
    res = {}
    for name, m, history, nw, ng, nf in cases:
        unroll, step, compiled = _fit_workloads(m, history, nw, ng, nf, dt, args.compile)
        compile_s = None
        if args.compile:
            _, compile_s = timed(unroll["mnemode RK4 (compile=True)"])  # first call compiles forward + backward
            _, s2 = timed(step["mnemode RK4 (compile=True)"])           # warm-up graphs (no-grad and grad)
            compile_s += s2
        flops_u = mm_flops(unroll["mnemode RK4 (eager)"])
        flops_s = mm_flops(step["mnemode RK4 (eager)"])
        tu = race(unroll, args.repeats)
        ts = race(step, max(1, args.repeats // 2) if not q else args.repeats)
        base = "torchdiffeq rk4 (same step)"
        rows_u = {k: row(k, v, tu[base], flops_u, peak) for k, v in tu.items()}
        rows_s = {k: row(k, v, ts[base], flops_s, peak) for k, v in ts.items()}
        print_table(f"fit, {name}: forecast unroll of {nf} RK4 steps, forward + backward", rows_u, "torchdiffeq")
        print_table(f"fit, {name}: fitting step = warm-up {nw} intervals ({ng} differentiated) + forecast {nf}, "
                    f"forward + backward", rows_s, "torchdiffeq")
        if compile_s is not None:
            failed = compiled._compiled.failed if compiled._compiled is not None else None
            print(f"  compilation (first calls): {compile_s:.1f} s{'' if failed is None else '; FELL BACK: ' + failed}")
        res[name] = {"unroll": rows_u, "fit_step": rows_s, "compile_seconds": compile_s,
                     "sizes": {"warm_up": nw, "warm_up_grad": ng, "forecast": nf}}
    out["fit"] = res


# -- export --------------------------------------------------------------------------------

def bench_export(args, out: dict) -> None:
    from mnemode.export import export_simulator
    from mnemode.export_aot import cxx_compiler
    from mnemode.hybrid import simulate
    from mnemode.simulator import load_simulator
    from mnemode.solvers import RK4

    system, model = demo_model()
    dt, n = 0.02, (200 if args.quick else 1000)
    hist = demo_history(system, 64, 10, dt)
    env = {name: [float(hist[..., i].min()) - 5, float(hist[..., i].max()) + 5]
           for i, name in enumerate(system.state_names)}
    res = {}
    with tempfile.TemporaryDirectory() as tmp:
        d = Path(tmp) / "export"
        _, export_s = timed(lambda: export_simulator(
            model, d, dt=dt, solver=RK4(dt), state_names=system.state_names, state_units=system.state_units,
            warm_up_steps=10, envelope=env, parity_steps=50, check_float32=False))
        res["export_seconds"] = export_s
        print(f"\nexport: export_simulator took {export_s:.1f} s")
        sim = load_simulator(d, on_envelope="ignore")
        fast = None
        if not args.quick and args.compile:
            if cxx_compiler() is None:
                print("  no C++ compiler: no ahead-of-time packages")
            else:
                d2 = Path(tmp) / "export_compiled"
                manifest, compiled_s = timed(lambda: export_simulator(
                    model, d2, dt=dt, solver=RK4(dt), state_names=system.state_names,
                    state_units=system.state_units, warm_up_steps=10, envelope=env, parity_steps=50,
                    check_float32=False, compiled=True))
                rec = manifest["compiled"]
                res["compiled_export_seconds"], res["compiled"] = compiled_s, rec
                print(f"  export with compiled=True: {compiled_s:.1f} s; "
                      + ", ".join(f"{role}: {r['kind']} (parity {r['parity']})" for role, r in rec.items()))
                if rec.get("step", {}).get("kind") == "aoti":
                    fast = load_simulator(d2, on_envelope="ignore", compiled=True)
        for batch in (1, 64):
            x0 = hist[-1, :batch].contiguous()
            r0 = model.closure.initial_hidden((batch,), torch.float64)

            def eager():
                with torch.no_grad():
                    return simulate(model, x0, n, dt, RK4(dt), r0=r0)

            fns = {"eager model (simulate)": eager,
                   "exported .pt2 (Simulator.rollout)": lambda: sim.rollout(x0, n, r0=r0)}
            if fast is not None:
                fns["compiled simulator (rollout, compiled=True)"] = lambda: fast.rollout(x0, n, r0=r0)
            t = race(fns, args.repeats)
            rows = {k: row(k, v, t["eager model (simulate)"]) for k, v in t.items()}
            print_table(f"export: {n} observation steps at batch {batch}", rows, "eager")
            res[f"batch_{batch}"] = rows
            if fast is not None:
                diff = float((fast.rollout(x0, n, r0=r0) - eager()).abs().max())
                res[f"batch_{batch}"]["compiled_vs_eager_max_abs_diff"] = diff
                print(f"  compiled simulator vs eager model after {n} steps: largest difference {diff:.3g}")
    out["export"] = res


# -- truth vs corrected simulator -------------------------------------------------------------

def _truth_case(overrides, truth_step, horizon, batches, args):
    """The preset's main model (as the preset builds it: closure, Δt, solver step) against its truth."""
    from mnemode.hybrid import simulate
    from mnemode.pipeline import build_model, compose_config, main_model_name, make_system, model_specs
    from mnemode.solvers import RK4

    cfg = compose_config(overrides)
    system = make_system(cfg)
    dt = float(cfg.data.dt)
    model = build_model(model_specs(cfg)[main_model_name(cfg)], system, dt, torch.float64)
    sim_step = float(cfg.solver.step)
    closure = model.closure
    inner = getattr(closure, "inner", None)
    print(f"  simulator: {type(closure).__name__}" + (f" of {type(inner).__name__}" if inner is not None else "")
          + f", Δt {dt}, RK4 step {sim_step}")
    gen = torch.Generator().manual_seed(0)
    rows = {}
    for batch in batches:
        z0 = system.random_truth_states(batch, gen, torch.float64)
        x0 = system.observe(z0)
        n_sim = int(round(horizon / dt))
        n_truth = int(round(horizon / truth_step))
        fns = {}
        for label, comp in (("eager", False), ("compiled", True)):
            if comp and not args.compile:
                continue
            sim_solver, truth_solver = RK4(sim_step, compile=comp), RK4(truth_step, compile=comp)

            def run_sim(s=sim_solver):
                with torch.no_grad():  # the user's path: simulate (the prepared field when eager)
                    return simulate(model, x0, n_sim, dt, s)

            def run_truth(s=truth_solver):
                with torch.no_grad():
                    return s.unroll(system.truth, z0, 0.0, truth_step, n_truth)
            fns[f"simulator ({label})"] = run_sim
            fns[f"truth ({label})"] = run_truth
        t = race(fns, args.repeats)
        r = {"seconds": t, "truth_over_simulator": {
            label: t[f"truth ({label})"] / t[f"simulator ({label})"] for label in ("eager", "compiled")
            if f"truth ({label})" in t}}
        rows[f"batch_{batch}"] = r
        ratios = ", ".join(f"{k} {v:.2f}×" for k, v in r["truth_over_simulator"].items())
        print(f"  batch {batch:>3}: simulator Δt {dt} (step {sim_step}) {n_sim} steps vs truth step {truth_step:.3g} "
              f"{n_truth} steps; truth/simulator cost: {ratios}")
    return rows


def bench_truth(args, out: dict) -> None:
    q = args.quick
    print("\ntruth vs corrected simulator, same horizon, both run the same way (untrained closures: cost only)")
    print(f" demo at τ = 0.01 (memoryless regime), horizon {2.0 if q else 20.0}:")
    demo = _truth_case(["experiment=memoryless_regime"], TRUTH_STEP["demo_tau_0.01"],
                       2.0 if q else 20.0, (1, 64), args)
    print(f" Lorenz-96 two-scale (c = 10), horizon {0.5 if q else 1.0}:")
    l96 = _truth_case(["experiment=lorenz96_two_scale"], TRUTH_STEP["lorenz96_two_scale"],
                      0.5 if q else 1.0, (1, 64), args)
    out["truth"] = {"demo_tau_0.01": demo, "lorenz96_two_scale": l96, "truth_steps": TRUTH_STEP}


# -- memory -------------------------------------------------------------------------------------

def _memory_child(data_path: str, steps: int) -> None:
    """Run in a subprocess: a short trajectory fit on the saved data; prints JSON with ru_maxrss (KiB)."""
    from mnemode.data import TrajectorySet
    from mnemode.fitting import FitContext, TrajectoryFit
    from mnemode.solvers import RK4

    torch.set_num_threads(1)
    system, model = demo_model()
    z = np.load(data_path)
    train = TrajectorySet(z["times"], z["states"], system.state_names)
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    fitter = TrajectoryFit(steps=steps, batch_size=32, val_every=10 ** 6, val_windows=8, val_horizon=2.0,
                           checkpoint_every=10 ** 6, horizon=(0.5, 1.0))
    fitter.fit(model, train, None, FitContext(solver=RK4(0.02), warm_up=10.0))
    after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(json.dumps({"before_fit_kib": before, "peak_kib": after}))


def bench_memory(args, out: dict) -> None:
    from mnemode.solvers import RK4

    system, _ = demo_model()
    n_traj, duration, dt = 10, 100.0, 0.02
    n = int(duration / dt)
    gen = torch.Generator().manual_seed(0)
    with torch.no_grad():
        z = RK4(0.01).advance(system.truth, 0.0, system.random_truth_states(n_traj, gen), 10.0)
        traj = system.observe(RK4(0.01).unroll(system.truth, z, 0.0, dt, n)).numpy()
    res = {}
    with tempfile.TemporaryDirectory() as tmp:
        for factor in (1, 10):
            # 10×: the same trajectories continued by time-reversed copies (bounded, continuous at the joins)
            pieces = [traj if k % 2 == 0 else traj[::-1] for k in range(factor)]
            states = np.concatenate([pieces[0]] + [p[1:] for p in pieces[1:]])
            times = np.arange(states.shape[0]) * dt
            path = Path(tmp) / f"data_{factor}.npz"
            np.savez(path, times=times, states=states)
            cmd = [sys.executable, __file__, "--memory-child", str(path), "--memory-steps", "3" if args.quick else "10"]
            proc = subprocess.run(cmd, capture_output=True, text=True, env={**os.environ, "OMP_NUM_THREADS": "1"})
            if proc.returncode != 0:
                raise RuntimeError(f"memory child failed:\n{proc.stderr[-2000:]}")
            rec = json.loads(proc.stdout.strip().splitlines()[-1])
            rec["samples"] = int(states.shape[0]) * n_traj
            res[f"{factor}x"] = rec
    unit = 1024.0 if sys.platform != "darwin" else 1024.0 ** 2  # ru_maxrss: KiB on Linux, bytes on macOS
    one, ten = res["1x"], res["10x"]
    ratio = ten["peak_kib"] / one["peak_kib"]
    inc1 = one["peak_kib"] - one["before_fit_kib"]
    inc10 = ten["peak_kib"] - ten["before_fit_kib"]
    res["peak_ratio_10x_over_1x"] = ratio
    print(f"\nmemory: peak RSS of a short fit, 1× data ({one['samples']} samples) {one['peak_kib'] / unit:.0f} MiB, "
          f"10× data {ten['peak_kib'] / unit:.0f} MiB: ratio {ratio:.3f} (target ≤ 1.2); growth during the fit "
          f"{inc1 / unit:.0f} MiB vs {inc10 / unit:.0f} MiB")
    out["memory"] = res


# -- mnemode run and start-up -----------------------------------------------------------------------

def _seconds_in(obj, prefix=""):
    found = {}
    if isinstance(obj, dict):
        for k, v in obj.items():
            key = f"{prefix}.{k}" if prefix else str(k)
            if isinstance(v, (int, float)) and str(k).endswith("seconds"):
                found[key] = float(v)
            else:
                found.update(_seconds_in(v, key))
    return found


def _stage_wall(log_text: str) -> dict:
    """Wall seconds of each stage of a run, from the timestamps of its log (data, fit, assess, export)."""
    import re
    from datetime import datetime

    stamps = []
    for line in log_text.splitlines():
        m = re.match(r"\[(\d{4}-\d\d-\d\d \d\d:\d\d:\d\d,\d+) \w+\] (.*)", line)
        if m:
            stamps.append((datetime.strptime(m.group(1), "%Y-%m-%d %H:%M:%S,%f"), m.group(2)))
    if not stamps:
        return {}
    starts = {"data": stamps[0][0]}
    for when, msg in stamps:
        for stage, prefix in (("fit", "fitting "), ("assess", "assessing "), ("export", "exporting ")):
            if msg.startswith(prefix) and stage not in starts:
                starts[stage] = when
    order = [k for k in ("data", "fit", "assess", "export") if k in starts]
    ends = [starts[k] for k in order[1:]] + [stamps[-1][0]]
    return {k: (e - starts[k]).total_seconds() for k, e in zip(order, ends)}


def bench_run(args, out: dict) -> None:
    out["run"] = {}
    for preset in args.run_preset:
        out["run"][preset] = _bench_one_run(args, preset)


def _bench_one_run(args, preset: str) -> dict:
    with tempfile.TemporaryDirectory() as tmp:  # a fresh runs root: the data are generated, as on a new machine
        env = {**os.environ, "MNEMODE_RUNS": tmp, "OMP_NUM_THREADS": str(args.threads)}
        cmd = [sys.executable, "-m", "mnemode", "run", f"experiment={preset}", "progress=false",
               f"hydra.run.dir={tmp}/run", *args.run_overrides]
        proc, wall = timed(lambda: subprocess.run(cmd, capture_output=True, text=True, env=env))
        res = {"preset": preset, "overrides": list(args.run_overrides), "wall_seconds": wall,
               "returncode": proc.returncode}
        metrics = Path(tmp) / "run" / "metrics.json"
        if metrics.is_file():
            res["stages"] = _seconds_in(json.loads(metrics.read_text()))
        else:
            res["stderr_tail"] = proc.stderr[-1500:]
        logfile = Path(tmp) / "run" / "mnemode.log"
        if logfile.is_file():
            res["stage_wall"] = _stage_wall(logfile.read_text())
    print(f"\nmnemode run experiment={preset} {' '.join(args.run_overrides)}: {wall:.1f} s wall "
          f"(exit {proc.returncode})")
    for k, v in res.get("stage_wall", {}).items():
        print(f"  stage {k}: {v:.1f} s (from the run's log)")
    for k, v in res.get("stages", {}).items():
        print(f"  {k}: {v:.1f} s")
    return res


def bench_startup(args, out: dict) -> None:
    env = {**os.environ, "OMP_NUM_THREADS": "1"}
    cmds = {"mnemode --help": [sys.executable, "-m", "mnemode", "--help"],
            "python -c 'import torch'": [sys.executable, "-c", "import torch"],
            "python -c 'pass'": [sys.executable, "-c", "pass"]}
    fns = {k: (lambda c=c: subprocess.run(c, capture_output=True, env=env)) for k, c in cmds.items()}
    t = race(fns, 2 if args.quick else 4)
    print("\nstart-up (fastest of interleaved runs):")
    torch_s = t["python -c 'import torch'"]
    for k, v in t.items():
        print(f"  {k:<28} {v:.2f} s  ({v / torch_s:.2f}× import torch)")
    out["startup"] = {"seconds": t, "help_over_import_torch": t["mnemode --help"] / t["python -c 'import torch'"]}


# -- data-parallel fitting throughput ----------------------------------------------------------------

# Run once per launch (plain python, or each torchrun process): the demo model's trajectory fit on
# a little generated data; rank 0 writes how long each update took to the JSON path in argv[2].
DDP_FIT_SCRIPT = textwrap.dedent("""
    import json, sys, time
    import torch

    torch.set_num_threads(1)
    from mnemode import distributed
    from mnemode.data import generate
    from mnemode.fitting import FitContext, TrajectoryFit
    from mnemode.pipeline import build_model, compose_config, main_model_name, make_system, model_specs
    from mnemode.solvers import RK4

    work = json.loads(sys.argv[1])
    distributed.init_from_env()
    cfg = compose_config([])  # the demo: thermosyphon physics + leaky recurrent closure (hidden 18)
    system = make_system(cfg)
    dt = float(cfg.data.dt)
    model = build_model(model_specs(cfg)[main_model_name(cfg)], system, dt, torch.float64)
    train = generate(system, n_trajectories=4, duration=work["duration"], dt=dt, solver=RK4(0.01), seed=0,
                     spin_up=20.0)

    class Stamps:  # a TensorBoard stand-in: the time each update logs its loss (rank 0 only gets a writer)
        times = []
        def add_scalar(self, tag, value, step):
            if tag.endswith("/train/loss"):
                self.times.append(time.perf_counter())
        def flush(self):
            pass

    stamps = Stamps()
    never = work["steps"] + 1  # validation and checkpoints only before and after the timed updates
    fit = TrajectoryFit(steps=work["steps"], batch_size=work["batch"], horizon=work["horizon"], curriculum=0.0,
                        warm_up_grad=2.0, readout_init="offset", val_every=never, val_windows=2, val_horizon=1.0,
                        checkpoint_every=never)
    ctx = FitContext(solver=RK4(dt), warm_up=float(cfg.warm_up), writer=stamps, seed=0, name="demo")
    out = fit.fit(model, train, None, ctx)
    if distributed.is_main():
        t = stamps.times
        json.dump({"world": distributed.world_size(), "steps": out["steps"], "recoveries": out["recoveries"],
                   "update_seconds": [b - a for a, b in zip(t, t[1:])]}, open(sys.argv[2], "w"))
    distributed.finish()
""")


def _ddp_launch(script: Path, work: dict, n_proc: int, result: Path, tmp: str) -> dict:
    """One launch of the fit script in ``n_proc`` processes; rank 0's timings."""
    env = {**os.environ, "OMP_NUM_THREADS": "1"}
    for key in ("RANK", "WORLD_SIZE", "LOCAL_RANK", "MASTER_ADDR", "MASTER_PORT"):
        env.pop(key, None)
    launcher = [] if n_proc == 1 else ["-m", "torch.distributed.run", "--standalone", f"--nproc_per_node={n_proc}"]
    cmd = [sys.executable, *launcher, str(script), json.dumps(work), str(result)]
    proc = subprocess.run(cmd, cwd=tmp, env=env, capture_output=True, text=True)
    if proc.returncode != 0 or not result.is_file():
        raise RuntimeError(f"ddp fit in {n_proc} process(es) failed (exit {proc.returncode}):\n{proc.stderr[-3000:]}")
    rec = json.loads(result.read_text())
    result.unlink()
    if rec["world"] != n_proc or rec["steps"] != work["steps"]:
        raise RuntimeError(f"ddp fit in {n_proc} process(es) ran {rec['steps']} updates in a group of "
                           f"{rec['world']}; expected {work['steps']} in {n_proc}")
    timed_updates = rec["update_seconds"][work["skip"] - 1:]  # stamps are update ends: skip the first `skip`
    rec["timed_updates"] = len(timed_updates)
    rec["median_update_seconds"] = float(np.median(timed_updates))
    rec["mean_update_seconds"] = float(np.mean(timed_updates))
    rec["windows_per_second"] = work["batch"] / rec["median_update_seconds"]
    rec["windows_per_second_mean"] = work["batch"] / rec["mean_update_seconds"]
    return rec


def bench_ddp(args, out: dict) -> None:
    q = args.quick
    # horizon in time units (Δt 0.02); warm-up 10 time units (500 intervals, last 100 differentiated) per window
    work = {"batch": 64, "horizon": 1.0 if q else 2.0, "steps": 12 if q else 60, "skip": 2 if q else 5,
            "duration": 20.0 if q else 40.0}
    rounds = 1 if q else 2  # full mode: 1 p, 2 p, 1 p, 2 p; the faster of each kept
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    load_before = list(os.getloadavg()) if hasattr(os, "getloadavg") else None
    best: dict[int, dict] = {}
    with tempfile.TemporaryDirectory() as tmp:
        script = Path(tmp) / "ddp_fit.py"
        script.write_text(DDP_FIT_SCRIPT)
        for _ in range(rounds):
            for n_proc in (1, 2):
                rec = _ddp_launch(script, work, n_proc, Path(tmp) / f"result_{n_proc}.json", tmp)
                if n_proc not in best or rec["windows_per_second"] > best[n_proc]["windows_per_second"]:
                    best[n_proc] = rec
    load_after = list(os.getloadavg()) if hasattr(os, "getloadavg") else None
    ratio = best[2]["windows_per_second"] / best[1]["windows_per_second"]
    print(f"\nddp: demo trajectory fit (hidden 18), global batch {work['batch']}, forecast {work['horizon']:g} time "
          f"units, {work['steps']} updates ({work['skip']} warm-up, not timed), 1 torch thread per process, "
          f"{'fastest of ' + str(rounds) + ' interleaved launches' if rounds > 1 else 'one launch each'}")
    for n_proc, rec in best.items():
        print(f"  {n_proc} process{'es' if n_proc > 1 else '  '}: {rec['windows_per_second']:8.1f} windows/s "
              f"(median update {rec['median_update_seconds']:.3f} s; mean {rec['windows_per_second_mean']:.1f} "
              f"windows/s over {rec['timed_updates']} updates)")
    print(f"  ratio 2 processes / 1 process: {ratio:.2f}× (ceiling 2× with 2 idle cores; this process may use "
          f"{cores} of {os.cpu_count()} CPUs; load average before {load_before}, after {load_after})")
    out["ddp"] = {"workload": {**work, "model": "demo (thermosyphon + recurrent leaky, hidden 18)",
                               "threads_per_process": 1, "launches_per_variant": rounds},
                  "one_process": best[1], "two_processes": best[2], "ratio_2_over_1": ratio,
                  "usable_cores": cores, "cpu_count": os.cpu_count(),
                  "load_average_before": load_before, "load_average_after": load_after,
                  "note": "windows/s from the median update of rank 0 (each update all-reduces the gradients, "
                          "so the processes keep step); start-up, process-group set-up and data generation "
                          "are not timed"}


# -- main -------------------------------------------------------------------------------------------

def machine() -> dict:
    return {"platform": platform.platform(), "processor": platform.processor() or platform.machine(),
            "cpu_count": os.cpu_count(), "python": platform.python_version(), "torch": torch.__version__,
            "threads": torch.get_num_threads(), "load_average": list(os.getloadavg()) if hasattr(os, "getloadavg")
            else None}


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="short workloads, no compilation, no run section")
    p.add_argument("--only", nargs="+", choices=SECTIONS, help="sections to run (default: all)")
    p.add_argument("--repeats", type=int, default=None, help="timed repeats per variant (default 3 quick, 5 full)")
    p.add_argument("--threads", type=int, default=1)
    p.add_argument("--no-compile", dest="compile", action="store_false", help="skip the compiled variants")
    p.add_argument("--run-preset", nargs="+", default=["memory_regime", "tiny"],
                   help="experiment presets for the run section (default: the demo main job, then tiny)")
    p.add_argument("--run-overrides", nargs="*", default=[], help="further overrides of the run section, "
                   "e.g. solver.compile=true")
    p.add_argument("--fit-cases", nargs="+", choices=("demo", "large"), default=("demo", "large"),
                   help="models of the fit section")
    p.add_argument("--json", default="bench.json", help="where to write the results")
    p.add_argument("--memory-child", help=argparse.SUPPRESS)
    p.add_argument("--memory-steps", type=int, default=10, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.memory_child:
        _memory_child(args.memory_child, args.memory_steps)
        return 0
    torch.set_num_threads(args.threads)
    if args.quick:
        args.compile = False
    if args.repeats is None:
        args.repeats = 3 if args.quick else 5
    sections = args.only or [s for s in SECTIONS if not (args.quick and s == "run")]
    out = {"machine": machine(), "mode": "quick" if args.quick else "full", "repeats": args.repeats,
           "compile": args.compile, "note": "ratios are measured side by side in one process (interleaved "
           "repeats, fastest kept); absolute seconds depend on the machine's load"}
    t0 = time.perf_counter()
    print(f"mnemode benchmark ({out['mode']}): torch {torch.__version__}, {args.threads} thread(s), "
          f"{os.cpu_count()} CPUs, load {out['machine']['load_average']}")
    for name in sections:
        globals()[f"bench_{name}"](args, out)
        Path(args.json).write_text(json.dumps(out, indent=2, default=str))
    out["total_seconds"] = time.perf_counter() - t0
    Path(args.json).write_text(json.dumps(out, indent=2, default=str))
    print(f"\nwrote {args.json} ({out['total_seconds']:.0f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
