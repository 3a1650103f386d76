"""Physics that depends on t receives each trajectory's true time, on every continuous-model path.

The system is a driven linear chain with a known missing term::

    dx1/dt = −x1 + A sin(ω t) + c·x2          (nominal: the first two terms)
    dx2/dt =  x1 − x2        − c·x1·x2        (nominal: the first two terms)

Trajectories start at the true times 0, 3.7 and 11.2, are written to a CSV file
with those times, and read back through the file loader, which keeps each piece's
start in ``start_times`` and counts ``times`` from 0. References: the trajectories
and the forecasts are integrated by scipy.integrate.solve_ivp (DOP853, rtol 1e-12);
the missing term is the formula above. Each check is repeated on the same states
with the start times dropped (the physics then sees time since each piece's start)
to show that it fails without the true time.
"""

from __future__ import annotations

import csv
import math

import numpy as np
import pytest
import torch
from scipy.integrate import solve_ivp
from torch import nn

from mnemode.data import TrajectorySet
from mnemode.errors import ConfigError
from mnemode.fitting import FitContext, TrajectoryFit, derivative_targets, flow_map_targets
from mnemode.fitting.readout import residual_targets
from mnemode.fitting.trajectory import _WindowLoss
from mnemode.forecasting import Starts, run_forecasts
from mnemode.hybrid import HybridField, physics_time, simulate
from mnemode.loading import Columns, read_file, segment
from mnemode.solvers import RK4, FlowMap
from mnemode.sources import pack_segments
from mnemode.systems.custom import custom_system

A, OMEGA = 1.5, 1.3
STARTS = (0.0, 3.7, 11.2)
DT, N = 0.02, 301           # 6 time units per trajectory


class CycleField(nn.Module):
    """The nominal field: ``t`` is a float/0-d tensor or one time per state ``(B, 1)``."""

    def forward(self, t, x, u=None):
        drive = A * torch.sin(OMEGA * torch.as_tensor(t, dtype=x.dtype))
        return torch.cat((-x[..., :1] + drive, x[..., :1] - x[..., 1:]), dim=-1)


def missing(x: np.ndarray, c: float) -> np.ndarray:
    return np.stack((c * x[..., 1], -c * x[..., 0] * x[..., 1]), axis=-1)


def truth_rhs(c: float):
    def rhs(t, x):
        return [-x[0] + A * math.sin(OMEGA * t) + c * x[1], x[0] - x[1] - c * x[0] * x[1]]
    return rhs


def observations(tmp_path, c: float) -> TrajectorySet:
    """Three trajectories from the true starts, through a CSV file and the file loader."""
    rows = []
    for k, (t0, x0) in enumerate(zip(STARTS, ([0.5, -0.2], [1.0, 0.3], [-0.7, 0.8]))):
        t = t0 + DT * np.arange(N)
        sol = solve_ivp(truth_rhs(c), (t[0], t[-1]), x0, t_eval=t, method="DOP853", rtol=1e-12, atol=1e-12)
        rows += [[f"run{k}", repr(float(ti)), repr(float(a)), repr(float(b))] for ti, a, b in zip(t, *sol.y)]
    path = tmp_path / f"obs_{c}.csv"
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["run", "time", "x1", "x2"])
        w.writerows(rows)
    raws, names, units, fnames = read_file(path, Columns(time="time", trajectory="run"))
    seg = segment(raws, names=names, units=units, forcing_names=fnames, min_length=10)
    ts = pack_segments(seg.segments, seg.dt, names, units, fnames)
    assert ts.n_trajectories == 3 and ts.times[0] == 0.0
    np.testing.assert_allclose(ts.start_times, STARTS, atol=1e-9)
    return ts


def without_start_times(ts: TrajectorySet) -> TrajectorySet:
    return TrajectorySet(ts.times, ts.states, ts.names, ts.units)


def nominal_forecast(x0: np.ndarray, t0: float, n: int) -> np.ndarray:
    """``(n + 1, 2)``: the nominal field alone from ``x0`` at true time ``t0`` (scipy)."""
    t = t0 + DT * np.arange(n + 1)
    sol = solve_ivp(truth_rhs(0.0), (t[0], t[-1]), x0, t_eval=t, method="DOP853", rtol=1e-12, atol=1e-12)
    return sol.y.T


@pytest.fixture(scope="module")
def corrected(tmp_path_factory):
    return observations(tmp_path_factory.mktemp("true_time"), c=0.4)


@pytest.fixture(scope="module")
def nominal_only(tmp_path_factory):
    return observations(tmp_path_factory.mktemp("true_time_nominal"), c=0.0)


def test_derivative_targets_recover_the_missing_term_at_true_times(corrected):
    inputs, targets = derivative_targets(corrected, CycleField(), "central4")
    m = missing(inputs.numpy(), 0.4)
    # central4 differences at Δt = 0.02 are accurate to ~Δt⁴ (Fornberg 1988): about 4e-7 here
    assert np.max(np.abs(targets.numpy() - m)) < 2e-6
    # the readout's residual targets of a continuous model go the same way
    _, x_r, rho = residual_targets(HybridField(CycleField(), None, 2), corrected)
    np.testing.assert_allclose(rho.reshape(-1, 2).numpy(), targets.numpy(), rtol=0, atol=1e-14)
    # with the physics on each piece's own clock the residual carries A (sin ωt_true − sin ωt_rel)
    _, wrong = derivative_targets(without_start_times(corrected), CycleField(), "central4")
    assert np.max(np.abs(wrong.numpy() - m)) > 0.5


def test_continuous_flow_map_targets_use_true_times(corrected):
    psi0 = FlowMap(CycleField(), DT, RK4(DT / 10))
    x_mid, targets = flow_map_targets(corrected, psi0, continuous=True, true_time=True)
    # midpoint-corrected targets are the missing term at x_mid up to O(Δt²) (module docstring of targets)
    assert np.max(np.abs(targets.numpy() - missing(x_mid.numpy(), 0.4))) < 5e-4      # about 6e-5 here
    _, wrong = flow_map_targets(corrected, psi0, continuous=True, true_time=False)
    assert np.max(np.abs(wrong.numpy() - missing(x_mid.numpy(), 0.4))) > 0.5


def test_physics_only_forecasts_follow_scipy_from_true_start_times(corrected):
    model = HybridField(CycleField(), None, 2)
    starts = Starts(np.array([0, 1, 2, 2]), np.array([40, 120, 7, 200]))
    n = 80
    true_times = corrected.absolute_times()
    out = run_forecasts(model, RK4(0.01), corrected.states, starts, 0, n, DT, times=true_times)
    ref = np.stack([nominal_forecast(corrected.states[s, b], true_times[s, b], n)
                    for b, s in zip(starts.trajectory, starts.index)], axis=1)
    # RK4 with h = 0.01 over 1.6 time units: global error ~h⁴ (Hairer–Nørsett–Wanner II.1), about 3e-10 here
    assert np.max(np.abs(out.states - ref)) < 1e-8
    relative = run_forecasts(model, RK4(0.01), corrected.states, starts, 0, n, DT)
    assert np.max(np.abs(relative.states - ref)) > 0.1

    # simulate directly: per-trajectory origins, and a float32 state keeps its dtype
    x0 = torch.as_tensor(corrected.states[0], dtype=torch.float32)
    x = simulate(model, x0, n, DT, RK4(0.01), time_origin=corrected.start_times)
    assert x.dtype == torch.float32
    ref0 = np.stack([nominal_forecast(corrected.states[0, b], STARTS[b], n) for b in range(3)], axis=1)
    assert np.max(np.abs(x.double().numpy() - ref0)) < 1e-5       # float32 rounding over 80 steps: ~5e-7
    with pytest.raises(ValueError, match="time_origin"):
        simulate(model, x0, 2, DT, RK4(0.01), time_origin=[0.0, 1.0])


def test_trajectory_fit_windows_run_the_physics_on_true_time(nominal_only):
    # data made by the nominal field alone: a physics-only model's window loss is the solver's error only
    model = HybridField(CycleField(), None, 2)
    fit = TrajectoryFit(steps=1, batch_size=8, horizon=1.0, val_horizon=2.0, val_windows=6)
    ctx = FitContext(solver=RK4(0.01), warm_up=0.0)
    gen = torch.Generator().manual_seed(0)
    traj, start = torch.randint(0, 3, (8,), generator=gen), torch.randint(0, N - 51, (8,), generator=gen)

    def losses(data):
        prob = fit._prepare(model, data, None, ctx)
        with torch.no_grad():
            loss = float(_WindowLoss(fit, model, prob)(traj, start, 50))
        return loss, fit._validate(model, prob.val)

    loss, (median_validity, _, val_err) = losses(nominal_only)
    assert loss < 1e-12 and val_err < 1e-12                # ~1e-19: RK4's error of ~3e-10, squared
    assert median_validity == pytest.approx(2.0)        # censored at val_horizon: never left the truth
    wrong_loss, (_, _, wrong_err) = losses(without_start_times(nominal_only))
    assert wrong_loss > 1e-2 and wrong_err > 1e-2          # ~0.4 on each piece's own clock


def test_physics_time_keeps_one_float_for_a_shared_clock():
    assert physics_time(None) is None
    assert physics_time(np.array([2.5, 2.5, 2.5])) == 2.5
    t = physics_time(np.array([0.0, 3.7]), (2,))
    assert tuple(t.shape) == (2, 1) and t.dtype == torch.float64


class ScalarOnlyField(nn.Module):
    """Uses ``math.sin(t)``: works for a scalar t, not for one time per state."""

    def forward(self, t, x, u=None):
        return -x + math.sin(float(t))


def test_a_field_that_cannot_take_per_state_times_is_refused_with_the_fix():
    custom_system(CycleField(), ["x1", "x2"])          # accepted
    with pytest.raises(ConfigError, match=r"torch operations on t"):
        custom_system(ScalarOnlyField(), ["x1", "x2"])
