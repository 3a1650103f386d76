"""What the assessment claims: censoring lower bounds, a skill score that does not saturate, error
doubling, envelope escapes, settings from config, and no oracle without a truth model."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from torch import nn

from mnemode.assess import AssessSettings, ModelEntry, assess_models, render_report
from mnemode.assess.metrics import error_doubling_time, percentile_is_lower_bound, summarise_validity
from mnemode.assess.stability import Envelope, escape_times, summarise_escapes
from mnemode.data import generate
from mnemode.errors import ConfigError
from mnemode.forecasting import Starts, run_forecasts
from mnemode.hybrid import HybridField
from mnemode.solvers import RK4
from mnemode.systems import Lorenz63Field, custom_system, lorenz63
from mnemode.validity import log_error_skill, rms_scale, validity_times


# -- censoring: which percentiles are lower bounds ---------------------------------------

def test_lower_bound_rule_on_hand_worked_examples():
    # Worked by hand (H = horizon, the censored value; numpy's linear percentile):
    # [1, 2, H, H, H]: median = 3rd value = H -> only a lower bound.
    # [1, 2, 3, H, H]: median = 3 (uncensored)  -> exact; q75 = 4th value = H -> lower bound.
    # [1, 2, H, H]:    median = (2 + H)/2 rests on H -> lower bound.
    # [1, 2, 3, H]:    median = 2.5 exact; q75 at position 2.25 interpolates 3 and H -> lower bound.
    assert percentile_is_lower_bound(5, 3, 0.5)
    assert not percentile_is_lower_bound(5, 2, 0.5) and percentile_is_lower_bound(5, 2, 0.75)
    assert percentile_is_lower_bound(4, 2, 0.5)
    assert not percentile_is_lower_bound(4, 1, 0.5) and percentile_is_lower_bound(4, 1, 0.75)
    assert not percentile_is_lower_bound(7, 0, 0.5)


def test_lower_bound_rule_agrees_with_numpy_when_censored_values_are_raised():
    # Reference: numpy.percentile itself. A percentile is a lower bound exactly when raising the
    # censored values (the true times are longer than the horizon) raises it.
    rng = np.random.default_rng(0)
    for _ in range(400):
        n = int(rng.integers(1, 30))
        c = int(rng.integers(0, n + 1))
        q = float(rng.choice([0.25, 0.5, 0.75, rng.uniform()]))
        horizon = 10.0
        times = np.concatenate([np.sort(rng.uniform(0, horizon * 0.99, n - c)), np.full(c, horizon)])
        raised = np.where(np.arange(n) >= n - c, horizon + 5.0, times)
        moved = np.percentile(raised, 100 * q) > np.percentile(times, 100 * q) + 1e-12
        assert percentile_is_lower_bound(n, c, q) == moved, (n, c, q)


def test_summary_flags_a_mostly_censored_median():
    times = np.array([1.0, 2.0, 20.0, 20.0, 20.0])
    s = summarise_validity(times, times >= 20.0, lyapunov_exponent=0.5, predictability_time=4.0)
    assert s["validity_time_median"] == 20.0 and s["validity_time_median_lower_bound"] is True
    assert s["validity_time_q25_lower_bound"] is False
    assert s["validity_time_median_predictability"] == pytest.approx(5.0)


# -- a validation score that keeps ranking past the horizon ---------------------------------

def _exponential_forecasts(t_valid, lam, horizon, dt, gamma=0.5):
    """Truth on the unit circle, forecast error γ·exp(λ(t − T_v)) along one axis (in units of the scale)."""
    t = np.arange(int(round(horizon / dt)) + 1) * dt
    truth = np.stack([np.sin(t), np.cos(t)], -1)[:, None, :].repeat(len(t_valid), 1)
    scale = rms_scale(truth)
    err = gamma * np.exp(lam * (t[:, None] - np.asarray(t_valid)[None, :]))
    fc = truth.copy()
    fc[..., 0] += err * scale
    return fc, truth, scale


def test_log_error_skill_matches_its_closed_form_and_ranks_censored_forecasts():
    lam, horizon, dt, gamma = 1.3, 4.0, 1e-3, 0.5
    for t_valid in (2.0, 3.0, 6.0, 9.0):
        fc, truth, scale = _exponential_forecasts([t_valid], lam, horizon, dt, gamma)
        got = log_error_skill(fc, truth, gamma, scale)
        # Closed form of the time average of max(λ(T_v − t), 0) over [0, H] (elementary integral):
        # λ T_v² / (2H) for T_v ≤ H, λ (T_v − H/2) for T_v > H.
        exact = lam * t_valid ** 2 / (2 * horizon) if t_valid <= horizon else lam * (t_valid - horizon / 2)
        assert got == pytest.approx(exact, rel=2e-3)
    # Both censored (validity times both read H), yet the longer-lived forecast scores higher.
    a, truth, scale = _exponential_forecasts([6.0], lam, horizon, dt)
    b, _, _ = _exponential_forecasts([9.0], lam, horizon, dt)
    assert validity_times(a, truth, dt, gamma, scale)[1].all() and validity_times(b, truth, dt, gamma, scale)[1].all()
    assert log_error_skill(b, truth, gamma, scale) > log_error_skill(a, truth, gamma, scale)
    # A blown-up forecast adds nothing.
    bad = a.copy()
    bad[1:] = np.nan
    assert log_error_skill(bad, truth, gamma, scale) == 0.0


def test_error_doubling_time_of_exponential_growth():
    # e(t) = e0·exp(λt) doubles every ln 2 / λ (closed form).
    lam, dt = 0.9, 0.01
    t = np.arange(3000) * dt
    curve = 1e-4 * np.exp(lam * t)
    assert error_doubling_time(curve, dt, 0.5) == pytest.approx(math.log(2) / lam, rel=1e-6)
    assert error_doubling_time(curve[:500], dt, 0.5) is None      # never reaches γ in the window


# -- leaving the training envelope --------------------------------------------------------

class LinearField(nn.Module):
    """dx/dt = A x."""

    def __init__(self, a):
        super().__init__()
        self.register_buffer("a", torch.as_tensor(a, dtype=torch.float64))
        self.dim = self.a.shape[0]

    def forward(self, t, x, u=None):
        return x @ self.a.T


def test_escape_time_of_an_exponentially_diverging_run():
    # x' = a x from x0 leaves [−2, 2] when x0·e^{at} = 2, t* = ln(2/x0)/a (closed form); the first
    # sample outside lies within one interval after t*.
    a, dt = 0.7, 0.01
    x0 = np.array([1.0, 0.5, 1.5])
    model = HybridField(LinearField([[a]]), None, 1)
    states = np.zeros((3, 3, 1))
    states[-1, :, 0] = x0
    out = run_forecasts(model, RK4(dt), states, Starts(np.arange(3), np.full(3, 2)), 0, 600, dt)
    times, escaped = escape_times(out.states, Envelope.from_ranges([-2.0], [2.0], 0.0, "given"), dt)
    exact = np.log(2.0 / x0) / a
    assert escaped.all()
    assert np.all(times >= exact - 1e-9) and np.all(times <= exact + dt + 1e-9)
    # A rotation (harmonic oscillator, |x| conserved) never leaves the circle's box.
    rot = HybridField(LinearField([[0.0, 1.0], [-1.0, 0.0]]), None, 2)
    states = np.zeros((1, 2, 2))
    states[0] = [[1.0, 0.0], [0.0, 1.0]]
    out = run_forecasts(rot, RK4(0.01), states, Starts(np.arange(2), np.zeros(2, int)), 0, 1000, 0.05)
    s = summarise_escapes(out.states, Envelope.from_ranges([-1, -1], [1, 1], 0.01, "given"), 0.05)
    assert s["escaped_count"] == 0 and s["escape_times"] == [None, None] and s["outside_fraction"] == 0.0


def test_non_finite_state_counts_as_leaving_and_margin_widens_the_range():
    runs = np.array([[[0.0]], [[1.05]], [[np.nan]]])              # (T=3, N=1, D=1)
    tight = Envelope.from_ranges([0.0], [1.0], 0.0, "x")
    wide = Envelope.from_ranges([0.0], [1.0], 0.1, "x")            # [−0.1, 1.1], the exporter's rule
    assert escape_times(runs, tight, 1.0)[0][0] == 1.0
    assert escape_times(runs, wide, 1.0)[0][0] == 2.0


# -- settings from config -------------------------------------------------------------------

def test_every_assessment_setting_is_in_the_standard_config_with_its_default():
    from mnemode.pipeline import compose_config

    cfg = compose_config()
    group = set(cfg.assess) - {"enabled"}
    assert group == set(AssessSettings.config_keys())
    s = AssessSettings.from_config(cfg)
    default = AssessSettings()
    for key in group:       # one source of truth: the Python defaults are the shipped config's
        assert getattr(s, key) == getattr(default, key), key
    assert s.warm_up == float(cfg.warm_up) and s.seed == int(cfg.seed)


def test_settings_from_config_convert_and_refuse_bad_keys():
    from omegaconf import OmegaConf

    s = AssessSettings.from_config(OmegaConf.create({"assess": {"horizon": 40, "n_starts": "12", "enabled": True},
                                                     "warm_up": 2}))
    assert s.horizon == 40.0 and isinstance(s.horizon, float) and s.n_starts == 12 and s.warm_up == 2.0
    with pytest.raises(ConfigError, match="assess.horizn"):
        AssessSettings.from_config({"assess": {"horizn": 3}})
    with pytest.raises(ConfigError, match="assess.n_starts"):
        AssessSettings.from_config({"assess": {"n_starts": "many"}})
    with pytest.raises(ConfigError, match="assess.envelope_margin"):
        AssessSettings.from_config({"assess": {"envelope_margin": -1}})


def test_assess_command_overrides_are_checked_and_merged():
    from omegaconf import OmegaConf

    from mnemode.cli import _with_assess_overrides

    cfg = OmegaConf.create({"assess": {"horizon": 4.0}, "warm_up": 1.0})
    merged = _with_assess_overrides(cfg, ["assess.horizon=40", "assess.gamma=0.3"])
    assert merged.assess.horizon == 40 and merged.assess.gamma == 0.3 and cfg.assess.horizon == 4.0
    for bad in ("fit.steps=3", "assess.horizn=3", "assess.horizon"):
        with pytest.raises(ConfigError):
            _with_assess_overrides(cfg, [bad])


# -- honesty on file data and on censored results ----------------------------------------------

def test_file_data_report_claims_no_oracle_and_names_the_data_time_unit():
    torch.set_num_threads(1)
    truth = lorenz63()
    test = generate(truth, n_trajectories=2, duration=16.0, dt=0.02, seed=4, solver=RK4(0.01))
    system = custom_system(Lorenz63Field(rho=26.6), ["x", "y", "z"], time_unit="")
    settings = AssessSettings(warm_up=0.5, horizon=12.0, n_starts=6, free_run_length=8.0, free_run_starts=2,
                              transient=1.0, stability_length=10.0, acf_max_lag=1.0, n_bins=20)
    exact = HybridField(Lorenz63Field(rho=28.0), None, 3)        # the true equations as a "model"
    res = assess_models({"exact": ModelEntry(exact, RK4(0.01))}, test, system, settings)
    text = render_report(res)
    assert "oracle" not in res["models"] and res["oracle_noise"] is None
    assert "| oracle |" not in text and "The *oracle*" not in text
    assert res["time_unit"] == "time unit of the data"
    # The exact model outlasts the 12-unit horizon on most starts: a lower bound, and the advice.
    m = res["models"]["exact"]
    assert m["censored_fraction"] > 0.5 and m["validity_time_median_lower_bound"] is True
    assert f"≥ {m['validity_time_median']:.3g}" in text
    assert any(n.startswith("exact:") and "extend the horizon" in n for n in res["notes"])
    assert "escape" in m and m["escape"]["n_runs"] == 2 and res["free_runs"]["stability_length"] == 10.0


@pytest.mark.slow
def test_multiscale_truth_reports_the_observed_variables_predictability_time():
    from mnemode.systems import lorenz96_two_scale

    torch.set_num_threads(1)
    # Two-scale Lorenz-96 with the published ratios b = c = 10 (Lorenz 1996) on a small ring: the
    # fast Y set the largest exponent, so 1/λ is far shorter than the observed X's error growth.
    system = lorenz96_two_scale(k=6, j=6, spin_up=3.0)
    # the horizon must let the oracle's error reach γ (its validity is ≈ 6 time units here)
    test = generate(system, n_trajectories=2, duration=15.0, dt=0.01, seed=2, solver=RK4(0.004))
    s = AssessSettings(warm_up=0.0, horizon=12.0, n_starts=8, free_run_length=3.0, free_run_starts=2,
                       transient=0.5, stability_length=3.0, acf_max_lag=0.5, n_bins=20, truth_step=0.004,
                       lyapunov_duration=6.0)
    res = assess_models({}, test, system, s)
    lam, pred = res["lyapunov_exponent"], res["predictability"]
    assert res["lyapunov_scope"].startswith("full system") and res["lyapunov_source"] == "estimated"
    assert pred is not None and pred["time"] == pytest.approx(pred["doubling_time"] / math.log(2))
    # Rule of thumb (time-scale ratio c = 10): the fast exponent is several times the observed growth rate.
    assert lam * pred["time"] > 3
    oracle = res["models"]["oracle"]
    assert oracle["validity_time_median_predictability"] == pytest.approx(oracle["validity_time_median"] / pred["time"])
    assert any("faster than the observed variables" in n for n in res["notes"])
    text = render_report(res)
    assert "largest exponent of the full system" in text and "predictability times T_p" in text


@pytest.mark.slow
def test_assess_command_with_overrides_reassesses_without_refitting(tmp_path, capsys):
    import json

    from mnemode.cli import main
    from mnemode.pipeline import compose_config, run_pipeline

    torch.set_num_threads(1)
    cfg = compose_config(["compare=none", "closure=random_features", "fit=derivative", "model.name=memoryless",
                          "progress=false", "export.enabled=false", f"runs_root={tmp_path}", "warm_up=0",
                          "data.n_train=3", "data.n_val=1", "data.n_test=1", "data.duration=30",
                          "data.test_duration=30", "assess.n_starts=6", "assess.horizon=4",
                          "assess.free_run_length=20", "assess.stability_length=30", "assess.acf_max_lag=1"])
    run = run_pipeline(cfg, tmp_path / "run")
    before = {p: p.stat().st_mtime_ns for p in (run.path / "models").glob("*.pt")}
    config_text = (run.path / "config.yaml").read_text()
    main(["assess", str(run.path), "assess.horizon=2.5", "assess.n_starts=5", "assess.gamma=0.3"])
    metrics = json.loads((run.path / "metrics.json").read_text())["assessment"]
    assert metrics["horizon"] == 2.5 and metrics["n_starts"] == 5 and metrics["gamma"] == 0.3
    assert {p: p.stat().st_mtime_ns for p in (run.path / "models").glob("*.pt")} == before
    assert (run.path / "config.yaml").read_text() == config_text
    assert "| memoryless |" in capsys.readouterr().out
    with pytest.raises(SystemExit) as exc:
        main(["assess", str(run.path), "fit.steps=3"])
    assert exc.value.code != 0 and "assess.KEY=VALUE" in capsys.readouterr().err
