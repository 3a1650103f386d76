"""Data sources as configured objects, run names, and the sampling-interval advice.

The advice is checked against a closed-form case: dx/dt = −a x + c with nominal
physics f0 = −a x (missing term c). Its solution x(t) = c/a + (x0 − c/a) e^{−at}
gives the finite-difference derivative exactly: the central4 stencil (Fornberg,
Math. Comp. 51 (1988), Table 1) applied to e^{λt} returns λ g(λh) e^{λt} with
g(z) = (8 sinh z − sinh 2z) / (6 z); and the continuous-form flow-map target for a
linear field with a constant missing term is c · sinh(ah/2)/(ah/2) (the residual
c(1 − e^{−ah})/(ah) divided by the half-step propagator e^{−ah/2}).
"""

from __future__ import annotations

import numpy as np
import pytest
from torch import nn

from mnemode.data import TrajectorySet, generate
from mnemode.errors import ConfigError
from mnemode.fitting.sampling_diagnostic import sampling_advice, sampling_report
from mnemode.pipeline import compose_config, prepare_data
from mnemode.resolvers import data_run_name
from mnemode.solvers import RK4
from mnemode.sources import GeneratedSource, _data_key


# -- run names ----------------------------------------------------------------------------------

@pytest.mark.parametrize("overrides, name", [
    ([], "demo"),
    (["data=file", "data.path=/data/tank_run_3.csv"], "tank_run_3"),
    (["data=file", "data.path=obs/boiler_*.csv"], "boiler"),
    (["data=file", "data.train=/x/plant/train.csv", "data.test=/x/plant/test.csv"], "plant"),
    (["data=file", "data.path=/x/plant/obs.csv", "name=mine"], "mine"),
    (["experiment=coarse_sampling"], "coarse_sampling"),
])
def test_run_family_is_named_after_the_data_or_the_preset(overrides, name):
    cfg = compose_config(overrides)
    assert cfg.name == name


def test_run_name_of_a_list_of_files_and_of_nothing():
    assert data_run_name(None, ["plant/a.csv", "plant/b.csv"]) == "a"
    assert data_run_name(None, None) == "observations"


# -- sources -----------------------------------------------------------------------------------

def test_generated_source_is_built_from_its_config_and_matches_generate(tmp_path):
    cfg = compose_config(["data.n_train=2", "data.n_val=1", "data.n_test=1", "data.duration=2",
                          "data.test_duration=2", f"data.cache_dir={tmp_path}", "progress=false"])
    from mnemode.pipeline import make_system

    system = make_system(cfg)
    data = prepare_data(cfg, system, check_sampling=False)
    assert (data.train.n_trajectories, data.val.n_trajectories, data.test.n_trajectories) == (2, 1, 1)
    # the same trajectories as the generator called directly with the config's settings
    direct = generate(system, n_trajectories=3, duration=2.0, dt=0.02, seed=0, solver=RK4(0.005))
    np.testing.assert_allclose(data.train.states, direct.states[:, :2], rtol=0, atol=1e-12)
    # the cache is reused on the next call
    assert prepare_data(cfg, system, check_sampling=False).source == data.source


def test_a_data_config_without_a_target_names_the_fix():
    cfg = compose_config(["~data._target_"])
    with pytest.raises(ConfigError, match="data=generated or data=file"):
        prepare_data(cfg, None)


def test_bad_split_option_is_a_config_error(tmp_path):
    cfg = compose_config(["data=file", f"data.path={tmp_path / 'x.csv'}", "data.split=bogus"])
    with pytest.raises(ConfigError, match="data.split"):
        prepare_data(cfg, None)


def test_generated_source_cache_key_ignores_the_run_name(tmp_path):
    a = GeneratedSource(cache_dir=str(tmp_path), run_name="a")
    assert a.run_name == "a"
    k1 = _data_key(compose_config([]))
    k2 = _data_key(compose_config(["data.run_name=other"]))
    assert k1 == k2


# -- sampling advice ---------------------------------------------------------------------------

class _Decay(nn.Module):
    def __init__(self, a):
        super().__init__()
        self.a = a

    def forward(self, t, x, u=None):
        return -self.a * x


def _closed_form_set(a, c, h, n=200, x0=(3.0, -1.0)):
    t = np.arange(n) * h
    x = np.stack([c / a + (v - c / a) * np.exp(-a * t) for v in x0], axis=1)[..., None]
    return TrajectorySet(t, x, ("x",))


@pytest.mark.parametrize("h", [0.05, 0.4, 2.0])
def test_advice_matches_the_closed_form_decay(h):
    a, c = 1.3, 0.7
    ts = _closed_form_set(a, c, h)
    got = sampling_advice(ts, _Decay(a), psi0_substeps=50)
    lam = -a

    def g(z):
        return (8 * np.sinh(z) - np.sinh(2 * z)) / (6 * z)

    x = ts.states[..., 0]
    rho = lam * g(lam * h) * (x - c / a) + a * x                 # central4 derivative minus f0, exactly
    rho = rho[2:-2]
    q = c * np.sinh(a * h / 2) / (a * h / 2)                    # continuous flow-map target, exactly
    expected = np.sqrt(np.mean((0.5 * (rho[:-1] + rho[1:]) - q) ** 2)) / abs(q)
    assert got["disagreement"] == pytest.approx(expected, rel=1e-4, abs=1e-9)
    # Richardson estimate of the stencil's error at the even samples 4, 6, ...
    xs = x[4:2 * ((len(x) - 4) // 2):2]
    rich = lam * (g(2 * lam * h) - g(lam * h)) * (xs - c / a) / 15
    assert got["fd_error"] == pytest.approx(np.sqrt(np.mean(rich ** 2)) / abs(q), rel=0.05)
    # the fitted gap: ρ is linear in x and q constant, which the features represent, so the two
    # closures differ by ρ(x_mid) − q at the midpoint states x_mid = ½(x_n e^{−ah/2} + x_{n+1} e^{ah/2})
    # (while those lie inside the range of the states the derivative closure was fitted on)
    x_mid = 0.5 * (x[:-1] * np.exp(-a * h / 2) + x[1:] * np.exp(a * h / 2))
    rho_mid = lam * g(lam * h) * (x_mid - c / a) + a * x_mid
    gap = np.sqrt(np.mean((rho_mid - q) ** 2)) / abs(q)
    if h <= 0.4:
        assert got["fitted_gap"] == pytest.approx(gap, rel=0.05, abs=1e-6)
    assert got["targets"] == ("derivative" if got["fitted_gap"] <= 0.1 else "flow_map")
    assert "recommendation:" in sampling_report(got)


def test_advice_flips_between_fine_and_coarse_decay():
    fine = sampling_advice(_closed_form_set(1.3, 0.7, 0.05), _Decay(1.3))
    coarse = sampling_advice(_closed_form_set(1.3, 0.7, 2.0), _Decay(1.3))
    assert (fine["targets"], fine["form"]) == ("derivative", "continuous")
    assert (coarse["targets"], coarse["form"]) == ("flow_map", "discrete")
    assert fine["disagreement"] < coarse["disagreement"]


def test_measurement_noise_does_not_pass_for_a_coarse_interval():
    ts = _closed_form_set(1.3, 0.7, 0.05, n=2000)
    ts.states = ts.states + 0.01 * np.random.default_rng(0).standard_normal(ts.states.shape)
    got = sampling_advice(ts, _Decay(1.3))
    # noise amplified by 1/Δt dominates the raw targets, but averages out of the fitted closures
    assert got["disagreement"] > 0.1 and got["fitted_gap"] < 0.1 and got["targets"] == "derivative"


@pytest.mark.slow
@pytest.mark.parametrize("system, overrides, dt, targets", [
    ("thermosyphon", {}, 0.2, "flow_map"),
    ("thermosyphon", {}, 0.02, "derivative"),
    ("lorenz96", {"nominal_F": 6.0}, 0.01, "derivative"),
    ("lorenz96", {"nominal_F": 6.0}, 0.1, "flow_map"),
])
def test_advice_on_the_demo_and_lorenz96(system, overrides, dt, targets):
    from mnemode import systems

    sysm = getattr(systems, system)(**overrides)
    ts = generate(sysm, n_trajectories=2, duration=200 * dt, dt=dt, solver=RK4(min(dt, 0.005)), seed=0)
    assert sampling_advice(ts, sysm.nominal)["targets"] == targets


@pytest.mark.slow
@pytest.mark.parametrize("dt, warned", [(0.2, True), (0.02, False)])
def test_run_warns_before_a_derivative_fit_at_a_flagged_interval(tmp_path, caplog, dt, warned):
    from mnemode.pipeline import make_system

    cfg = compose_config(["fit=derivative", "closure=random_features", f"data.dt={dt}", "data.n_train=2",
                          "data.n_val=1", "data.n_test=1", f"data.duration={300 * dt}",
                          f"data.test_duration={300 * dt}", f"data.cache_dir={tmp_path}", "progress=false"])
    with caplog.at_level("WARNING", logger="mnemode"):
        prepare_data(cfg, make_system(cfg))
    hits = [r.message for r in caplog.records if "derivative regression" in r.message]
    assert bool(hits) == warned
    if warned:
        assert "fit=flow_map model=discrete" in hits[0] and "Δt = 0.2" in hits[0]


@pytest.mark.slow
def test_the_advised_fit_wins_on_validity_at_coarse_sampling(tmp_path):
    # the demo sampled every 0.2: both memoryless fits side by side in one run, same forecast starts
    from mnemode.fitting.sampling_diagnostic import sampling_advice as advise
    from mnemode.pipeline import make_system, run_pipeline
    from mnemode.sources import run_data

    cfg = compose_config(["closure=random_features", "closure.n_features=200", "fit=flow_map", "model=discrete",
                          "model.name=flow_map", "compare=none",
                          "+closure@compare.derivative.closure=random_features",
                          "+fit@compare.derivative.fit=derivative", "+compare.derivative.form=continuous",
                          "+compare.derivative.physics=true", "compare.derivative.closure.n_features=200", "data.dt=0.2", "data.n_train=3", "data.n_val=1",
                          "data.n_test=2", "data.duration=60", "data.test_duration=40",
                          f"data.cache_dir={tmp_path / 'cache'}", "warm_up=0", "export.enabled=false",
                          "progress=false", "assess.n_starts=10", "assess.horizon=12", "assess.free_run_length=10", "assess.stability_length=0",
                          "assess.acf_max_lag=1"])
    run = run_pipeline(cfg, tmp_path / "run")
    system = make_system(cfg)
    assert advise(run_data(run, cfg, system).train, system.nominal)["fit"] == "flow_map"
    m = {k: v["validity_time_median"] for k, v in run.metrics()["models"].items()}
    assert m["flow_map"] > 2 * m["derivative"]
