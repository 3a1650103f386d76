"""Trajectory fitting and ridge readouts: learning, data-only and flow-map models, budgets,
TensorBoard logging, divergence, and the ridge solution against scikit-learn.

Outside references: sklearn.linear_model.Ridge (ridge readout), numpy.gradient (mean
derivative of the data), scipy-free textbook checks are in test_recurrent_closures.py.
The learning checks are behaviour checks (the forecast error must fall), with the
thresholds marked as common practice.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from sklearn.linear_model import Ridge

from mnemode.closures import GRUFlowClosure, MLPClosure, RecurrentClosure, ReservoirClosure
from mnemode.errors import ConfigError, DataError, FitDiverged
from mnemode.fitting import FitContext, ReadoutRidgeFit, TrajectoryFit
from mnemode.fitting.readout import drive_hidden, residual_targets
from mnemode.fitting import trajectory as trajectory_module
from mnemode.hybrid import HybridField, HybridFlowMap, simulate, warm_up
from mnemode.solvers import RK4, Adaptive, FlowMap

torch.set_num_threads(1)
DT = 0.02


class Recorder:
    """Stands in for a SummaryWriter: keeps every scalar."""

    def __init__(self):
        self.scalars: dict[str, list[tuple[int, float]]] = {}
        self.flushes = 0

    def add_scalar(self, tag, value, step):
        self.scalars.setdefault(tag, []).append((int(step), float(value)))

    def flush(self):
        self.flushes += 1


@pytest.fixture(scope="module")
def demo(trajectories):
    system, data = trajectories("thermosyphon", {"wall_response_time": 1.0}, n_trajectories=4, duration=30.0,
                                dt=DT, solver_step=0.01, seed=11, spin_up=20.0)
    train, val = data.split_by_trajectory([3, 1])
    return system, train, val


def _small_fit(**kw):
    settings = dict(steps=30, batch_size=8, lr=1e-2, lr_final=1e-3, horizon=0.3, warm_up_grad=0.4,
                    val_every=10, val_windows=16, val_horizon=3.0, checkpoint_every=1000)
    settings.update(kw)
    return TrajectoryFit(**settings)


def test_fit_learns_and_returns_the_best_model(demo):
    system, train, val = demo
    closure = RecurrentClosure(3, hidden_size=3, form="leaky", seed=1)
    model = HybridField(system.nominal, closure, 3).double()
    rec = Recorder()
    fit = _small_fit(readout_init="offset", horizon=1.0, lr=3e-2, lr_final=3e-3)
    out = fit.fit(model, train, val, FitContext(solver=RK4(DT), warm_up=1.0, writer=rec, name="mem"))
    for key in ("train_error", "val_error", "val_validity", "fit_seconds"):
        assert isinstance(out[key], float) and math.isfinite(out[key]), key
    assert out["steps"] == 30 and out["stop_reason"] == "budget"
    # the scaling was set from the data: output offset = mean finite-difference residual (Y and Z
    # gain the wall's heat, whose mean is far from 0 in Z)
    assert closure.scaling.out_offset[2].item() > 5.0
    losses = [v for _, v in rec.scalars["mem/train/loss"]]
    # learning: the forecast loss and the validation error fall by half within 30 steps
    # (common practice for a smoke test; measured: loss 0.06 → 0.004, validation 0.037 → 0.010)
    assert np.mean(losses[-5:]) < 0.5 * np.mean(losses[:5])
    val_err = dict(rec.scalars["mem/val/error"])
    assert min(val_err.values()) < 0.5 * val_err[0]
    # the model returned is the best validated one, and its score is what the fit reports
    assert out["best_step"] in (0, 10, 20, 30)
    medians = rec.scalars["mem/val/validity_median"]
    assert out["val_validity"] == pytest.approx(max(v for _, v in medians))
    # every logged tag belongs to the model's name; the learning rate follows the cosine
    lrs = [v for _, v in rec.scalars["mem/train/lr"]]
    assert lrs[0] == pytest.approx(3e-2) and lrs[-1] < lrs[0] and all(a >= b for a, b in zip(lrs, lrs[1:]))
    assert all(t.startswith("mem/") for t in rec.scalars)


def test_data_only_model_scales_from_the_derivative(demo):
    _, train, val = demo
    closure = RecurrentClosure(3, hidden_size=3, form="tanh")
    model = HybridField(None, closure, 3).double()
    out = _small_fit(steps=4, val_every=2).fit(model, train, val, FitContext(solver=RK4(DT), warm_up=0.5))
    assert math.isfinite(out["val_error"])
    # without physics the target is ẋ itself; reference: numpy.gradient (2nd-order central differences)
    deriv = np.gradient(train.states, DT, axis=0, edge_order=2)[2:-2].reshape(-1, 3)
    np.testing.assert_allclose(closure.scaling.out_offset.numpy(), deriv.mean(0), atol=0.02 * deriv.std(0).max())
    np.testing.assert_allclose(closure.scaling.out_scale.numpy(), deriv.std(0), rtol=0.01)


def test_flow_map_model_with_gru_closure(demo):
    system, train, val = demo
    flow = FlowMap(system.nominal, DT, RK4(DT / 4))
    closure = GRUFlowClosure(3, hidden_size=4)
    model = HybridFlowMap(flow, closure, 3, DT).double()
    rec = Recorder()
    out = _small_fit(steps=20, lr=2e-2, horizon=1.0).fit(model, train, val, FitContext(solver=None, warm_up=1.0,
                                                                                      writer=rec, name="gru"))
    assert math.isfinite(out["train_error"]) and math.isfinite(out["val_error"])
    # scaling from the flow-map residual (x_{n+1} − Ψ0(x_n))/Δt, computed here directly
    x = torch.as_tensor(train.states)
    with torch.no_grad():
        rho = ((x[1:] - flow(x[:-1])) / DT).reshape(-1, 3)
    np.testing.assert_allclose(closure.scaling.out_offset.numpy(), rho.mean(0).numpy(), rtol=1e-9, atol=1e-9)
    val_err = [v for _, v in rec.scalars["gru/val/error"]]
    assert min(val_err[1:]) < val_err[0]  # it learns (slowly: measured 0.0325 → 0.0294 in 20 steps)


def test_memoryless_closure_trains_without_warm_up(demo):
    system, train, val = demo
    model = HybridField(system.nominal, MLPClosure(3, width=8, depth=1), 3).double()
    out = _small_fit(steps=6, val_every=3).fit(model, train, val, FitContext(solver=RK4(DT), warm_up=5.0))
    assert math.isfinite(out["val_error"]) and out["steps"] == 6


def test_reforcing_restarts_x_from_the_data_and_carries_r(demo):
    system, train, _ = demo
    closure = RecurrentClosure(3, hidden_size=2, seed=4).double()
    model = HybridField(system.nominal, closure, 3)
    win = torch.as_tensor(train.states[:41, :2])
    fit = _small_fit()
    solver = RK4(DT)
    with torch.no_grad():
        pred = fit._forecast(model, win, 10, 0, 30, DT, solver, reforce=10)
        r = warm_up(model, win[:11], DT, solver)
        for seg in range(3):
            start = 10 + 10 * seg
            xs, rs = simulate(model, win[start], 10, DT, solver, r0=r, t0=start * DT, return_hidden=True)
            torch.testing.assert_close(pred[10 * seg: 10 * seg + 10], xs[1:], rtol=0, atol=0)
            r = rs[-1]


def test_adaptive_solver_logs_function_evaluations_to_tensorboard(demo, tmp_path):
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator
    from torch.utils.tensorboard import SummaryWriter

    system, train, val = demo
    model = HybridField(system.nominal, RecurrentClosure(3, hidden_size=2), 3).double()
    writer = SummaryWriter(str(tmp_path / "tb"))
    solver = Adaptive("dopri5", rtol=1e-4, atol=1e-6)
    try:
        _small_fit(steps=2, val_every=2, horizon=0.1, val_windows=2, val_horizon=0.2, readout_init="offset").fit(
            model, train, val, FitContext(solver=solver, warm_up=0.1, writer=writer, name="ad"))
    finally:
        writer.close()
    acc = EventAccumulator(str(tmp_path / "tb"), size_guidance={"scalars": 0})
    acc.Reload()
    tags = set(acc.Tags()["scalars"])
    for tag in ("loss", "grad_norm", "lr", "horizon", "nfe"):
        assert f"ad/train/{tag}" in tags
    assert {"ad/val/validity_median", "ad/val/error"} <= tags
    assert [e.step for e in acc.Scalars("ad/train/loss")] == [0, 1]
    assert all(e.value > 0 for e in acc.Scalars("ad/train/nfe"))


def test_units_and_wall_time_budget(demo):
    system, train, val = demo
    rec = Recorder()
    model = HybridField(system.nominal, RecurrentClosure(3, hidden_size=2), 3).double()
    fit = _small_fit(steps=2, unit="lyapunov", horizon=0.25, val_every=2, val_horizon=1.0)
    with pytest.raises(ConfigError, match="Lyapunov time is unknown"):
        fit.fit(model, train, val, FitContext(solver=RK4(DT), warm_up=0.5))
    fit.fit(model, train, val, FitContext(solver=RK4(DT), warm_up=0.5, lyapunov_time=2.0, writer=rec, name="u"))
    assert [v for _, v in rec.scalars["u/train/horizon"]] == pytest.approx([0.5, 0.5])

    model = HybridField(system.nominal, RecurrentClosure(3, hidden_size=2), 3).double()
    rec = Recorder()
    out = _small_fit(steps=30, val_every=1, val_windows=4, patience=2, horizon=0.1, readout_init="offset").fit(
        model, train, val, FitContext(solver=RK4(DT), warm_up=0.5, writer=rec, name="p"))
    # early stop: two validations in a row without a better median (then mean) validity time
    scores = [(m, a) for (_, m), (_, a) in zip(rec.scalars["p/val/validity_median"],
                                               rec.scalars["p/val/validity_mean"])]
    assert out["stop_reason"] == "early_stop" and out["steps"] < 30
    assert max(scores[:-2]) >= max(scores[-2:]) and len(scores) == out["steps"] + 1

    model = HybridField(system.nominal, RecurrentClosure(3, hidden_size=2), 3).double()
    out = _small_fit(steps=None, max_seconds=1.5, val_every=1000).fit(
        model, train, val, FitContext(solver=RK4(DT), warm_up=0.5))
    assert out["stop_reason"] == "time" and 1.5 <= out["fit_seconds"] < 30


def test_divergence_and_bad_settings_raise_clear_errors(demo):
    system, train, val = demo
    model = HybridField(system.nominal, RecurrentClosure(3, hidden_size=2), 3).double()
    with pytest.raises(FitDiverged, match=r"after 3 recoveries.*fit\.lr="):
        _small_fit(steps=20, lr=1e4, lr_final=1e4, clip=1e12, horizon=2.0).fit(
            model, train, val, FitContext(solver=RK4(DT), warm_up=0.5))
    with pytest.raises(ConfigError, match="no budget"):
        TrajectoryFit(steps=None, max_seconds=None)
    with pytest.raises(ConfigError, match="fit.unit"):
        TrajectoryFit(unit="hours")
    with pytest.raises(ConfigError, match="warm_up"):
        _small_fit().fit(HybridField(system.nominal, RecurrentClosure(3, initial_hidden="warm_up"), 3).double(),
                         train, val, FitContext(solver=RK4(DT), warm_up=0.0))
    with pytest.raises(ConfigError, match="trainable"):
        _small_fit().fit(HybridField(system.nominal, None, 3), train, val, FitContext())
    with pytest.raises(DataError, match="shorter than a warm-up"):
        _small_fit(horizon=100.0).fit(HybridField(system.nominal, RecurrentClosure(3), 3).double(), train, val,
                                      FitContext(solver=RK4(DT), warm_up=1.0))
    with pytest.raises(ConfigError, match="linear readout"):
        ReadoutRidgeFit().fit(HybridField(system.nominal, RecurrentClosure(3, readout="mlp"), 3).double(), train, val,
                           FitContext())


def test_divergence_restores_the_last_good_state_and_lowers_the_rate(demo, tmp_path, monkeypatch):
    # One update is made to diverge (step 3): the fit must return to the state validated at
    # step 2, scale the learning rate by divergence_lr_factor, replay steps 2.. and finish.
    system, train, val = demo
    model = HybridField(system.nominal, RecurrentClosure(3, hidden_size=2), 3).double()
    real_update, calls = TrajectoryFit._update, []

    def update(self, model, params, prob, optimiser, gen, progress, *args):
        calls.append((progress.step, progress.lr_scale))
        if progress.step == 3 and progress.recoveries == 0:
            raise trajectory_module._Diverged("the forecast loss is nan (planted)")
        return real_update(self, model, params, prob, optimiser, gen, progress, *args)

    monkeypatch.setattr(TrajectoryFit, "_update", update)
    fit = _small_fit(steps=6, val_every=2, checkpoint_every=2, divergence_lr_factor=0.5)
    out = fit.fit(model, train, val, FitContext(solver=RK4(DT), warm_up=0.5, checkpoint_dir=tmp_path / "ck"))
    assert out["recoveries"] == 1 and out["steps"] == 6
    assert calls[:5] == [(0, 1.0), (1, 1.0), (2, 1.0), (3, 1.0), (2, 0.5)]
    state = torch.load(tmp_path / "ck" / "state.pt", weights_only=True)
    assert state["counters"]["lr_scale"] == 0.5 and state["counters"]["recoveries"] == 1
    assert all(bool(torch.isfinite(v).all()) for v in state["model"].values() if v.is_floating_point())


def test_readout_ridge_matches_scikit_learn(demo):
    system, train, val = demo
    closure = ReservoirClosure(3, kind="filter_bank")
    model = HybridField(system.nominal, closure, 3).double()
    alpha, warm = 1e-5, 2.0
    ctx = FitContext(solver=RK4(DT), warm_up=warm)
    out = ReadoutRidgeFit(ridge=alpha).fit(model, train, val, ctx)
    assert out["val_error"] < 0.5  # the filter bank explains most of the wall's heat (common practice bound)
    # reference: scikit-learn's Ridge on the same features; an unpenalised intercept equals
    # sklearn's fit_intercept=True, and our per-sample penalty α is sklearn's α·N
    index, inputs, rho = residual_targets(model, train)
    r = drive_hidden(model, train, RK4(DT))
    keep = index >= int(round(warm / DT))
    with torch.no_grad():
        phi = closure.readout_features(inputs[keep], r[index[keep]]).reshape(-1, closure.n_features)
        y = closure.scaling.outputs_inverse(rho[keep]).reshape(-1, 3)
    phi, y = phi.numpy(), y.numpy()
    ref = Ridge(alpha=alpha * len(phi), fit_intercept=True, solver="cholesky").fit(phi[:, :-1], y)
    w = closure.readout_weight.detach().numpy()
    np.testing.assert_allclose(w[:-1], ref.coef_.T, rtol=1e-6, atol=1e-8 * np.abs(ref.coef_).max())
    np.testing.assert_allclose(w[-1], ref.intercept_, rtol=1e-6, atol=1e-8)


def test_readout_ridge_initialises_a_recurrent_closure_for_fine_tuning(demo):
    system, train, val = demo
    closure = RecurrentClosure(3, hidden_size=6, input_init="filter_bank")
    model = HybridField(system.nominal, closure, 3).double()
    ridge_out = ReadoutRidgeFit(ridge=1e-6).fit(model, train, val, FitContext(solver=RK4(DT), warm_up=1.0))
    bank = ReservoirClosure(3, hidden_size=6, kind="filter_bank")
    twin = HybridField(system.nominal, bank, 3).double()
    # the leaky closure's warm-up is solved exactly; RK4 with a tenth of the step drives the reservoir
    # to within ~1e-9 of that (fourth order), so both see the same hidden states
    twin_out = ReadoutRidgeFit(ridge=1e-6).fit(twin, train, val, FitContext(solver=RK4(DT / 10), warm_up=1.0))
    # a leaky closure initialised as a filter bank has the same hidden field as the reservoir, so the
    # ridge readouts explain the residual equally well
    assert ridge_out["val_error"] == pytest.approx(twin_out["val_error"], rel=1e-6)


def test_ridge_start_keeps_the_time_constant_range_whose_validation_forecasts_last_longest(demo):
    system, train, val = demo
    candidates = [[0.1, 0.5], [0.3, 3.0], [1.0, 10.0]]
    ctx = FitContext(solver=RK4(DT), warm_up=3.0)
    settings = dict(ridge=1e-6, val_windows=16, val_horizon=4.0)

    def model(bounds):
        closure = RecurrentClosure(3, hidden_size=6, input_init="filter_bank", coupling=False, time_constants=bounds)
        return HybridField(system.nominal, closure, 3).double()

    chosen = model(candidates)
    out = ReadoutRidgeFit(**settings).fit(chosen, train, val, ctx)
    scores = out["time_constant_scores"]
    assert len(scores) == 3
    # the kept range scores best (median validity; ties are broken by the mean), and the closure carries it
    best = candidates.index(out["time_constants"])
    assert list(scores.values())[best] == max(scores.values())
    np.testing.assert_allclose(chosen.closure.time_constants, candidates[best], rtol=1e-12)
    # the same range given alone yields the very same readout: the choice restores that fit, not a later one
    alone = model(candidates[best])
    ReadoutRidgeFit(**settings).fit(alone, train, val, ctx)
    for (name, a), b in zip(chosen.closure.state_dict().items(), alone.closure.state_dict().values()):
        torch.testing.assert_close(a, b, rtol=0, atol=1e-12, msg=name)


def test_time_constant_candidates_need_a_ridge_choosable_closure():
    with pytest.raises(ConfigError, match="candidate ranges"):
        RecurrentClosure(3, hidden_size=6, form="tanh", time_constants=[[0.1, 1.0], [0.1, 5.0]])
