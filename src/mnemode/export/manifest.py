"""The manifest of an export (``simulator.json``), built from small records rather than one literal."""

from __future__ import annotations

import datetime as _dt
import hashlib
import platform
from typing import Mapping

import numpy as np
import torch

from ..hybrid import HybridFlowMap
from ..simulator import FORMAT_NAME, FORMAT_VERSIONS
from ..solvers import substeps_for
from .checks import ExportRequest
from .programs import Program

__all__ = ["CAUTIONS", "build_manifest", "program_records", "file_records"]

CAUTIONS = [
    "A learned correction is valid only inside its training envelope (the per-component ranges below, "
    "widened by the margin) and for the conditions of its training data (parameters, forcing, sensors, "
    "sampling interval); outside them its output is an extrapolation with no guarantee.",
    "Validate this simulator against independent measurements before any use in control, protection "
    "or safety decisions.",
    "The codes, standards and licensed practice of the application govern its use; this simulator does "
    "not replace them.",
]

ENVELOPE_RULE = ("component i is inside when min_i - margin*(max_i - min_i) <= x_i <= "
                 "max_i + margin*(max_i - min_i)")


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def program_records(programs: list[Program]) -> dict:
    """``{role: {file, kind, sha256, bytes, inputs, output, maps, ...}}`` for every program."""
    return {p.role: {"file": p.file, "kind": p.kind, "sha256": _sha256(p.data), "bytes": len(p.data),
                     "inputs": p.inputs, "output": p.outputs, "maps": p.maps, **p.extra} for p in programs}


def file_records(programs: list[Program]) -> dict:
    """``{file: {sha256, bytes}}``: what the loader checks before reading any program."""
    return {p.file: {"sha256": _sha256(p.data), "bytes": len(p.data)} for p in programs}


def state_record(req: ExportRequest, hidden: int) -> dict:
    dim = len(req.names)
    return {"names": req.names, "units": req.units, "dim": dim, "hidden_size": hidden,
            "hidden_names": [f"r{i + 1}" for i in range(hidden)],
            "layout": f"last axis: x ({dim} observed components, in 'names' order), then r ({hidden} hidden)"}


def forcing_record(req: ExportRequest) -> dict | None:
    """Names, units, interpolation and training envelope of the forcing inputs (``None``: autonomous)."""
    if not req.forced:
        return None
    return {
        "names": req.forcing_names, "units": req.forcing_units, "dim": len(req.forcing_names),
        "interpolation": "piecewise linear between samples at the observation times (as in fitting)",
        "samples": "one per observation time: with a warm-up, the history's times then the forecast's "
                   "(history rows + steps samples); without one, steps + 1 samples from x0",
        "envelope": req.forcing_envelope,
        "time_input": "the programs take t, the time of the interval's start on the rollout's clock; the "
                      "physics and closure are evaluated at t within the interval",
    }


def hidden_init_record(req: ExportRequest, r_init, closure, warm_file: str | None, hidden: int) -> dict:
    w = req.warm_up_steps
    kind = None
    if hidden:
        kind = "zeros" if not bool(r_init.abs().max() > 0) else "learned"
    how = "memoryless: the state is x alone"
    if hidden:
        how = (f"start r from initial_vector, then apply {warm_file} to each consecutive pair of the last "
               f"{w + 1} observations (x_n, x_(n+1)), oldest first"
               + (", with the forcing samples at the same times" if req.forced else "")
               + "; the final r and the last observation give the state [x, r] a forecast starts from")
    return {
        "method": "none" if not hidden else ("warm_up" if w > 0 else "initial_vector"),
        "initial_vector": None if not hidden else r_init[0].double().tolist(),
        "initial_vector_kind": kind,
        "closure_mode": getattr(closure, "initial_hidden_mode", None) if closure is not None else None,
        "warm_up_steps": w,
        "history_length": w + 1,
        "program": warm_file,
        "how": how,
    }


_TIME_DEPENDENCE = {
    "autonomous": "autonomous (the program restarts t at 0 each interval)",
    "timed": ("the physics reads t: the step program takes t (the interval's start on the rollout's clock); "
              "the warm-up program evaluates no physics and takes none"),
    "forced": "the programs take t (the interval's start on the rollout's clock)",
}


def model_record(frozen, solver, substitution, dt: float, forced: bool, kind: str | None = None) -> dict:
    discrete = isinstance(frozen, HybridFlowMap)
    closure = frozen.closure
    physics = frozen.flow_map.field if discrete and frozen.flow_map is not None else getattr(frozen, "physics", None)
    rec = {
        "kind": "discrete" if discrete else "continuous",
        "physics": type(physics).__name__ if physics is not None else None,
        "closure": type(closure).__name__ if closure is not None else None,
        "solver": (repr(frozen.flow_map.solver) if discrete and frozen.flow_map is not None
                   else (repr(solver) if not discrete else None)),
        "solver_substitution": substitution,
        "forcing": "see the top-level 'forcing' entry" if forced else None,
        "time_dependence": _TIME_DEPENDENCE[kind or ("forced" if forced else "autonomous")],
    }
    if kind == "timed":  # format 3; autonomous and forced manifests stay as their formats 1 and 2 wrote them
        rec["step_program"] = "timed"
    if not discrete:
        rec["substeps_per_interval"] = substeps_for(dt, solver.step)
    return rec


def normalisation_record(closure) -> dict:
    return {
        "baked_in": True,
        "note": "inputs and outputs are in physical units; the closure's input and output scaling are "
                "buffers inside the programs (recorded here for information only, do not apply them)",
        "closure_scaling": _closure_scaling(closure) if closure is not None else None,
    }


def envelope_record(req: ExportRequest, hidden_range) -> dict:
    rec = {"components": req.envelope, "default_margin": req.margin, "rule": ENVELOPE_RULE}
    if req.forced:
        rec["forcing"] = req.forcing_envelope
    if hidden_range is not None:
        rec["hidden"] = hidden_range
        rec["hidden_note"] = ("per hidden component [min, max] over the export's check runs (free runs from "
                              "the training envelope); the guard widens it by the margin like the others")
    return rec


def _closure_scaling(closure) -> dict | None:
    sc = getattr(closure, "scaling", None)
    if sc is None:
        return None
    out = {}
    for name in ("in_mean", "in_std", "out_offset", "out_scale"):
        buf = getattr(sc, name, None)
        if isinstance(buf, torch.Tensor):
            out[name] = buf.detach().double().flatten().tolist()
    return out or None


def versions(onnx: bool) -> dict:
    from ..version import __version__

    v = {"mnemode": __version__, "torch": torch.__version__, "numpy": np.__version__,
         "python": platform.python_version()}
    if onnx:
        for pkg in ("onnx", "onnxscript", "onnxruntime"):
            try:
                v[pkg] = __import__(pkg).__version__
            except ImportError:
                v[pkg] = None
    return v


def build_manifest(req: ExportRequest, *, frozen, solver, substitution, r_init, programs: list[Program],
                   parity: dict, onnx_rec: dict | None, hidden_range, metrics: Mapping | None,
                   config: Mapping | None, time_unit: str, compiled_rec: dict | None = None) -> dict:
    """The manifest: one record per concern, then the caller's extra keys."""
    hidden = frozen.hidden_size
    warm = next((p.file for p in programs if p.role == "warm_up"), None)
    manifest = {
        "format": FORMAT_NAME,
        # the oldest version whose readers can run this export: 1 autonomous, 2 forced, 3 timed
        "format_version": FORMAT_VERSIONS[req.kind],
        "created_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "state": state_record(req, hidden),
        "time": {"dt": req.dt, "unit": str(time_unit)},
        "forcing": forcing_record(req),
        "hidden_init": hidden_init_record(req, r_init, frozen.closure, warm, hidden),
        "programs": program_records(programs),
        "model": model_record(frozen, solver, substitution, req.dt, req.forced, req.kind),
        "normalisation": normalisation_record(frozen.closure),
        "envelope": envelope_record(req, hidden_range),
        "metrics": metrics,
        "config": config,
        "versions": versions(req.onnx),
        "dtype": str(req.dtype).replace("torch.", ""),
        "files": file_records(programs),
        "parity": parity,
        "onnx": onnx_rec,
        "compiled": compiled_rec,
        "cautions": list(CAUTIONS),
    }
    manifest.update(req.extra)
    return manifest
