"""Help screens, the config comment reader, lazy public names, and the speed of `mnemode --help`.

The comment reader's keys and values are checked against PyYAML's parse of the
same files (an independent YAML parser); help screens against the config files'
own comments; the speed of `--help` against the import of torch, measured side by
side in subprocesses on the same machine (a ratio, not seconds).
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

import pytest
import yaml

import mnemode
from mnemode.cli import main
from mnemode.command_help import COMMAND_DOCS
from mnemode.config_docs import config_root, read_config_doc

ROOT = Path(__file__).resolve().parents[1]
CONFIG_FILES = sorted(p for p in config_root().rglob("*.yaml"))


def _flatten(d: dict, prefix: str = "") -> dict:
    out = {}
    for k, v in d.items():
        key = f"{prefix}{k}"
        if isinstance(v, dict) and v:
            out[key] = None          # a section: the reader records it with an empty value
            out.update(_flatten(v, key + "."))
        else:
            out[key] = v
    return out


@pytest.mark.parametrize("path", CONFIG_FILES, ids=lambda p: f"{p.parent.name}/{p.name}")
def test_comment_reader_finds_every_key_and_value_pyyaml_finds(path):
    # reference: PyYAML's safe_load of the same file (keys flattened to dotted paths)
    data = yaml.safe_load(path.read_text()) or {}
    data = {k: v for k, v in data.items() if k not in ("defaults", "hydra")}
    expected = _flatten(data)
    doc = read_config_doc(path)
    got = {s.key: s.value for s in doc.settings}
    assert set(got) == set(expected)
    for key, raw in got.items():
        if expected[key] is None and raw == "":
            continue
        if raw == "":                 # an empty mapping/sequence written on following lines
            continue
        assert yaml.safe_load(raw) == expected[key], key


def test_comment_reader_pairs_comments_and_joins_continuation_lines():
    doc = read_config_doc(config_root() / "mnemode.yaml")
    warm = doc.setting("warm_up")
    # the comment spans two lines in the file; both halves belong to warm_up
    assert "driving the hidden state" in warm.comment and "same in fitting and assessment" in warm.comment
    assert ("model", "continuous", "the main model's form: continuous | discrete | data_only") in doc.defaults
    assert read_config_doc(config_root() / "model" / "continuous.yaml").setting("physics").comment.startswith(
        "false = data-only")
    assert ("closure", "recurrent_leaky", "the main model's learnable term") in doc.defaults
    assert doc.description.startswith("mnemode's primary config")


def _help(capsys, *argv) -> str:
    try:
        main(list(argv))
    except SystemExit as exc:        # argparse exits 0 after --help
        assert exc.code in (0, None)
    return capsys.readouterr().out


@pytest.mark.parametrize("command", list(COMMAND_DOCS))
def test_every_help_screen_says_what_the_command_does_and_shows_an_example(capsys, command):
    out = _help(capsys, command, "--help")
    doc = COMMAND_DOCS[command]
    flat = " ".join(out.split())
    assert " ".join(doc.description.split()[:8]) in flat       # what it does
    assert "example:" in out and f"  {doc.example}" in out      # one example
    assert out.lstrip().startswith("usage: mnemode " + command)


def test_config_help_lists_groups_options_and_the_meaning_of_each_option(capsys):
    out = _help(capsys, "run", "--help")
    for group in ("system", "data", "closure", "fit", "model", "solver", "compare", "assess", "export", "experiment"):
        assert f"\n{group}: choose with {group}=OPTION" in out
    # meanings come from the comments in the option files
    for path, key in (("closure/recurrent_leaky.yaml", "input_init"), ("closure/recurrent_leaky.yaml", "coupling"),
                      ("fit/trajectory.yaml", "readout_init"), ("fit/trajectory.yaml", "reforce_every")):
        prefix = path.split("/")[0]
        comment = read_config_doc(config_root() / path).setting(key).comment
        assert comment
        assert f"{prefix}.{key} = " in out and " ".join(comment.split()[:5]) in " ".join(out.split())
    # another option's settings on request
    out = _help(capsys, "run", "--help", "closure=recurrent_tanh")
    assert "settings of closure=recurrent_tanh" in out and "closure.hidden_size = 16" in out
    # generate needs only the system and data groups
    out = _help(capsys, "generate", "--help")
    assert "\nsystem: choose" in out and "\nclosure: choose" not in out


def test_run_directory_help_lists_the_runs_models(capsys, tmp_path):
    import json

    run = tmp_path / "run"
    (run / "models").mkdir(parents=True)
    (run / "config.yaml").write_text("model:\n  name: memory\n")
    (run / "status.json").write_text(json.dumps({"state": "finished", "stages": {}}))
    (run / "metrics.json").write_text(json.dumps({"fit": {
        "memory": {"closure": "RecurrentClosure", "fitter": "TrajectoryFit"},
        "memoryless": {"closure": "RandomFeatureClosure", "fitter": "DerivativeFit"}}}))
    for command in ("assess", "export", "resume"):
        out = _help(capsys, command, str(run), "--help")
        assert "memory (main): RecurrentClosure by TrajectoryFit" in out
        assert "memoryless: RandomFeatureClosure by DerivativeFit" in out
        out = _help(capsys, command, "--help")
        assert f"mnemode {command} RUN_DIR --help" in out


def test_public_names_load_lazily_and_all_are_importable():
    for name in mnemode.__all__:
        assert getattr(mnemode, name) is not None
    from mnemode import simulate
    from mnemode.hybrid import simulate as direct

    assert simulate is direct
    with pytest.raises(AttributeError):
        mnemode.no_such_name  # noqa: B018


def _python(code_or_args: list[str]) -> float:
    t0 = time.perf_counter()
    r = subprocess.run([sys.executable, *code_or_args], capture_output=True, text=True,
                       env=dict(os.environ, OMP_NUM_THREADS="1"))
    assert r.returncode == 0, r.stderr
    return time.perf_counter() - t0


def test_importing_the_command_loads_no_torch():
    r = subprocess.run([sys.executable, "-c", "import sys, mnemode.cli; print('torch' in sys.modules, "
                        "'hydra' in sys.modules)"], capture_output=True, text=True)
    assert r.stdout.split() == ["False", "False"], r.stdout + r.stderr


def test_help_answers_in_well_under_the_time_torch_takes_to_import():
    # Side by side on this machine: the best of three of each, so load spikes cancel.
    torch_import = min(_python(["-c", "import torch"]) for _ in range(3))
    for argv in (["--help"], ["--version"], ["run", "--help"]):
        help_time = min(_python(["-m", "mnemode", *argv]) for _ in range(3))
        assert help_time < 0.5 * torch_import, (argv, help_time, torch_import)
