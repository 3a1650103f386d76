"""The bad-input catalogue: every case ends in one clear message, a failing exit code, no traceback.

Each case runs the ``mnemode`` command in-process (``mnemode.cli.main``, catching
``SystemExit``) and asserts the exit code, that the message names the thing at fault
and a fix exactly once, that no traceback or numpy repr (``np.float64(...)``) reaches
the user, and that no file that existed before changed (SHA-256 of every file in the
sandbox before and after). A few cases run as real subprocesses to show the same end to
end. These are behaviour checks of our own command line; no outside reference applies.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
from pathlib import Path

import pytest

from mnemode import cli
from mnemode.rundir import RunDir

BASE = ["experiment=tiny", "progress=false"]

# (case id, overrides, text the message must contain)
CONFIG_CASES = [
    ("dt_zero", ["data.dt=0"], "data.dt"),
    ("dt_negative", ["data.dt=-0.1"], "data.dt"),
    ("dt_text", ["data.dt=fast"], "data.dt"),
    ("warm_up_negative", ["warm_up=-1"], "warm_up"),
    ("warm_up_longer_than_data", ["warm_up=1000"], "warm_up"),
    ("seed_text", ["seed=abc"], "seed"),
    ("seed_fraction", ["seed=1.5"], "seed"),
    ("seed_negative", ["seed=-3"], "seed"),
    ("n_train_zero", ["data.n_train=0"], "data.n_train"),
    ("n_val_zero", ["data.n_val=0"], "data.n_val"),
    ("n_test_zero", ["data.n_test=0"], "data.n_test"),
    ("n_train_fraction", ["data.n_train=2.5"], "data.n_train"),
    ("duration_zero", ["data.duration=0"], "data.duration"),
    ("test_duration_negative", ["data.test_duration=-5"], "data.test_duration"),
    ("duration_shorter_than_two_samples", ["data.duration=0.01"], "data.duration"),
    ("noise_negative", ["data.noise=-0.1"], "data.noise"),
    ("solver_step_zero", ["data.solver_step=0"], "data.solver_step"),
    ("data_seed_negative", ["data.seed=-1"], "data.seed"),
    ("spin_up_negative", ["data.spin_up=-1"], "data.spin_up"),
    ("gamma_zero", ["assess.gamma=0"], "assess.gamma"),
    ("gamma_negative", ["assess.gamma=-1"], "assess.gamma"),
    ("n_starts_zero", ["assess.n_starts=0"], "assess.n_starts"),
    ("assess_horizon_zero", ["assess.horizon=0"], "assess.horizon"),
    ("assess_horizon_past_test_data", ["assess.horizon=1000"], "data.test_duration"),
    ("n_bins_one", ["assess.n_bins=1"], "assess.n_bins"),
    ("acf_lag_zero", ["assess.acf_max_lag=0"], "assess.acf_max_lag"),
    ("acf_lag_past_test_data", ["assess.acf_max_lag=500"], "assess.acf_max_lag"),
    ("free_run_zero", ["assess.free_run_length=0"], "assess.free_run_length"),
    ("oracle_noise_negative", ["assess.oracle_noise=-1"], "assess.oracle_noise"),
    ("assess_enabled_text", ["assess.enabled=sometimes"], "assess.enabled"),
    ("envelope_margin_negative", ["export.envelope_margin=-0.1"], "export.envelope_margin"),
    ("export_model_unknown", ["export.model=nope"], "export.model"),
    ("fit_lr_negative", ["fit.lr=-1"], "fit.lr"),
    ("fit_steps_zero", ["fit.steps=0"], "fit.steps"),
    ("fit_batch_zero", ["fit.batch_size=0"], "fit.batch_size"),
    ("fit_horizon_reversed", ["fit.horizon=[4,1]"], "fit.horizon"),
    ("fit_horizon_negative", ["fit.horizon=[-1,1]"], "fit.horizon"),
    ("fit_val_horizon_past_data", ["fit.val_horizon=1000"], "fit.val_horizon"),
    ("fit_horizon_past_data", ["fit.horizon=[1,500]"], "fit.horizon"),
    ("fit_curriculum_above_one", ["fit.curriculum=2"], "fit.curriculum"),
    ("fit_unit_unknown", ["fit.unit=days"], "fit.unit"),
    ("fit_checkpoint_every_zero", ["fit.checkpoint_every=0"], "fit.checkpoint_every"),
    ("fit_readout_init_unknown", ["fit.readout_init=magic"], "fit.readout_init"),
    ("compared_fit_bad", ["compare.memoryless.fit.val_fraction=0"], "compare.memoryless.fit.val_fraction"),
    ("dtype_half", ["dtype=float16"], "dtype"),
    ("progress_text", ["progress=maybe"], "progress"),
    ("model_form_unknown", ["model.form=sideways"], "model.form"),
    ("data_source_unknown", ["data.source=bogus"], "data.source"),
    ("solver_step_zero_model", ["solver.step=0"], "solver.step"),
    ("data_file_without_path", ["data=file"], "data.path"),
    ("data_file_bad_split", ["data=file", "data.path=x.csv", "data.split=random"], "data.split"),
    ("data_file_bad_fractions", ["data=file", "data.path=x.csv", "data.split=time",
                                 "data.fractions=[0.8,0.3,0.2]"], "data.fractions"),
    ("overwrite_as_setting", ["overwrite=True"], "--overwrite"),
    ("overwrite_flag_on_fit", ["--overwrite"], "--overwrite"),
    ("unknown_key", ["no_such_setting=1"], "no_such_setting"),
    ("unknown_group_option", ["closure=no_such_closure"], "no_such_closure"),
]


def _hashes(root: Path) -> dict[str, str]:
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*")) if p.is_file()}


def _unchanged(before: dict, after: dict) -> None:
    for name, digest in before.items():
        assert after.get(name) == digest, f"{name} changed or vanished"


def _call(argv, capsys) -> tuple[int, str]:
    with pytest.raises(SystemExit) as info:
        cli.main(argv)
    return info.value.code, capsys.readouterr().err


def _assert_clean_message(err: str, must: str) -> None:
    assert "Traceback" not in err, err
    assert err.count("mnemode: error:") == 1, err
    assert "Fix:" in err and must in err, err
    assert "np.float" not in err and "np.int" not in err, err


@pytest.fixture
def sandbox(tmp_path, monkeypatch):
    """A working folder with a user's own files in it, runs and data cache inside."""
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("MNEMODE_RUNS", str(tmp_path / "runs"))
    monkeypatch.setenv("MNEMODE_CACHE", str(tmp_path / "cache"))
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "config.yaml").write_text("my: own settings\n")
    (mine / "notes.txt").write_text("results I care about\n")
    return tmp_path


@pytest.mark.parametrize("case, overrides, must", CONFIG_CASES, ids=[c[0] for c in CONFIG_CASES])
def test_bad_setting_is_refused_before_any_work(sandbox, capsys, case, overrides, must):
    before = _hashes(sandbox)
    code, err = _call(["fit", *BASE, *overrides], capsys)
    assert code == 2, err
    _assert_clean_message(err, must)
    _unchanged(before, _hashes(sandbox))
    assert not (sandbox / "runs").exists(), "a refused config must leave no run directory behind"


# -- run directories ----------------------------------------------------------------------------

@pytest.fixture(scope="module")
def tiny_data(tmp_path_factory):
    """Tiny data splits of the tiny preset (shared, generated once)."""
    from mnemode import pipeline

    root = tmp_path_factory.mktemp("tiny")
    cfg = pipeline.compose_config([*BASE, "data.n_train=1", "data.n_val=1", "data.n_test=1", "data.duration=6",
                                   "data.test_duration=6", "data.spin_up=5", f"data.cache_dir={root / 'cache'}"])
    system = pipeline.make_system(cfg)
    return cfg, pipeline.prepare_data(cfg, system)


def _made_run(path: Path, tiny_data, state="failed", fitted=("memory",)) -> RunDir:
    """A run directory as `mnemode fit` leaves it, without the fitting: config, status, data, no models."""
    from mnemode import pipeline

    cfg, data = tiny_data
    run = RunDir(path)
    run.start(cfg, resume=False, command="fit")
    pipeline.save_run_data(run, data)
    run.mark("data", stages_requested=["fit", "assess", "export"])
    for name in fitted:
        run.mark(f"fit:{name}")
    run.finish(state)
    return run


RUN_CASES = [
    # (case id, argv with RUN / MINE / FILE placeholders, exit code, text the message must contain)
    ("assess_missing_dir", ["assess", "nowhere"], 2, "nowhere"),
    ("assess_user_folder", ["assess", "MINE"], 2, "config.yaml"),
    ("export_user_folder", ["export", "MINE"], 2, "config.yaml"),
    ("resume_user_folder", ["resume", "MINE"], 2, "holds no mnemode run"),
    ("resume_changes_fit", ["resume", "RUN", "data.dt=0.01"], 2, "changes what was fitted"),
    ("resume_changes_seed", ["resume", "RUN", "seed=3"], 2, "changes what was fitted"),
    ("resume_changes_closure", ["resume", "RUN", "closure.hidden_size=7"], 2, "changes what was fitted"),
    ("resume_unknown_key", ["resume", "RUN", "assess.gama=0.3"], 2, "not a setting of this run"),
    ("resume_bad_value", ["resume", "RUN", "assess.gamma=-1"], 2, "assess.gamma"),
    ("resume_overwrite", ["resume", "RUN", "overwrite=True"], 2, "--overwrite"),
    ("resume_not_key_value", ["resume", "RUN", "gamma"], 2, "key=value"),
    ("export_unknown_model", ["export", "RUN", "--model", "nope"], 2, "export.model"),
    ("assess_deleted_model", ["assess", "RUN"], 2, "deleted or moved"),
    ("fit_into_user_folder", ["fit", *BASE, "hydra.run.dir=MINE"], 2, "not a mnemode run"),
    ("fit_into_existing_run", ["fit", *BASE, "hydra.run.dir=RUN"], 2, "already holds a run"),
    ("fit_into_a_file", ["fit", *BASE, "hydra.run.dir=FILE"], 2, "is a file"),
    ("fit_under_a_file", ["fit", *BASE, "hydra.run.dir=FILE/sub"], 2, "cannot be created"),
    ("unknown_command", ["frobnicate"], 2, "frobnicate"),
]


@pytest.mark.parametrize("case, argv, code, must", RUN_CASES, ids=[c[0] for c in RUN_CASES])
def test_bad_run_directory_use_is_refused(sandbox, capsys, tiny_data, case, argv, code, must):
    run = _made_run(sandbox / "run", tiny_data)
    (sandbox / "afile").write_text("a user's file\n")
    subs = {"RUN": str(run.path), "MINE": str(sandbox / "mine"), "FILE": str(sandbox / "afile")}
    argv = [a.replace("RUN", subs["RUN"]).replace("MINE", subs["MINE"]).replace("FILE", subs["FILE"])
            if not a.startswith("experiment") else a for a in argv]
    before = _hashes(sandbox)
    mine_before = sorted(p.name for p in (sandbox / "mine").iterdir())
    got, err = _call(argv, capsys)
    assert got == code, err
    if case == "unknown_command":
        assert "Traceback" not in err and "Fix:" in err and must in err
    else:
        _assert_clean_message(err, must)
    _unchanged(before, _hashes(sandbox))
    assert sorted(p.name for p in (sandbox / "mine").iterdir()) == mine_before, "nothing added to a user's folder"
    if case == "assess_deleted_model":
        assert "mnemode resume" not in err  # a resume skips a finished run: not the fix


def test_read_only_parent_is_refused(sandbox, capsys):
    if os.geteuid() == 0:
        pytest.skip("root writes anywhere: a read-only folder cannot be simulated")
    locked = sandbox / "locked"
    locked.mkdir()
    locked.chmod(0o555)
    try:
        code, err = _call(["fit", *BASE, f"hydra.run.dir={locked / 'run'}"], capsys)
    finally:
        locked.chmod(0o755)
    assert code == 2
    _assert_clean_message(err, "not writable")


def test_missing_data_file_leaves_a_retryable_run_directory(sandbox, capsys):
    argv = ["fit", *BASE, "data=file", "data.path=missing.csv", "hydra.run.dir=attempt"]
    code, err = _call(argv, capsys)
    assert code == 2 and "missing.csv" in err and "Traceback" not in err
    assert err.count("mnemode: error:") == 1, err
    assert RunDir(sandbox / "attempt").status()["state"] == "failed"
    # the retry is not refused as "already holds a run": it reaches the data again
    code, err = _call(argv, capsys)
    assert code == 2 and "missing.csv" in err and "already holds a run" not in err


def test_bad_stored_setting_names_the_resume_that_fixes_it(sandbox, tiny_data, capsys):
    run = _made_run(sandbox / "run", tiny_data)
    text = run.config_path.read_text()
    assert "gamma: 0.5" in text
    run.config_path.write_text(text.replace("gamma: 0.5", "gamma: 0.0"))
    before = _hashes(sandbox)
    code, err = _call(["resume", str(run.path)], capsys)
    assert code == 2, err
    _assert_clean_message(err, f"mnemode resume {run.path} assess.gamma=")
    _unchanged(before, _hashes(sandbox))


def test_resume_override_is_accepted_and_recorded(sandbox, tiny_data):
    from omegaconf import OmegaConf

    run = _made_run(sandbox / "run", tiny_data)
    cfg = run.load_config()
    new = cli._resume_config(run, cfg, ["assess.gamma=0.3", "fit.lr=1e-4"])
    assert new.assess.gamma == 0.3 and new.fit.lr == 1e-4
    stored = OmegaConf.load(run.config_path)
    assert stored.assess.gamma == 0.3 and stored.fit.lr == 1e-4 and stored.data.dt == cfg.data.dt
    entry = run.status()["history"][-1]
    assert entry["event"] == "resume overrides"
    assert entry["changes"]["assess.gamma"] == {"from": cfg.assess.gamma, "to": 0.3}


# -- end to end, as a user runs it -----------------------------------------------------------------

def _mnemode(args, cwd):
    env = dict(os.environ, MNEMODE_RUNS=str(cwd / "runs"), OMP_NUM_THREADS="1")
    return subprocess.run([sys.executable, "-m", "mnemode", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=300)


@pytest.mark.slow
@pytest.mark.parametrize("args, must", [
    (["fit", *BASE, "data.dt=0"], "data.dt"),
    (["run", *BASE, "seed=abc"], "seed"),
    (["run", *BASE, "overwrite=True"], "--overwrite"),
], ids=["dt_zero", "seed_text", "overwrite_setting"])
def test_subprocess_shows_one_message_and_no_traceback(tmp_path, args, must):
    r = _mnemode(args, tmp_path)
    assert r.returncode == 2, r.stderr
    _assert_clean_message(r.stderr, must)
    assert not (tmp_path / "runs").exists()


# -- physics against data: user modules and units ---------------------------------------------------

@pytest.fixture
def data_file(sandbox, tiny_data):
    """The tiny preset's trajectories as a user's file (three trajectories: train, validation, test)."""
    import dataclasses

    import numpy as np

    _, data = tiny_data
    ts = data.train
    states = np.concatenate([data.train.states, data.val.states, data.test.states], axis=1)
    both = dataclasses.replace(ts, states=states, hidden=None)
    both.save(sandbox / "obs.npz")
    dataclasses.replace(both, states=states * 1e6).save(sandbox / "obs_micro.npz")
    return sandbox


@pytest.fixture
def user_physics(sandbox, monkeypatch):
    """A user's physics package whose field returns the wrong shape."""
    import sys as _sys

    (sandbox / "badphys_pkg.py").write_text(
        "import torch\n"
        "class Summed(torch.nn.Module):\n"
        "    def forward(self, t, x):\n"
        "        return x.sum(-1)          # drops the component axis\n")
    monkeypatch.syspath_prepend(str(sandbox))
    yield "badphys_pkg"
    _sys.modules.pop("badphys_pkg", None)


FILE_RUN = ["compare=none", "progress=false", "data=file", "data.split=trajectory",
            "data.n_train=1", "data.n_val=1", "data.n_test=1", "warm_up=1", "fit.val_horizon=1",
            "fit.horizon=[0.1,0.2]", "assess.horizon=1"]


def test_user_physics_of_the_wrong_shape_is_a_message(data_file, user_physics, capsys):
    before = _hashes(data_file)
    code, err = _call(["fit", *FILE_RUN, "data.path=obs.npz", "system=custom",
                       f"system.nominal._target_={user_physics}.Summed", "system.state_names=[X,Y,Z]",
                       "hydra.run.dir=userrun"], capsys)
    assert code == 2, err
    _assert_clean_message(err, f"{user_physics}.Summed")
    assert "returned (2,)" in err and "shape of x" in err
    _unchanged(before, _hashes(data_file))


def test_data_in_other_units_is_not_blamed_on_the_learning_rate(data_file, capsys):
    before = _hashes(data_file)
    code, err = _call(["fit", *FILE_RUN, "data.path=obs_micro.npz", "hydra.run.dir=microrun"], capsys)
    assert code == 2, err
    _assert_clean_message(err, "units or scaling")
    assert "fit.lr" not in err
    assert not (data_file / "microrun" / "models").exists(), "refused before any fitting"
    _unchanged(before, _hashes(data_file))


@pytest.mark.parametrize("preset", sorted(p.stem for p in (Path(__file__).resolve().parents[1] / "configs"
                                                            / "experiment").glob("*.yaml")))
def test_every_preset_passes_the_whole_config_check(preset):
    # the check must refuse bad values only: every shipped preset is a valid run
    from mnemode.config_check import check_config
    from mnemode.pipeline import compose_config

    check_config(compose_config([f"experiment={preset}"]))
