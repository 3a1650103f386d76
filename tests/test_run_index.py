"""`mnemode runs`: finding runs and sweeps on disk and summarising their state and results.

These exercise mnemode's own file layout (status.json, metrics.json); no outside
reference applies. Run directories are written through :class:`RunDir`, as the
pipeline writes them.
"""

from __future__ import annotations

import json

from omegaconf import OmegaConf

from mnemode.cli import main
from mnemode.rundir import RunDir
from mnemode.run_index import find_runs, runs_table, summarise_run


def _make_run(path, models: dict, *, finished=True, assessed=True, main_model="memory"):
    run = RunDir(path)
    run.start(OmegaConf.create({"model": {"name": main_model}}), resume=False)
    run.mark("data")
    fit = {}
    for name in models:
        fit[name] = {"closure": "SomeClosure", "fitter": "SomeFit"}
        run.mark(f"fit:{name}")
    run.update_metrics(fit=fit)
    if assessed:
        run.update_metrics(models={n: {"validity_time_median": v} for n, v in models.items()},
                           assessment={"time_unit": "seconds", "models": {}})
        run.mark("assess")
    if finished:
        run.finish("finished")
    else:
        run.finish("failed", error="fit diverged")
    return run


def test_runs_and_sweep_jobs_are_found_and_summarised(tmp_path):
    _make_run(tmp_path / "demo" / "2026-01-01_00-00-00", {"memory": 10.2, "memoryless": 3.55})
    _make_run(tmp_path / "demo" / "sweep_x" / "job0", {"memory": 1.5}, assessed=False, finished=False)
    _make_run(tmp_path / "demo" / "sweep_x" / "job1", {"memory": 2.0, "memoryless": 1.0})
    (tmp_path / "data-cache" / "thermo").mkdir(parents=True)           # not a run
    found = find_runs(tmp_path)
    assert [p.relative_to(tmp_path).as_posix() for p in found] == [
        "demo/2026-01-01_00-00-00", "demo/sweep_x/job0", "demo/sweep_x/job1"]
    s = summarise_run(found[0])
    assert s.state == "finished" and s.main_model == "memory"
    assert s.models == ["memory", "memoryless"]
    assert s.validity == {"memory": 10.2, "memoryless": 3.55}
    assert s.stages_done == ["data", "fit:memory", "fit:memoryless", "assess"]
    table = runs_table([summarise_run(p) for p in found], tmp_path)
    lines = table.splitlines()
    assert lines[0].split() == ["run", "state", "stages", "done", "memory", "memoryless"]
    assert lines[2].split() == ["demo/2026-01-01_00-00-00", "finished", "data", "fit", "2/2", "assess",
                                "10.2", "3.55"]
    assert lines[3].split()[:2] == ["demo/sweep_x/job0", "failed"] and lines[3].split()[-2:] == ["–", "–"]
    assert "one time unit: seconds" in table and "job0 failed: fit diverged" in table
    # a sweep folder lists only its own jobs
    assert [p.name for p in find_runs(tmp_path / "demo" / "sweep_x")] == ["job0", "job1"]


def test_runs_command_prints_the_table_and_json(tmp_path, capsys):
    _make_run(tmp_path / "a", {"memory": 4.0})
    main(["runs", str(tmp_path)])
    out = capsys.readouterr().out
    assert out.splitlines()[2].split()[:2] == ["a", "finished"]
    main(["runs", str(tmp_path), "--json"])
    data = json.loads(capsys.readouterr().out)
    assert data[0]["validity_time_median"] == {"memory": 4.0} and data[0]["state"] == "finished"


def test_runs_of_a_missing_folder_is_one_clear_error(tmp_path, capsys):
    try:
        main(["runs", str(tmp_path / "nowhere")])
    except SystemExit as exc:
        assert exc.code == 2
    err = capsys.readouterr().err
    assert "is not a directory" in err and "Fix:" in err
