"""Study summaries and sweep plumbing without running a fit: tables and pooled statistics
from run directories written here, threads per job, the launcher configs and study presets.

Pooled statistics are checked against Python's ``statistics`` module (an implementation
independent of the numpy calls in mnemode.study); thread counts against joblib's own
count of parallel jobs.
"""

from __future__ import annotations

import csv
import json
import statistics

import pytest
import yaml

from mnemode.errors import ConfigError, MnemodeError
from mnemode.study import pooled_points, read_jobs, summarise, swept_parameters
from mnemode.sweep import job_threads


def _quartiles(values):
    # statistics.quantiles(method="inclusive") is the linear interpolation between order
    # statistics that numpy.percentile uses by default (Hyndman & Fan type 7)
    q1, q2, q3 = statistics.quantiles(values, n=4, method="inclusive")
    return q2, q1, q3


def _write_run(path, *, tau, seed, state="finished", error=None, models=None, overrides=True):
    path.mkdir(parents=True)
    cfg = {"name": "s", "seed": seed, "system": {"wall_response_time": tau, "rayleigh": 50.0}}
    (path / "config.yaml").write_text(yaml.safe_dump(cfg))
    status = {"state": state, "stages": {}, "updated": "2026-12-02T10:00:00+0000"}
    if error:
        status["error"] = error
    (path / "status.json").write_text(json.dumps(status))
    if models is not None:
        (path / "metrics.json").write_text(json.dumps({"assessment": {"time_unit": "s", "models": models}}))
    if overrides:
        (path / "overrides.yaml").write_text(yaml.safe_dump(
            {"job": 0, "overrides": ["experiment=tiny", f"system.wall_response_time={tau}", f"seed={seed}"]}))


def _model(times, kl, acf):
    q2, q1, q3 = _quartiles(times)
    return {"validity_time_median": q2, "validity_time_q25": q1, "validity_time_q75": q3,
            "validity_times": times, "kl_invariant": kl, "acf_error": acf}


@pytest.fixture
def sweep(tmp_path):
    root = tmp_path / "sweep"
    runs = {
        "job0": (0.1, 0, [1.0, 2.0, 3.0], 0.30, 0.10),
        "job1": (0.1, 1, [2.0, 4.0, 6.0, 8.0], 0.20, 0.30),
        "job2": (1.0, 0, [5.0, 6.0], 0.05, 0.02),
        "job10": (1.0, 1, [7.0, 9.0, 9.5], 0.07, 0.04),
    }
    for name, (tau, seed, times, kl, acf) in runs.items():
        _write_run(root / name, tau=tau, seed=seed, models={
            "memory": _model(times, kl, acf), "physics_only": _model([0.2, 0.3], 1.0, 0.5)})
    _write_run(root / "job3", tau=3.0, seed=0, state="failed", error="system: τ is bad. Fix: choose another.")
    _write_run(root / "job4", tau=3.0, seed=1, state="running")
    (root / "job5").mkdir()
    (root / "job5" / "mnemode.log").write_text("[2026-12-02 10:00:00,000 ERROR] data: missing file. Fix: x\n")
    (root / ".submitit").mkdir()
    (root / "study_notes").mkdir()  # a folder that is no job is ignored
    return root, runs


def test_table_lists_every_job_with_status_reason_and_metrics(sweep, tmp_path):
    root, runs = sweep
    summary = summarise(root)
    assert summary.parameters == ["system.wall_response_time", "seed"]
    with open(summary.table_csv) as f:
        rows = list(csv.DictReader(f))
    # natural order of job numbers: job10 after job5
    assert [r["job"] for r in rows] == ["job0", "job1", "job2", "job3", "job4", "job5", "job10"]
    by = {r["job"]: r for r in rows}
    for name, (tau, seed, times, kl, acf) in runs.items():
        r = by[name]
        assert r["status"] == "finished" and r["reason"] == ""
        assert float(r["system.wall_response_time"]) == tau and int(r["seed"]) == seed
        assert r["overrides"] == "experiment=tiny"
        assert float(r["memory:validity_time_median"]) == pytest.approx(statistics.median(times))
        assert float(r["memory:kl_invariant"]) == kl and float(r["memory:acf_error"]) == acf
    assert by["job3"]["status"] == "failed" and "τ is bad" in by["job3"]["reason"]
    assert by["job3"]["memory:validity_time_median"] == ""
    assert by["job4"]["status"] == "running" and "mnemode resume" in by["job4"]["reason"]
    assert by["job5"]["status"] == "no run" and by["job5"]["reason"] == "data: missing file. Fix: x"
    md = summary.table_md.read_text()
    assert "## Jobs that did not finish" in md and "`job3` (failed)" in md and "`job5` (no run)" in md
    assert md.count("| job") == 8  # header + 7 rows
    names = sorted(p.name for p in summary.figures)
    assert names == ["acf_error_vs_system.wall_response_time.png", "kl_invariant_vs_system.wall_response_time.png",
                     "validity_time_vs_system.wall_response_time.png"]
    import matplotlib.image

    assert matplotlib.image.imread(summary.figures[0]).shape[0] > 100


def test_seeds_are_pooled_as_documented(sweep):
    root, runs = sweep
    points = pooled_points(read_jobs([root]))
    at = {(p["metric"], p["model"], float(p["value"])): p for p in points}
    for tau, names in ((0.1, ("job0", "job1")), (1.0, ("job2", "job10"))):
        pooled = [t for n in names for t in runs[n][2]]
        centre, low, high = _quartiles(pooled)
        p = at[("validity_time", "memory", tau)]
        assert (p["centre"], p["low"], p["high"]) == pytest.approx((centre, low, high))
        assert p["n_runs"] == 2
        kls = [runs[n][3] for n in names]
        p = at[("kl_invariant", "memory", tau)]
        assert (p["centre"], p["low"], p["high"]) == pytest.approx(_quartiles(kls))
    # failed and unfinished jobs contribute nothing
    assert not [p for p in points if float(p["value"]) == 3.0]
    assert {p["parameter"] for p in points} == {"system.wall_response_time"}  # seeds are pooled, not an axis


def test_runs_without_recorded_overrides_differ_by_their_configs(tmp_path):
    m = {"memory": _model([1.0, 2.0], 0.1, 0.1)}
    _write_run(tmp_path / "a", tau=0.1, seed=0, models=m, overrides=False)
    _write_run(tmp_path / "b", tau=1.0, seed=0, models=m, overrides=False)
    jobs = read_jobs([tmp_path / "a", tmp_path / "b"])
    assert swept_parameters(jobs) == ["system.wall_response_time"]
    assert [j.overrides for j in jobs] == [{"system.wall_response_time": "0.1"}, {"system.wall_response_time": "1.0"}]


def test_summary_is_not_written_over_without_asking(sweep):
    root, _ = sweep
    summarise(root)
    with pytest.raises(MnemodeError, match="already holds a study summary"):
        summarise(root)
    summarise(root, overwrite=True)
    with pytest.raises(MnemodeError, match="holds no mnemode run"):
        summarise(root / "study_notes")


@pytest.mark.parametrize("n_jobs", [1, 2, 3, -1, -2])
def test_threads_per_job_share_the_cores_as_joblib_counts_jobs(n_jobs):
    joblib = pytest.importorskip("joblib")
    cores = joblib.cpu_count()
    launcher = {"_target_": "hydra_plugins.hydra_joblib_launcher.joblib_launcher.JoblibLauncher", "n_jobs": n_jobs}
    n = job_threads(None, launcher, cores=cores)
    parallel = joblib.effective_n_jobs(n_jobs)
    assert n == max(1, cores // parallel)
    assert n * min(parallel, cores) <= cores  # the jobs together never ask for more threads than cores


def test_threads_per_job_explicit_submitit_and_default():
    slurm = {"_target_": "hydra_plugins.hydra_submitit_launcher.submitit_launcher.SlurmLauncher", "cpus_per_task": 3}
    assert job_threads(None, slurm, cores=64) == 3
    assert job_threads(2, slurm, cores=64) == 2
    assert job_threads(None, {"_target_": "hydra._internal.core_plugins.basic_launcher.BasicLauncher"}) is None
    assert job_threads(None, None) is None
    for bad in (0, -1, 1.5, "two"):
        with pytest.raises(ConfigError, match="threads"):
            job_threads(bad, None)


def _compose(overrides):
    from hydra import compose, initialize_config_dir

    from mnemode.configs_path import config_dir

    with initialize_config_dir(config_dir=str(config_dir()), version_base=None):
        return compose(config_name="mnemode", overrides=overrides, return_hydra_config=True)


@pytest.mark.parametrize("name,target,key,value", [
    ("workstation", "hydra_joblib_launcher.joblib_launcher.JoblibLauncher", "n_jobs", -1),
    ("slurm", "hydra_submitit_launcher.submitit_launcher.SlurmLauncher", "cpus_per_task", 2),
    ("slurm_local", "hydra_submitit_launcher.submitit_launcher.LocalLauncher", "cpus_per_task", 1),
])
def test_shipped_launcher_configs_select_hydra_launchers(name, target, key, value):
    pytest.importorskip("hydra_plugins.hydra_joblib_launcher")
    pytest.importorskip("hydra_plugins.hydra_submitit_launcher")
    cfg = _compose([f"hydra/launcher={name}"])
    assert cfg.hydra.launcher._target_.endswith(target)
    assert cfg.hydra.launcher[key] == value
    assert cfg.hydra.callbacks.sweep._target_ == "mnemode.sweep.SweepHooks"


def test_study_presets_sweep_what_they_say():
    from mnemode.pipeline import model_specs

    cfg = _compose(["experiment=study_scale_separation"])
    params = cfg.hydra.sweeper.params
    assert [float(v) for v in params["system.wall_response_time"].split(",")] == [0.01, 0.03, 0.1, 0.3, 1.0, 3.0]
    assert params.seed.split(",") == ["0", "1", "2"]
    assert set(model_specs(cfg)) == {"memory", "memoryless", "data_only"}  # + physics-only and oracle, always
    assert cfg.data.seed == cfg.seed

    cfg = _compose(["experiment=study_scale_separation", "seed=2"])  # every seed its own data
    assert cfg.data.seed == 2 and model_specs(cfg)["memory"].closure.seed == 2
    # the preset adds nothing to the compare group, so swapping it leaves no half-made model
    assert set(model_specs(_compose(["experiment=study_scale_separation", "compare=none"]))) == {"memory"}

    cfg = _compose(["experiment=study_sampling"])
    # Lorenz (1963) parameters: σ = 10, ρ = 28, β = 8/3 (published values)
    assert (cfg.system.sigma, cfg.system.rho, cfg.system.beta) == (10.0, 28.0, pytest.approx(8 / 3))
    dts = [float(v) for v in cfg.hydra.sweeper.params["data.dt"].split(",")]
    assert dts == sorted(dts) and dts[0] <= cfg.data.solver_step and dts[-1] >= 20 * dts[0]
    specs = model_specs(cfg)
    assert {n: (s.form, s.fit._target_.rsplit(".", 1)[1]) for n, s in specs.items()} == {
        "derivative": ("continuous", "DerivativeFit"),
        "flow_map_continuous": ("continuous", "FlowMapFit"),
        "flow_map_discrete": ("discrete", "FlowMapFit"),
    }
    cfg = _compose(["experiment=study_sampling", "seed=1"])
    assert cfg.data.seed == 1 and {s.closure.seed for s in model_specs(cfg).values()} == {1}


def test_a_launcher_without_its_plugin_is_one_clear_error(monkeypatch):
    from mnemode import sweep
    from mnemode.configs_path import config_dir

    shipped = {p.stem for p in (config_dir() / "hydra" / "launcher").glob("*.yaml")}
    assert shipped == {"workstation", "slurm", "slurm_local"} and shipped <= set(sweep._LAUNCHER_PLUGINS)
    sweep.check_launcher(["seed=1", "hydra/launcher=basic"])  # Hydra's own launcher needs no plugin
    monkeypatch.setitem(sweep._LAUNCHER_PLUGINS, "workstation", ("hydra_plugins.not_installed_here", "some-plugin"))
    with pytest.raises(ConfigError, match=r"hydra/launcher=workstation: needs .*some-plugin.*mnemode\[cluster\]"):
        sweep.check_launcher(["hydra/launcher=workstation"])


def test_readme_studies_section_reads_the_sweep_and_checks_round_trip(sweep, tmp_path):
    """scripts/readme_studies.py: the pooled medians it prints are Python's ``statistics`` medians of
    every forecast of every seed, it copies the plot, and --check agrees with what it wrote."""
    import importlib.util
    from pathlib import Path

    script = Path(__file__).resolve().parents[1] / "scripts" / "readme_studies.py"
    spec = importlib.util.spec_from_file_location("readme_studies", script)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    root, runs = sweep
    readme = tmp_path / "README.md"
    readme.write_text("# x\n\n<!-- studies:begin -->\nold\n<!-- studies:end -->\n\ntail\n")
    assert mod.main(["--scale", str(root), "--readme", str(readme)]) == 0
    text = readme.read_text()
    pooled = [t for n in ("job2", "job10") for t in runs[n][2]]
    centre, low, high = _quartiles(pooled)
    assert f"| 1.0 | {centre:.3g} [{low:.3g}, {high:.3g}] |" in text
    assert "4 of 7 jobs finished" in text and "job3 (failed: system: τ is bad" in text
    assert text.endswith("<!-- studies:end -->\n\ntail\n") and "old" not in text
    assert (tmp_path / "docs" / "study_scale_separation.png").exists()
    assert mod.main(["--scale", str(root), "--readme", str(readme), "--check"]) == 0
    readme.write_text(text.replace(f"{centre:.3g}", "99"))
    assert mod.main(["--scale", str(root), "--readme", str(readme), "--check"]) == 1
