"""Two identical runs on one machine give identical metrics.json (timing apart).

The first run generates its data and the second reads it from the cache, which is
where runs used to differ (arrays of another memory layout round differently, and
the difference grows through chaotic free runs). Our own pipeline; no outside
reference applies: the check is exact equality of everything but wall times.
"""

from __future__ import annotations

import json

import pytest

from mnemode.pipeline import compose_config, run_pipeline
from mnemode.reproducible import PINNED_ENVIRONMENT, pin_math_library

pytestmark = pytest.mark.slow

SMALL = [
    "experiment=tiny", "compare=none", "progress=false", "export.enabled=false", "warm_up=1.0",
    "data.n_train=2", "data.n_val=1", "data.spin_up=5.0", "data.n_test=1", "data.duration=10", "data.test_duration=10",
    "fit.steps=2", "fit.val_every=2", "fit.checkpoint_every=2", "fit.val_windows=4", "fit.val_horizon=1.0",
    "assess.n_starts=3", "assess.horizon=2.0", "assess.free_run_length=6.0", "assess.acf_max_lag=0.5",
]


def test_two_identical_runs_write_identical_metrics(tmp_path):
    overrides = SMALL + [f"data.cache_dir={tmp_path / 'cache'}"]
    metrics = []
    for k in range(2):
        run = run_pipeline(compose_config(overrides), tmp_path / f"run{k}")
        m = json.loads(run.metrics_path.read_text())
        assert m["timing"]["fit"]["memory"]["fit_seconds"] > 0     # wall times are kept, apart
        metrics.append({key: v for key, v in m.items() if key != "timing"})
    assert metrics[0]["fit"]["memory"]["train_error"] is not None
    assert metrics[0]["models"]["memory"]["kl_invariant"] is not None
    assert metrics[0] == metrics[1]


def test_math_library_pinning_keeps_the_users_own_setting(monkeypatch):
    monkeypatch.setenv("MKL_CBWR", "COMPATIBLE")
    monkeypatch.delenv("MKL_DYNAMIC", raising=False)
    pinned = pin_math_library()
    assert pinned == {"MKL_CBWR": "COMPATIBLE", "MKL_DYNAMIC": PINNED_ENVIRONMENT["MKL_DYNAMIC"]}
