"""A run directory's config.yaml is data: crafted targets never run.

Crafted configs name ``torch.load`` (of a pickle whose loading would create a marker
file), ``builtins.open`` and ``os.system`` (both creating the marker), in top-level,
nested and list positions and behind Hydra's special keys. ``mnemode assess``,
``export`` and ``resume`` must refuse each with one message and exit code 2, and the
marker must never appear. Behaviour checks of our own format; no outside reference applies.
"""

from __future__ import annotations

import json
import sys
import textwrap
from pathlib import Path

import pytest
import torch
import yaml

from mnemode import cli
from mnemode.config_safety import UnsafeConfig, check_stored_config, user_targets
from mnemode.pipeline import compose_config
from mnemode.rundir import RunDir


class _Payload:
    """Pickled into a file: unpickling it would create the marker file."""

    def __init__(self, marker: Path):
        self.marker = marker

    def __reduce__(self):
        return (Path.touch, (self.marker,))


@pytest.fixture
def stored(tmp_path):
    """A mnemode-written run directory (config, provenance, status), and a marker path."""
    cfg = compose_config(["experiment=tiny", "progress=false"])
    run = RunDir(tmp_path / "run")
    run.start(cfg, resume=False, command="fit")
    run.mark("fit:memory")
    run.finish("failed")
    marker = tmp_path / "MARKER"
    evil = tmp_path / "evil.pt"
    torch.save(_Payload(marker), evil)
    return run, marker, evil


def _rewrite(run: RunDir, edit) -> None:
    tree = yaml.safe_load(run.config_path.read_text())
    edit(tree)
    run.config_path.write_text(yaml.safe_dump(tree))


def _payloads(marker: Path, evil: Path) -> dict:
    return {
        "torch.load": {"_target_": "torch.load", "f": str(evil), "weights_only": False},
        "builtins.open": {"_target_": "builtins.open", "file": str(marker), "mode": "w"},
        "os.system": {"_target_": "os.system", "command": f"touch {marker}"},
    }


def test_a_mnemode_written_config_loads(stored):
    run, marker, _ = stored
    cfg = run.load_config()
    assert cfg.system._target_ == "mnemode.systems.thermosyphon"
    assert json.loads(run.provenance_path.read_text())["user_targets"] == []


@pytest.mark.parametrize("target", ["torch.load", "builtins.open", "os.system"])
@pytest.mark.parametrize("command", ["assess", "export", "resume"])
def test_crafted_target_never_runs_from_the_command_line(stored, capsys, target, command):
    run, marker, evil = stored
    _rewrite(run, lambda t: t.__setitem__("system", _payloads(marker, evil)[target]))
    with pytest.raises(SystemExit) as info:
        cli.main([command, str(run.path)])
    err = capsys.readouterr().err
    assert info.value.code == 2, err
    assert target in err and "Fix:" in err and "Traceback" not in err
    assert err.count("mnemode: error:") == 1
    assert not marker.exists()


# where a payload can hide, and the tricks around it
PLACES = {
    "nested": lambda t, p: t["closure"].__setitem__("inner", p),
    "list": lambda t, p: t["assess"].__setitem__("hooks", [1, {"deeper": [p]}]),
    "unused_group": lambda t, p: t.__setitem__("export", {**t["export"], "sink": p}),
    "baseline": lambda t, p: t["compare"]["memoryless"].__setitem__("closure", p),
}


@pytest.mark.parametrize("place", sorted(PLACES))
@pytest.mark.parametrize("target", ["torch.load", "builtins.open", "os.system"])
def test_payload_anywhere_in_the_tree_is_refused(stored, place, target):
    run, marker, evil = stored
    _rewrite(run, lambda t: PLACES[place](t, _payloads(marker, evil)[target]))
    with pytest.raises(UnsafeConfig, match=target.replace(".", r"\.")):
        run.load_config()
    assert not marker.exists()


@pytest.mark.parametrize("trick, edit, match", [
    ("args", lambda t, m: t["system"].__setitem__("_args_", [str(m)]), "_args_"),
    ("partial_of_os_system", lambda t, m: t.__setitem__("system", {"_target_": "os.system", "_partial_": True}),
     "os.system"),
    ("recursive_on", lambda t, m: t["system"].__setitem__("_recursive_", True), "_recursive_"),
    ("convert", lambda t, m: t["system"].__setitem__("_convert_", "all"), "_convert_"),
    ("mnemode_path_to_torch_load", lambda t, m: t["system"].__setitem__(
        "_target_", "mnemode.fitting.checkpoint.torch.load"), "torch.serialization"),
    ("mnemode_function_that_writes", lambda t, m: t["system"].__setitem__(
        "_target_", "mnemode.fileio.write_text"), "mnemode.fileio"),
    ("mnemode_module_itself", lambda t, m: t["system"].__setitem__("_target_", "mnemode.fitting.checkpoint"),
     "resolves to"),
    ("interpolation_decode", lambda t, m: t.__setitem__(
        "system", "${oc.decode:'{_target_: os.system, command: touch " + str(m) + "}'}"), "interpolation"),
    ("not_a_path", lambda t, m: t["system"].__setitem__("_target_", "os.system; rm"), "dotted"),
    ("not_a_mapping", lambda t, m: t.clear(), "lacks"),
])
def test_hydra_tricks_are_refused(stored, trick, edit, match):
    run, marker, _ = stored
    if trick == "not_a_mapping":
        run.config_path.write_text("- just\n- a list\n")
        match = "mapping"
    else:
        _rewrite(run, lambda t: edit(t, marker))
    with pytest.raises(UnsafeConfig, match=match):
        run.load_config()
    assert not marker.exists()


def test_forged_provenance_still_cannot_reach_the_standard_library(stored):
    run, marker, evil = stored
    payloads = _payloads(marker, evil)
    run.provenance_path.write_text(json.dumps({"user_targets": sorted(payloads)}))
    for target, node in payloads.items():
        _rewrite(run, lambda t: t.__setitem__("system", node))
        with pytest.raises(UnsafeConfig, match="standard or infrastructure library"):
            run.load_config()
    assert not marker.exists()


@pytest.fixture
def user_package(tmp_path, monkeypatch):
    """A user's physics package on sys.path, with a class and a re-exported foreign function."""
    pkg = tmp_path / "userphys_pkg"
    pkg.mkdir()
    (pkg / "__init__.py").write_text(textwrap.dedent('''
        import os
        import torch
        from os import system as shell  # a foreign function under the user's name

        class Loop(torch.nn.Module):
            def forward(self, t, x):
                return -x
    '''))
    monkeypatch.syspath_prepend(str(tmp_path))
    yield "userphys_pkg"
    sys.modules.pop("userphys_pkg", None)


def test_user_class_recorded_at_creation_is_allowed_and_nothing_else(user_package, tmp_path):
    tree = {"system": {"_target_": "mnemode.systems.custom_system", "state_names": ["X"],
                       "nominal": {"_target_": f"{user_package}.Loop"}}}
    assert user_targets(tree) == [f"{user_package}.Loop"]
    check_stored_config(tree, "config.yaml", allowed_user=[f"{user_package}.Loop"])
    with pytest.raises(UnsafeConfig, match="provenance"):
        check_stored_config(tree, "config.yaml", allowed_user=[])
    tree["system"]["nominal"]["_target_"] = f"{user_package}.shell"
    with pytest.raises(UnsafeConfig, match="not a class defined in the user package"):
        check_stored_config(tree, "config.yaml", allowed_user=[f"{user_package}.shell"])


def test_run_created_with_user_physics_records_it(user_package, tmp_path):
    cfg = compose_config(["experiment=tiny", "system=custom", f"system.nominal._target_={user_package}.Loop",
                          "system.state_names=[X,Y,Z]", "data=file", "data.path=obs.csv"])
    run = RunDir(tmp_path / "userrun")
    run.start(cfg, resume=False, command="fit")
    run.finish("failed")
    assert run.provenance()["user_targets"] == [f"{user_package}.Loop"]
    assert run.load_config().system.nominal._target_ == f"{user_package}.Loop"
