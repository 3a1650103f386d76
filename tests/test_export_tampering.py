"""Crafted exports run no code: pickled entries inside a .pt2 with a matching manifest hash.

The crafted archives are checked to be real threats first: handed straight to
``torch.export.load`` they run their payload (a marker file appears). Then neither
``load_simulator``, ``mnemode rollout`` nor the plain-torch script (in a process where
mnemode cannot be imported) lets the payload run.

Outside references used here: Python's zipfile and pickle (torch.save) to build the
crafted files, hashlib.sha256 to forge the manifest's hash, and torch.export.load itself
as the loader that would run the payload.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import numpy as np
import pytest
import torch

from mnemode.archive import archive_problem
from mnemode.closures.base import Closure
from mnemode.errors import CheckpointError
from mnemode.export import export_simulator
from mnemode.hybrid import HybridField
from mnemode.simulator import load_simulator
from mnemode.solvers import RK4

torch.set_num_threads(1)

ROOT = Path(__file__).resolve().parents[1]
SCRIPT = ROOT / "scripts" / "run_exported_simulator.py"


class LinearDecay(Closure):
    """dx/dt = −a ⊙ x with a learned vector a (a weight entry in the program archive)."""

    def __init__(self, dim: int = 2):
        super().__init__(dim)
        self.a = torch.nn.Parameter(torch.full((dim,), 0.3, dtype=torch.float64))

    def correction(self, x, r=None, u=None):
        return -self.a * x


class Decay(torch.nn.Module):
    def forward(self, t, x, u=None):
        return -0.1 * x


class _Payload:
    """Unpickling this runs ``exec`` on a line that writes the marker file."""

    def __init__(self, marker: Path):
        self.marker = str(marker)

    def __reduce__(self):
        return (exec, (f"import pathlib; pathlib.Path({self.marker!r}).write_text('ran')",))


@pytest.fixture(scope="module")
def clean(tmp_path_factory):
    out = tmp_path_factory.mktemp("clean")
    model = HybridField(Decay(), LinearDecay(2), 2).double()
    export_simulator(model, out, dt=0.1, solver=RK4(0.05), state_names=["a", "b"], state_units=["m", "m"],
                     warm_up_steps=0, envelope={"a": [-1.0, 1.0], "b": [-1.0, 1.0]}, parity_steps=5,
                     check_float32=False)
    return out


def _rewrite(data: bytes, change) -> bytes:
    """A copy of a zip archive with ``change(name, bytes) -> bytes`` applied to every entry."""
    src = zipfile.ZipFile(io.BytesIO(data))
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=zipfile.ZIP_STORED) as dst:
        for info in src.infolist():
            dst.writestr(info.filename, change(info.filename, src.read(info)))
    return buf.getvalue()


def _pickled_weight(marker: Path):
    def change(name, data):
        if name.endswith("data/weights/model_weights_config.json"):
            cfg = json.loads(data)
            first = next(iter(cfg["config"].values()))
            first["use_pickle"] = True
            return json.dumps(cfg).encode()
        if name.endswith("data/weights/weight_0"):
            buf = io.BytesIO()
            torch.save(_Payload(marker), buf)
            return buf.getvalue()
        return data
    return change


def _pickled_sample_inputs(marker: Path):
    def change(name, data):
        if "data/sample_inputs/" in name:
            buf = io.BytesIO()
            torch.save(_Payload(marker), buf)
            return buf.getvalue()
        return data
    return change


def _craft(clean: Path, dest: Path, how) -> Path:
    """Copy the export and replace simulator.pt2 by a crafted one, with the manifest's hash forged to match."""
    shutil.copytree(clean, dest)
    marker = dest.parent / f"{dest.name}-MARKER"
    crafted = _rewrite((dest / "simulator.pt2").read_bytes(), how(marker))
    (dest / "simulator.pt2").write_bytes(crafted)
    manifest = json.loads((dest / "simulator.json").read_text())
    manifest["files"]["simulator.pt2"] = {"sha256": hashlib.sha256(crafted).hexdigest(), "bytes": len(crafted)}
    manifest["programs"]["step"]["sha256"] = manifest["files"]["simulator.pt2"]["sha256"]
    (dest / "simulator.json").write_text(json.dumps(manifest))
    return marker


CRAFTS = {"pickled weight": _pickled_weight, "pickled sample inputs": _pickled_sample_inputs}


@pytest.mark.parametrize("how", list(CRAFTS))
def test_crafted_archive_is_a_real_threat_for_a_bare_loader(clean, tmp_path, how):
    """Control: torch.export.load alone runs the payload (so the refusals below mean something)."""
    marker = _craft(clean, tmp_path / "crafted", CRAFTS[how])
    try:
        torch.export.load(io.BytesIO((tmp_path / "crafted" / "simulator.pt2").read_bytes()))
    except Exception:
        pass  # the program itself is broken after the payload; what matters is that it ran
    assert marker.exists()


@pytest.mark.parametrize("how", list(CRAFTS))
def test_load_simulator_refuses_crafted_archive_without_running_it(clean, tmp_path, how):
    marker = _craft(clean, tmp_path / "crafted", CRAFTS[how])
    assert archive_problem((tmp_path / "crafted" / "simulator.pt2").read_bytes()) is not None
    with pytest.raises(CheckpointError, match="tampered") as info:
        load_simulator(tmp_path / "crafted")
    assert "torch version" not in str(info.value)
    assert not marker.exists()


def test_rollout_command_refuses_crafted_archive_without_running_it(clean, tmp_path):
    marker = _craft(clean, tmp_path / "crafted", _pickled_weight)
    r = subprocess.run([sys.executable, "-m", "mnemode", "rollout", str(tmp_path / "crafted"), "--x0", "0.1,0.2",
                        "--steps", "3", "--out", str(tmp_path / "out.csv")], cwd=tmp_path, capture_output=True,
                       text=True, timeout=300)
    assert r.returncode != 0 and "tampered" in r.stderr and "Traceback" not in r.stderr
    assert not marker.exists() and not (tmp_path / "out.csv").exists()


_BOOT = r"""
import sys, runpy
sys.path[:0] = SITES
class _Block:
    def find_spec(self, name, path=None, target=None):
        if name == "mnemode" or name.startswith("mnemode."):
            raise ImportError("mnemode is blocked in this process")
        return None
sys.meta_path.insert(0, _Block())
script = sys.argv[1]
sys.argv = sys.argv[1:]
runpy.run_path(script, run_name="__main__")
"""


def run_script_without_mnemode(tmp_path: Path, *args) -> subprocess.CompletedProcess:
    """The plain-torch script in a fresh interpreter that sees torch and numpy but cannot import mnemode."""
    sites = sorted({str(Path(torch.__file__).parents[1]), str(Path(np.__file__).parents[1])})
    script = shutil.copy(SCRIPT, tmp_path / "run_exported_simulator.py")
    return subprocess.run([sys.executable, "-I", "-S", "-c", f"SITES = {sites!r}\n" + _BOOT, str(script),
                           *map(str, args)], cwd=tmp_path, env={"PATH": os.environ.get("PATH", "/usr/bin:/bin")},
                          capture_output=True, text=True, timeout=300)


@pytest.mark.parametrize("how", list(CRAFTS))
def test_plain_torch_script_refuses_crafted_archive_without_running_it(clean, tmp_path, how):
    marker = _craft(clean, tmp_path / "crafted", CRAFTS[how])
    proc = run_script_without_mnemode(tmp_path, tmp_path / "crafted", "--steps", 2, "--x0", "0.1,0.2")
    assert proc.returncode != 0 and "tampered" in proc.stderr, proc.stderr[-2000:]
    assert not marker.exists()
    # the clean export runs in the same setting
    proc = run_script_without_mnemode(tmp_path, clean, "--steps", 2, "--x0", "0.1,0.2")
    assert proc.returncode == 0, proc.stderr[-2000:]


@pytest.mark.slow  # four fresh interpreters importing torch
def test_key_file_checks_the_signature_in_the_command_and_the_script(clean, tmp_path):
    from mnemode.archive import sign

    signed = tmp_path / "signed"
    shutil.copytree(clean, signed)
    key = b"0123456789abcdef0123456789abcdef"
    (signed / "simulator.sig").write_text(sign((signed / "simulator.json").read_bytes(), key))
    (tmp_path / "good.key").write_bytes(key + b"\n")
    (tmp_path / "bad.key").write_bytes(b"fedcba9876543210fedcba9876543210\n")
    for keyfile, ok in (("good.key", True), ("bad.key", False)):
        out = tmp_path / f"{keyfile}.csv"
        r = subprocess.run([sys.executable, "-m", "mnemode", "rollout", str(signed), "--x0", "0.1,0.2", "--steps", "2",
                            "--out", str(out), "--key-file", str(tmp_path / keyfile)], cwd=tmp_path,
                           capture_output=True, text=True, timeout=300)
        assert (r.returncode == 0) == ok, r.stderr[-2000:]
        assert ok or ("tampered" in r.stderr and "Traceback" not in r.stderr)
        proc = run_script_without_mnemode(tmp_path, signed, "--steps", 2, "--x0", "0.1,0.2", "--key-file",
                                          tmp_path / keyfile)
        assert (proc.returncode == 0) == ok, proc.stderr[-2000:]
