"""Export a fitted hybrid model as a frozen simulator: programs, parity record, manifest, signature.

What is written to ``out_dir``:

``simulator.pt2``
    The one-step map over one observation interval Δt, ``s_n ↦ s_{n+1}`` with
    ``s = [x, r]`` (observed components, then the ``d_r`` hidden components),
    batch dimension dynamic. For a continuous model the fixed-step solver's
    sub-steps are inside (unrolled by ``torch.export``); for a discrete model it
    is the corrected flow map. A forced model's program also takes the time at
    the interval's start and the forcing samples at both ends; an unforced
    continuous model whose physics reads ``t`` gets the *timed* program
    ``(t, state)`` (see :mod:`mnemode.export.programs`).
``warm_up.pt2`` (only when ``d_r > 0``)
    One warm-up interval, ``(x_n, x_{n+1}, r_n) ↦ r_{n+1}`` (forced: with
    ``t, u_n, u_{n+1}``; a timed model keeps this autonomous one, since a
    warm-up evaluates no physics), exactly :func:`mnemode.hybrid.warm_up` on two samples.
    Looping it over the ``W`` intervals of an observed history of ``W + 1``
    samples gives the hidden state a forecast starts from.
``simulator.onnx`` / ``warm_up.onnx`` (optional)
    The same programs through ``torch.onnx.export`` (dynamo path).
``simulator.json``
    The manifest (see :mod:`mnemode.export.manifest`). Written after the
    programs, so a manifest exists only beside complete programs.
``simulator.sig`` (when a key is given)
    HMAC-SHA256 of the manifest under the user's key (:mod:`mnemode.archive`).

No program holds a pickled entry; the loader refuses any that does.
"""

from __future__ import annotations

import copy
import io
from pathlib import Path
from dataclasses import dataclass
from typing import Mapping

import torch

from ..archive import SIGNATURE_FILE, sign
from ..errors import ConfigError, MnemodeError
from ..fileio import atomic_path, write_json
from ..hybrid import HybridFlowMap
from ..simulator import MANIFEST_FILE, STEP_FILE, WARM_UP_FILE
from ..solvers import Solver
from . import parity as _parity
from .checks import TOLERANCE, ExportRequest, check_request
from .manifest import build_manifest
from .onnx import onnx_bytes, onnx_check, require_onnx
from .programs import BlockProgram, Program, StepProgram, WarmUpInterval, capture, program_bytes, reload

__all__ = ["export_simulator", "ParityError", "STEP_ONNX_FILE", "WARM_UP_ONNX_FILE"]

STEP_ONNX_FILE = "simulator.onnx"
STEP_COMPILED_FILE = "simulator_compiled.pt2"
WARM_UP_COMPILED_FILE = "warm_up_compiled.pt2"
BLOCK_COMPILED_FILE = "block_compiled.pt2"
#: observation intervals one call of the compiled block program advances (autonomous models)
BLOCK_STEPS = 32
WARM_UP_ONNX_FILE = "warm_up.onnx"
_ALL_FILES = (STEP_FILE, WARM_UP_FILE, STEP_ONNX_FILE, WARM_UP_ONNX_FILE, STEP_COMPILED_FILE, WARM_UP_COMPILED_FILE,
              BLOCK_COMPILED_FILE,
              MANIFEST_FILE, SIGNATURE_FILE)


class ParityError(MnemodeError):
    """The exported program does not reproduce the eager model within tolerance."""


@dataclass
class Frozen:
    """The exporter's private copy of the model, the solver its programs use, and the parity signals."""

    model: torch.nn.Module
    solver: Solver | None
    substitution: dict | None
    signals: _parity.ParitySignals

    @property
    def r_init(self):
        return self.signals.r_init


@dataclass
class Captured:
    """The programs written to disk (``programs``) and the modules they were captured from."""

    programs: list[Program]
    step_module: torch.nn.Module
    warm_module: torch.nn.Module | None
    step_examples: tuple
    warm_examples: tuple | None


def _plain(obj, what: str):
    if obj is None:
        return None
    if not isinstance(obj, Mapping):
        try:
            from omegaconf import OmegaConf

            return OmegaConf.to_container(obj, resolve=True)
        except Exception:
            raise ConfigError(what, f"is a {type(obj).__name__}; expected a dict of plain data",
                              "pass a dict (OmegaConf.to_container(cfg, resolve=True) for a config).") from None
    return dict(obj)


def _key_bytes(key) -> bytes | None:
    if key is None:
        return None
    data = key.encode("utf-8") if isinstance(key, str) else bytes(key)
    if len(data) < 16:
        raise ConfigError("key", f"is {len(data)} bytes long; expected at least 16",
                          "use a long random key, e.g. `python -c \"import secrets; print(secrets.token_hex(32))\"`.")
    return data


# -- the steps ---------------------------------------------------------------------

def freeze(model, solver, req: ExportRequest, parity_x0) -> Frozen:
    """A detached copy in the export dtype, its initial hidden vector, parity signals, exportable solver."""
    discrete = isinstance(model, HybridFlowMap)
    frozen = copy.deepcopy(model).to(req.dtype).eval().requires_grad_(False)
    r_init = None
    if frozen.hidden_size:
        r_init = frozen.closure.initial_hidden((1,), req.dtype).detach()
        if not torch.equal(frozen.closure.initial_hidden((3,), req.dtype), r_init.expand(3, -1)):
            raise ConfigError(f"{type(frozen.closure).__name__}.initial_hidden",
                              "depends on the batch element; an exported simulator needs one initial vector",
                              "return the same vector for every batch element.")
    length = req.parity_steps + max(req.warm_up_steps, 1) + 1
    signals = _parity.parity_signals(req.envelope, req.names, parity_x0, req.parity_batch, req.dtype, frozen.dim,
                                     r_init, req.forcing_envelope, req.forcing_names, length, req.dt)
    frozen, ex_solver, substitution = _parity.substitute_adaptive(frozen, None if discrete else solver,
                                                                  signals.full(), req.dt)
    return Frozen(frozen, ex_solver, substitution, signals)


def _io(req: ExportRequest, hidden: int) -> tuple[dict, dict]:
    width, dim, k = len(req.names) + hidden, len(req.names), len(req.forcing_names)
    step_in = {"state": ["batch", width]}
    warm_in = {"x_a": ["batch", dim], "x_b": ["batch", dim], "r": ["batch", hidden]}
    if req.kind == "timed":  # the warm-up evaluates no physics: it stays autonomous
        step_in = {"t": [], **step_in}
    if req.forced:
        step_in = {"t": [], **step_in, "u_a": ["batch", k], "u_b": ["batch", k]}
        warm_in = {"t": [], **warm_in, "u_a": ["batch", k], "u_b": ["batch", k]}
    return step_in, warm_in


def capture_programs(f: Frozen, req: ExportRequest) -> Captured:
    """Capture the step program (and the warm-up program for a model with memory) as ``.pt2`` bytes."""
    m, hidden = f.model, f.model.hidden_size
    step_in, warm_in = _io(req, hidden)
    full, x = f.signals.full()[:2].clone(), f.signals.starts[:2].clone()
    t0 = torch.tensor(0.0, dtype=req.dtype)
    u = f.signals.forcing
    step_mod = StepProgram(m, f.solver, req.dt, req.kind)
    step_ex = (full,)
    if req.kind == "timed":
        step_ex = (t0, full)
    elif req.forced:
        step_ex = (t0, full, u[0, :2].clone(), u[1, :2].clone())
    programs = [Program("step", STEP_FILE, "torch.export", program_bytes(capture(step_mod, step_ex,
                        "model (one-step map)")), step_in, {"next_state": ["batch", len(req.names) + hidden]},
                        "state [x, r] at t -> state at t + dt (one observation interval)")]
    warm_mod, warm_ex = None, None
    if hidden:
        warm_mod = WarmUpInterval(m, f.solver, req.dt, req.forced)
        r = f.r_init.expand(2, -1).clone()
        warm_ex = (t0, x, x.clone(), r, u[0, :2].clone(), u[1, :2].clone()) if req.forced else (x, x.clone(), r)
        programs.append(Program("warm_up", WARM_UP_FILE, "torch.export",
                                program_bytes(capture(warm_mod, warm_ex, "model (warm-up interval)")),
                                warm_in, {"r_next": ["batch", hidden]},
                                "hidden state driven by two consecutive observations over one interval"))
    return Captured(programs, step_mod, warm_mod, step_ex, warm_ex)


def check_parity(f: Frozen, cap: Captured, req: ExportRequest, check_float32: bool) -> dict:
    """Reload the saved bytes and compare them with the eager model; raise :class:`ParityError` beyond tolerance."""
    progs = {p.role: reload(p.data) for p in cap.programs}
    batches = (1, req.parity_batch)
    rec, worst = _parity.measure_parity(f.model, f.solver, req.dt, progs["step"], progs.get("warm_up"), f.signals,
                                        req.parity_steps, batches, max(req.warm_up_steps, 1), req.kind,
                                        req.parity_t0)
    tol = TOLERANCE[req.dtype]
    out = {"steps": req.parity_steps, "batches": list(batches), "starts": f.signals.starts_kind,
           "dtype": str(req.dtype).replace("torch.", ""), "tolerance": tol, **rec,
           "max_abs_diff": worst, "passed": worst <= tol}
    if req.reads_t:
        out["t0"] = req.parity_t0
        out["clock"] = ("the program is called with t = t0 + k·dt; the eager model runs from t0 "
                        + ("on the solver's clock" if req.forced else "(hybrid.simulate(..., time_origin=t0))"))
    if not worst <= tol:
        raise ParityError("exported simulator",
                          f"differs from the eager model by {worst:.3g} (max abs over {req.parity_steps} steps, "
                          f"batches {list(batches)}); required ≤ {tol:g}",
                          "the model's forward probably depends on state torch.export cannot see (globals, "
                          "Python-side randomness, in-place buffer updates); make it a pure function of its "
                          "inputs and buffers.")
    if check_float32 and req.dtype == torch.float64:
        out["float32"] = _parity.float32_figure(f.model, f.solver, req.dt, f.signals, req.parity_steps,
                                                req.parity_batch, req.kind, req.parity_t0)
    return out


def onnx_programs(cap: Captured, f: Frozen, req: ExportRequest) -> dict:
    """Append ONNX copies of the programs to ``cap.programs``; return their record (differences vs ``.pt2``)."""
    rec = {"opset_note": "torch.onnx.export(dynamo=True)", "files": [STEP_ONNX_FILE]}
    progs = {p.role: p for p in cap.programs}
    data = onnx_bytes(cap.step_module, cap.step_examples, list(progs["step"].inputs), "next_state",
                      "model (one-step map)")
    cap.programs.append(Program("step_onnx", STEP_ONNX_FILE, "onnx", data, progs["step"].inputs,
                                progs["step"].outputs, progs["step"].maps))
    n = f.signals.starts.shape[0]
    t = torch.tensor(0.0, dtype=req.dtype)
    u = f.signals.forcing
    check = (f.signals.full().clone(),)
    if req.kind == "timed":
        check = (t, check[0])
    elif req.forced:
        check = (t, check[0], u[0].clone(), u[1].clone())
    rec["one_step_max_abs_diff_vs_pt2"] = onnx_check(data, reload(progs["step"].data), check)
    if cap.warm_module is not None:
        data = onnx_bytes(cap.warm_module, cap.warm_examples, list(progs["warm_up"].inputs), "r_next",
                          "model (warm-up interval)")
        cap.programs.append(Program("warm_up_onnx", WARM_UP_ONNX_FILE, "onnx", data, progs["warm_up"].inputs,
                                    progs["warm_up"].outputs, progs["warm_up"].maps))
        rec["files"].append(WARM_UP_ONNX_FILE)
        s = f.signals.starts
        check = (s.clone(), s.flip(0).clone(), f.r_init.expand(n, -1).clone())
        if req.forced:
            check = (t, *check, u[0].clone(), u[1].clone())
        rec["warm_up_max_abs_diff_vs_pt2"] = onnx_check(data, reload(progs["warm_up"].data), check)
    if rec["one_step_max_abs_diff_vs_pt2"] is None:
        rec["note"] = "onnxruntime not installed at export time: ONNX output not verified"
    elif req.dtype == torch.float64:
        # Python-scalar constants pass through float32 in the ONNX graph (x*0.1 in float64 differs
        # from torch by (float32(0.1) - 0.1)*x), so float64 agreement is about float32 precision.
        rec["note"] = ("in float64 the ONNX programs agree with the .pt2 ones only to about float32 "
                       "precision in their Python-scalar constants (see the figures); use the .pt2 "
                       "programs where float64 accuracy matters")
    return rec


def compiled_programs(cap: Captured) -> dict:
    """Append ahead-of-time compiled copies of the programs (PyTorch's inductor packages) to ``cap.programs``.

    Where no C++ compiler is present, or a package fails its parity check against the
    exported program (≤ 1e-6), nothing is appended and the record says why: the plain
    ``.pt2`` programs stay the ones to load. A compiled package holds native code, so
    :func:`~mnemode.simulator.load_simulator` loads it only when asked (``compiled=True``).

    An autonomous model also gets a compiled *block* program, :data:`BLOCK_STEPS`
    intervals per call (``state ↦ states (K, batch, width)``): calling native code
    costs tens of microseconds, more than a small model's step, so a rollout pays it
    once per block instead of once per step.
    """
    import tempfile

    from ..export_aot import AOTI, compile_program

    examples = {"step": cap.step_examples, "warm_up": cap.warm_examples}
    files = {"step": STEP_COMPILED_FILE, "warm_up": WARM_UP_COMPILED_FILE}
    todo = [(p.role, torch.export.load(io.BytesIO(p.data)), p) for p in cap.programs if p.role in files]
    step = next((p for p in cap.programs if p.role == "step"), None)
    if step is not None and len(cap.step_examples) == 1:  # autonomous: (state) only
        block = BlockProgram(cap.step_module, BLOCK_STEPS)
        ep = capture(block, cap.step_examples, f"model (block of {BLOCK_STEPS} intervals)")
        width = step.inputs["state"][1]
        todo.append(("block", ep, Program("block", BLOCK_COMPILED_FILE, "aoti", b"", step.inputs,
                                          {"next_states": [BLOCK_STEPS, "batch", width]},
                                          f"state [x, r] at t -> the states at t + dt, ..., t + {BLOCK_STEPS} dt",
                                          {"steps": BLOCK_STEPS})))
        examples["block"], files["block"] = cap.step_examples, BLOCK_COMPILED_FILE
    rec = {}
    for role, program, p in todo:
        with tempfile.TemporaryDirectory() as tmp:
            out = compile_program(program, Path(tmp) / files[role], examples[role])
            data = Path(out["path"]).read_bytes()
        rec[role] = {k: out[k] for k in ("kind", "seconds", "parity", "reason")}
        if out["kind"] == AOTI:
            cap.programs.append(Program(f"{role}_compiled", files[role], "aoti", data, p.inputs, p.outputs,
                                        p.maps, dict(p.extra)))
            rec[role]["file"] = files[role]
            if role == "block":
                rec[role]["steps"] = BLOCK_STEPS
    return rec


def write_export(req: ExportRequest, programs: list[Program], manifest: dict, key: bytes | None) -> None:
    """Programs first, then the manifest, then its signature (a manifest means a complete export)."""
    out = req.out
    out.mkdir(parents=True, exist_ok=True)
    written = {p.file for p in programs}
    if req.overwrite:
        for stale in _ALL_FILES:
            if stale not in written and (out / stale).exists():
                (out / stale).unlink()
    for p in programs:
        with atomic_path(out / p.file) as tmp:
            tmp.write_bytes(p.data)
    write_json(out / MANIFEST_FILE, manifest)
    if key is not None:
        with atomic_path(out / SIGNATURE_FILE) as tmp:
            tmp.write_text(sign((out / MANIFEST_FILE).read_bytes(), key) + "\n", encoding="utf-8")


def export_simulator(model, out_dir, *, dt: float, solver: Solver | None = None, state_names, state_units,
                     warm_up_steps: int, envelope: Mapping, metrics: Mapping | None = None,
                     config: Mapping | None = None, time_unit: str = "", dtype: torch.dtype = torch.float64,
                     onnx: bool = False, parity_steps: int = 1000, extra_manifest: Mapping | None = None,
                     parity_x0=None, parity_batch: int = 8, envelope_margin: float | None = None,
                     check_float32: bool = True, overwrite: bool = False, forcing_names=(),
                     forcing_units=None, forcing_envelope: Mapping | None = None, key=None,
                     compiled: bool = False, parity_t0: float = 0.0) -> dict:
    """Freeze a fitted hybrid model into programs plus a manifest, parity-checked.

    The exported one-step map is ``s_{n+1} = Φ_Δt(s_n)``, ``s = [x, r]``: for a
    :class:`~mnemode.hybrid.HybridField`, ``Φ`` is the fixed-step solver's
    advance over Δt (sub-steps unrolled into the program); for a
    :class:`~mnemode.hybrid.HybridFlowMap` it is ``[Ψ0(x) + Δt·m(x, r), cell(x, r)]``.
    A forced model (``forcing_names`` given) is advanced with the forcing linear
    between the samples at the interval's ends, at the time ``t`` given to the
    program. An unforced continuous model whose physics reads ``t``
    (:func:`~mnemode.hybrid.reads_time`: it does not declare ``autonomous = True``)
    gets the timed program ``(t, state)``, the interval starting at ``t``; every
    other unforced model keeps the one-input program (``t = 0`` each interval).
    An :class:`~mnemode.solvers.Adaptive` solver (torchdiffeq, not capturable) is
    replaced by RK4 with the step halved from Δt until one interval agrees with
    it within 10× its tolerance; the choice is recorded under
    ``model.solver_substitution``.

    Parity: the saved programs are reloaded and rolled out for ``parity_steps``
    steps against the eager model at batch 1 and ``parity_batch`` (forced: driven
    by a smooth forcing inside its envelope; programs that take ``t`` from
    ``parity_t0``, the eager model with ``simulate(..., time_origin=parity_t0)``
    when timed); the max abs difference must be ≤ 1e-6 in float64 (≤ 1e-3 for a
    float32 export). With ``check_float32`` (float64 exports) a float32 copy's
    figure is recorded under ``parity.float32``.

    Example::

        manifest = export_simulator(model, "runs/demo/export/memory", dt=0.02, solver=RK4(0.01),
                                    state_names=system.state_names, state_units=system.state_units,
                                    warm_up_steps=250, envelope=train.envelope())
        sim = load_simulator("runs/demo/export/memory")

    References:
        PyTorch documentation, ``torch.export`` (ahead-of-time capture, dynamic
        shapes via ``torch.export.Dim``; a Python loop of fixed length is unrolled).

    Args:
        model: fitted ``HybridField`` or ``HybridFlowMap`` (not modified).
        out_dir: export directory (created; an existing export is refused
            unless ``overwrite``).
        dt: observation interval Δt (must equal a discrete model's own).
        solver: fixed-step Euler/RK4, or Adaptive (substituted); ignored for a
            discrete model.
        state_names, state_units: one per observed component.
        warm_up_steps: ``W``, the warm-up intervals used in fitting and
            assessment; the manifest asks for ``W + 1`` observations.
        envelope: ``{name: [min, max]}`` seen in training.
        metrics, config: plain data recorded as is.
        time_unit: what one unit of time means.
        dtype: float64 (default) or float32.
        onnx: also write ``simulator.onnx`` (and ``warm_up.onnx``).
        parity_steps: steps of the parity rollout.
        extra_manifest: further top-level manifest keys (may not replace
            reserved ones); an ``envelope_margin`` key sets the default margin.
        parity_x0: observed states to start the parity runs from; by default
            ``parity_batch`` states uniform in the envelope.
        envelope_margin: default margin of the loader's envelope guard
            (fraction of each range; default 0.1).
        check_float32: also measure the float32 figure.
        overwrite: replace an existing export in ``out_dir``.
        forcing_names, forcing_units: the forcing inputs ``u`` of a forced
            continuous model, in the order the model takes them.
        forcing_envelope: ``{name: [min, max]}`` of the forcing in training.
        key: sign the manifest with HMAC-SHA256 under this key (bytes or str,
            ≥ 16 bytes) into ``simulator.sig``.
        compiled: also compile the programs ahead of time into native packages
            (:func:`compiled_programs`; seconds per program, needs a C++ compiler).
        parity_t0: the time the parity runs of a timed or forced program start
            at (default 0); give a time inside the data's range when the physics
            is defined only there.

    Returns:
        The manifest (a dict, also written to ``out_dir/simulator.json``).

    Raises:
        ConfigError: wrong model/solver/arguments, missing ONNX extra, an
            existing export without ``overwrite``, a model torch.export cannot capture.
        ParityError: the program differs from the eager model beyond tolerance.
    """
    req = check_request(model, solver, out_dir, dt=dt, state_names=state_names, state_units=state_units,
                        envelope=envelope, forcing_names=forcing_names, forcing_units=forcing_units,
                        forcing_envelope=forcing_envelope, warm_up_steps=warm_up_steps,
                        envelope_margin=envelope_margin, dtype=dtype, parity_steps=parity_steps,
                        parity_batch=parity_batch, extra_manifest=extra_manifest, onnx=onnx, overwrite=overwrite,
                        parity_t0=parity_t0)
    metrics, config, key = _plain(metrics, "metrics"), _plain(config, "config"), _key_bytes(key)
    if req.onnx:
        require_onnx()
    frozen = freeze(model, solver, req, parity_x0)
    captured = capture_programs(frozen, req)
    parity = check_parity(frozen, captured, req, check_float32)
    # Further programs (ONNX copies, compiled packages) are appended to captured.programs here;
    # the manifest lists and hashes every entry of that list.
    onnx_rec = onnx_programs(captured, frozen, req) if req.onnx else None
    compiled_rec = compiled_programs(captured) if compiled else None
    hidden_range = _parity.hidden_range(frozen.model, frozen.solver, req.dt, frozen.signals, req.parity_steps,
                                        req.parity_t0)
    manifest = build_manifest(req, frozen=frozen.model, solver=frozen.solver, substitution=frozen.substitution,
                              r_init=frozen.r_init, programs=captured.programs, parity=parity, onnx_rec=onnx_rec,
                              hidden_range=hidden_range, metrics=metrics, config=config, time_unit=time_unit,
                              compiled_rec=compiled_rec)
    write_export(req, captured.programs, manifest, key)
    return manifest
