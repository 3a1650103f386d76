"""End-to-end assessment on small cases: ranking, files, blow-ups, baselines, bad input."""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch

from mnemode.assess import AssessSettings, ModelEntry, assess_models, metrics_table
from mnemode.closures.base import Closure
from mnemode.data import generate
from mnemode.errors import ConfigError, DataError
from mnemode.hybrid import HybridField, HybridFlowMap
from mnemode.solvers import RK4, FlowMap
from mnemode.systems import Lorenz63Field, custom_system, lorenz63, lorenz96

RHO, NOMINAL_RHO = 28.0, 26.6          # truth at the published ρ, nominal 5 % low
DT = 0.02


class RhoCorrection(Closure):
    """The exact missing term of the perturbed-ρ Lorenz-63 nominal: (ρ − ρ_nominal)·x in dy/dt."""

    def __init__(self, dim: int = 3, delta: float = RHO - NOMINAL_RHO, dtype=torch.float64):
        super().__init__(dim)
        self.register_buffer("delta", torch.tensor(delta, dtype=dtype))

    def correction(self, x, r=None, u=None):
        zero = torch.zeros_like(x[..., 0])
        return torch.stack((zero, self.delta * x[..., 0], zero), dim=-1)


class LaggedRhoCorrection(Closure):
    """Memory closure: the same term computed from a hidden copy of x that relaxes to x (time 0.005)."""

    hidden_size = 1

    def __init__(self, dim: int = 3):
        super().__init__(dim)
        self.rate = torch.nn.Parameter(torch.tensor(200.0, dtype=torch.float64))

    def correction(self, x, r=None, u=None):
        zero = torch.zeros_like(x[..., 0])
        return torch.stack((zero, (RHO - NOMINAL_RHO) * r[..., 0], zero), dim=-1)

    def hidden_field(self, x, r, u=None):
        return self.rate * (x[..., :1] - r)


class Explosive(Closure):
    """A correction that sends the state to infinity within a fraction of a time unit."""

    def __init__(self, dim: int = 3):
        super().__init__(dim)
        self.register_buffer("gain", torch.tensor(10.0, dtype=torch.float64))

    def correction(self, x, r=None, u=None):
        return self.gain * x ** 3


@pytest.fixture(scope="module")
def l63():
    torch.set_num_threads(1)
    system = lorenz63(rho=RHO, nominal_rho=NOMINAL_RHO)
    test = generate(system, n_trajectories=3, duration=24.0, dt=DT, seed=11, solver=RK4(0.01))
    return system, test


def small_settings(**kw) -> AssessSettings:
    base = dict(warm_up=1.0, horizon=4.0, n_starts=9, free_run_length=20.0, free_run_starts=3, transient=1.0,
                stability_length=30.0,
                acf_max_lag=1.0, n_bins=30, truth_step=0.01, seed=3)
    base.update(kw)
    return AssessSettings(**base)


class RecordingWriter:
    """Stands in for a TensorBoard SummaryWriter: records add_figure calls."""

    def __init__(self):
        self.tags = []
        self.scalars = []

    def add_figure(self, tag, figure, global_step=None, close=True):
        assert figure.axes, "an empty figure was logged"
        self.tags.append(tag)

    def add_scalar(self, tag, value, global_step=None):
        self.scalars.append((tag, value, global_step))


def test_small_lorenz63_assessment_end_to_end(l63, tmp_path):
    system, test = l63
    solver = RK4(0.01)
    memory_closure = LaggedRhoCorrection()
    before = {k: v.clone() for k, v in memory_closure.state_dict().items()}
    models = {
        "memoryless": ModelEntry(HybridField(system.nominal, RhoCorrection(), 3), solver),
        "memory": ModelEntry(HybridField(system.nominal, memory_closure, 3), solver),
        "flow_map_physics": ModelEntry(HybridFlowMap(FlowMap(system.nominal, DT, solver), None, 3, DT), None),
        "explosive": ModelEntry(HybridField(system.nominal, Explosive(), 3), solver),
    }
    writer = RecordingWriter()
    res = assess_models(models, test, system, small_settings(), out_dir=tmp_path, writer=writer)

    # Plain JSON, NaN/inf never written (a model that blew up reads null).
    text = json.dumps(res, allow_nan=False)
    assert json.loads(text)["gamma"] == 0.5
    m = res["models"]
    assert list(m)[0] == "physics_only" and "oracle" in m
    for key in ("validity_time_median", "validity_time_q25", "validity_time_q75", "kl_invariant", "acf_error"):
        assert key in m["memoryless"]
    assert res["lyapunov_time"] == pytest.approx(1 / 0.9056)   # Sprott (2003) value carried by the system
    assert res["lyapunov_source"] == "system"

    # Ranking: the oracle (perfect equations, 1e-4 start error) outlasts the nominal physics, and the
    # exact closure recovers most of that skill (common practice for this perturbed-ρ setting).
    v = {k: m[k]["validity_time_median"] for k in m}
    assert v["oracle"] > v["physics_only"]
    assert v["memoryless"] > 1.5 * v["physics_only"]
    assert v["memory"] > 1.5 * v["physics_only"]
    # The same physics as a flow map on the observation grid scores like the vector field.
    assert abs(v["flow_map_physics"] - v["physics_only"]) <= 0.2 * v["physics_only"] + DT
    assert m["oracle"]["validity_time_median_lyapunov"] == pytest.approx(v["oracle"] * 0.9056)

    # The exploding model is a result, not a crash.
    assert m["explosive"]["blew_up"] is True
    assert m["explosive"]["kl_invariant"] is None and m["explosive"]["acf_error"] is None
    assert m["explosive"]["validity_time_median"] < v["physics_only"]
    assert any("explosive blew up" in n for n in res["notes"])
    assert not m["memoryless"]["blew_up"]

    # Long-run statistics: finite and non-negative; the oracle's are the floor run's.
    floor = res["floor"]
    assert floor["source"] == "independent truth run"
    assert 0 <= floor["kl_invariant"] < 1 and 0 <= floor["acf_error"] < 1
    assert m["oracle"]["kl_invariant"] == floor["kl_invariant"]
    # The truth itself stays inside the test data's envelope widened by 10 % (the false-alarm check),
    # while the exploding model leaves it at once.
    assert floor["escape"]["escaped_count"] == 0
    assert m["explosive"]["escape_fraction"] == 1.0 and m["memoryless"]["escape_fraction"] == 0.0
    for name in ("physics_only", "memoryless", "memory"):
        assert np.isfinite(m[name]["kl_invariant"]) and m[name]["kl_invariant"] >= 0
        assert np.isfinite(m[name]["acf_error"]) and m[name]["acf_error"] >= 0

    # Files: five PNG figures, the report with table, figure links, settings and cautions.
    for rel in res["figures"].values():
        png = tmp_path / rel
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert len(res["figures"]) == 5
    report = (tmp_path / "report.md").read_text(encoding="utf-8")
    assert metrics_table(res) in report
    assert "figures/validity_times.png" in report and "## Settings" in report
    assert "training envelope" in report and "safety" in report
    assert "| oracle |" in report and "floor" in report
    assert "### Long-run stability" in report and "| explosive | 3/3 (100 %) |" in report
    assert sorted(writer.tags) == sorted(f"assess/{k}" for k in res["figures"])

    # Assessment only simulates: parameters unchanged, no gradients accumulated.
    after = memory_closure.state_dict()
    assert all(torch.equal(before[k], after[k]) for k in before)
    assert memory_closure.rate.grad is None


def test_no_truth_means_no_oracle_and_a_test_split_floor(l63):
    _, test = l63
    system = custom_system(Lorenz63Field(rho=NOMINAL_RHO), ["x", "y", "z"], time_unit="1")
    res = assess_models({}, test, system, small_settings(n_starts=4))
    assert "oracle" not in res["models"] and res["lyapunov_time"] is None
    assert any("oracle" in n for n in res["notes"])
    assert res["floor"]["source"].startswith("test set")
    assert res["models"]["physics_only"]["validity_time_median_lyapunov"] is None
    assert "| physics_only |" in metrics_table(res)
    json.dumps(res, allow_nan=False)


def test_float32_model_and_missing_solver(l63):
    system, test = l63
    model = HybridField(system.nominal, RhoCorrection(dtype=torch.float32), 3)
    res = assess_models({"memoryless": ModelEntry(model, None)}, test, system,
                        small_settings(n_starts=4, solver=RK4(0.01)))
    assert any("without a solver" in n for n in res["notes"])
    assert res["models"]["memoryless"]["validity_time_median"] > res["models"]["physics_only"]["validity_time_median"]


def test_ring_system_pools_identical_sites():
    torch.set_num_threads(1)
    system = lorenz96(k=6, F=8.0, nominal_F=7.0, spin_up=5.0)
    test = generate(system, n_trajectories=2, duration=12.0, dt=0.05, seed=1, solver=RK4(0.01))
    res = assess_models({}, test, system, small_settings(n_starts=4, lyapunov_duration=10.0, free_run_length=8.0,
                                                         truth_step=0.01))
    assert res["pooled"] is True
    assert len(res["models"]["physics_only"]["kl_per_component"]) == 1
    assert res["lyapunov_source"] == "estimated" and res["lyapunov_exponent"] > 0


def test_bad_input_raises_mnemode_errors(l63):
    system, test = l63
    with pytest.raises(ConfigError, match="assess.horizon"):
        assess_models({}, test, system, small_settings(horizon=-1.0))
    with pytest.raises(DataError, match="too short"):
        assess_models({}, test, system, small_settings(horizon=30.0))
    with pytest.raises(ConfigError, match="reserved"):
        assess_models({"oracle": ModelEntry(HybridField(system.nominal, None, 3), RK4(0.01))}, test, system,
                      small_settings())
    with pytest.raises(ConfigError, match="flow map"):
        fm = HybridFlowMap(FlowMap(system.nominal, 0.05, RK4(0.01)), None, 3, 0.05)
        assess_models({"fm": ModelEntry(fm, None)}, test, system, small_settings())
    with pytest.raises(ConfigError, match="acf_max_lag"):
        assess_models({}, test, system, small_settings(acf_max_lag=100.0))


class Failing(Closure):
    """A correction whose evaluation fails the way a solver does on a blow-up (RuntimeError)."""

    def correction(self, x, r=None, u=None):
        if x.abs().max() > 0:
            raise RuntimeError("step size underflow")
        return torch.zeros_like(x)


def test_solver_failure_is_recorded_not_raised(l63):
    from mnemode.forecasting import choose_starts, run_forecasts

    system, test = l63
    starts = choose_starts(test.n_times, test.n_trajectories, 10, 20, 5)
    assert len(starts) == 5 and np.all(starts.index >= 10) and np.all(starts.index + 20 < test.n_times)
    out = run_forecasts(HybridField(system.nominal, Failing(3), 3), RK4(0.01), test.states, starts, 10, 20, DT)
    assert not out.finite and "underflow" in out.failure
    # Row 0 is the start state itself; the rest is NaN, so the validity time is one interval.
    assert np.array_equal(out.states[0], test.states[starts.index, starts.trajectory])
    assert np.isnan(out.states[1:]).all()
