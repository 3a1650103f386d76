"""scripts/readme_results.py: README's results section is rebuilt from a run's metrics.json.

Our own file formats; the check is that every number in the table is the run's
own (read back from the Markdown and compared with metrics.json) and that
``--check`` notices a README that drifted.
"""

from __future__ import annotations

import importlib.util
import json
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
spec = importlib.util.spec_from_file_location("readme_results", ROOT / "scripts" / "readme_results.py")
readme_results = importlib.util.module_from_spec(spec)
spec.loader.exec_module(readme_results)

MODELS = {
    "physics_only": dict(validity_time_median=0.22, validity_time_q25=0.2, validity_time_q75=0.26,
                         validity_time_median_lyapunov=0.121, censored_fraction=0.0, kl_invariant=0.159,
                         acf_error=0.21, hidden_size=0),
    "memory": dict(validity_time_median=10.2, validity_time_q25=8.26, validity_time_q75=12.1,
                   validity_time_median_lyapunov=5.61, censored_fraction=0.1, kl_invariant=0.0128,
                   acf_error=0.028, hidden_size=18),
    "memoryless": dict(validity_time_median=3.4, validity_time_q25=2.96, validity_time_q75=5.14,
                       validity_time_median_lyapunov=1.87, censored_fraction=0.0, kl_invariant=0.0079,
                       acf_error=0.031, hidden_size=0),
    "oracle": dict(validity_time_median=13.6, validity_time_q25=12.1, validity_time_q75=16.9,
                   validity_time_median_lyapunov=7.48, censored_fraction=0.3, kl_invariant=0.0166,
                   acf_error=0.029, hidden_size=2),
}


@pytest.fixture
def run_and_readme(tmp_path):
    run = tmp_path / "run"
    (run / "figures").mkdir(parents=True)
    (run / "figures" / "validity_times.png").write_bytes(b"\x89PNG fake")
    metrics = {"fit": {"memory": {"closure": "RecurrentClosure", "fitter": "TrajectoryFit", "steps": 300},
                       "memoryless": {"closure": "RandomFeatureClosure", "fitter": "DerivativeFit"}},
               "assessment": {"models": MODELS, "warm_up": 10.0, "n_starts": 50, "oracle_noise": 1e-4,
                              "floor": {"kl_invariant": 0.0166}, "test_set": {"n_trajectories": 8}}}
    (run / "metrics.json").write_text(json.dumps(metrics))
    (run / "status.json").write_text(json.dumps({"started": "2026-12-02T10:00:00+0000",
                                                 "updated": "2026-12-02T10:05:54+0000"}))
    (run / "config.yaml").write_text("model:\n  name: memory\n")
    readme = tmp_path / "README.md"
    readme.write_text("# x\n\nbefore\n<!-- results:begin -->\nold table 0.0084\n<!-- results:end -->\nafter\n")
    return run, readme


def test_table_carries_the_runs_own_numbers(run_and_readme):
    run, readme = run_and_readme
    assert readme_results.main(["--run-dir", str(run), "--readme", str(readme)]) == 0
    text = readme.read_text()
    assert text.startswith("# x\n\nbefore\n") and text.endswith("<!-- results:end -->\nafter\n")
    assert "old table" not in text and "about 6 minutes" in text
    rows = {r.split("|")[1].strip().split(" ")[0]: [c.strip() for c in r.split("|")[2:-1]]
            for r in text.splitlines() if r.startswith("| ") and not r.startswith("| model")}
    for name, m in MODELS.items():
        med, q, _ = re.match(r"(\S+) \[(\S+), (\S+)\]", rows[name][0]).groups()
        assert float(med) == m["validity_time_median"] and float(q) == m["validity_time_q25"]
        assert float(rows[name][1]) == m["validity_time_median_lyapunov"]
        assert float(rows[name][4]) == m["acf_error"]
    assert rows["oracle"][3] == "= floor 0.0166" and rows["memory"][2] == "10 %"
    # ratios quoted in the text: 10.2 / 0.22 = 46.4, 10.2 / 3.4 = 3.0, 10.2 / 13.6 = 75 %
    assert "46× longer than the physics alone" in text and "3.0× longer" in text and "75 %" in text
    assert (readme.parent / "docs" / "demo_validity_times.png").read_bytes() == b"\x89PNG fake"


def test_check_reports_a_readme_that_drifted(run_and_readme, capsys):
    run, readme = run_and_readme
    assert readme_results.main(["--run-dir", str(run), "--readme", str(readme), "--check"]) == 1
    readme_results.main(["--run-dir", str(run), "--readme", str(readme)])
    assert readme_results.main(["--run-dir", str(run), "--readme", str(readme), "--check"]) == 0
    readme.write_text(readme.read_text().replace("10.2 [", "9.9 ["))
    assert readme_results.main(["--run-dir", str(run), "--readme", str(readme), "--check"]) == 1


def test_the_project_readme_has_the_markers():
    text = (ROOT / "README.md").read_text()
    assert text.count(readme_results.BEGIN) == 1 and text.count(readme_results.END) == 1
