"""`mnemode correction RUN_DIR` end to end on tiny runs: report, figures, R², no overwriting.

Behaviour checks of our own command (no outside reference applies); each asserts a
concrete file, value or exit status. The numerical checks of the readings are in
test_explain_surrogate.py, test_explain_memory.py and test_explain_lorenz.py.
"""

from __future__ import annotations

import json
import re

import pytest

from mnemode.cli import main

pytestmark = pytest.mark.slow

SMALL = ["data.n_train=2", "data.n_val=1", "data.n_test=1", "data.spin_up=5", "compare=none", "assess.horizon=3"]


def test_correction_command_writes_report_and_figures_and_never_overwrites(small_run, capsys):
    run = small_run(name="lorenz", overrides=[*SMALL, "experiment=lorenz63_perturbed", "data.duration=10",
                                              "data.test_duration=10", "closure.n_features=100"])
    main(["correction", str(run)])
    out = run / "correction" / "memoryless"
    report = (out / "report.md").read_text()
    for figure in ("along_targets.png", "against_targets.png", "partial_dependence.png", "surrogate.png"):
        assert (out / figure).stat().st_size > 1000
        assert f"]({figure})" in report
    r2 = [float(v) for v in re.findall(r"R² = (-?[0-9.]+)", report)]
    assert len(r2) >= 3 and max(r2) > 0.99
    assert "| derivative |" in report and "m_y (in dy/dt) =" in report
    data = json.loads((out / "reading.json").read_text())
    assert data["against_targets"][0]["r2"]["y"] > 0.99
    printed = capsys.readouterr().out
    assert "m_y = " in printed and "report:" in printed

    before = (out / "report.md").read_bytes()
    with pytest.raises(SystemExit) as exc:
        main(["correction", str(run)])
    assert exc.value.code == 2
    assert "--overwrite" in capsys.readouterr().err
    assert (out / "report.md").read_bytes() == before
    main(["correction", str(run), "--overwrite", "--threshold", "0.05"])
    assert json.loads((out / "reading.json").read_text())["settings"]["threshold"] == 0.05

    with pytest.raises(SystemExit) as exc:
        main(["correction", str(run), "--model", "nonesuch"])
    assert exc.value.code == 2 and "nonesuch" in capsys.readouterr().err


def test_correction_of_a_memory_closure_reports_time_constants(small_run):
    run = small_run(name="memory", overrides=[*SMALL, "closure=reservoir_filter_bank", "fit=readout_ridge",
                                              "warm_up=1.0", "data.duration=8", "data.test_duration=8"])
    main(["correction", str(run)])
    out = run / "correction" / "memory"
    report = (out / "report.md").read_text()
    assert "## Memory" in report and "τ = " in report and "| all inputs |" in report
    assert (out / "memory.png").stat().st_size > 1000
    data = json.loads((out / "reading.json").read_text())
    assert len(data["time_constants"]["tau"]) == 18
    assert "scaled flow" in report  # the system's units label the correction
