"""Export a fitted hybrid model as a frozen simulator: programs, manifest, parity record.

What is written to ``out_dir``:

``simulator.pt2``
    The one-step map over one observation interval Δt, ``s_n ↦ s_{n+1}`` with
    ``s = [x, r]`` (observed components, then the ``d_r`` hidden components),
    shape ``(B, D + d_r) → (B, D + d_r)``, batch dimension dynamic. For a
    continuous model the fixed-step solver's sub-steps are inside (unrolled by
    ``torch.export``); for a discrete model it is the corrected flow map.
``warm_up.pt2`` (only when ``d_r > 0``)
    One warm-up interval, ``(x_n, x_{n+1}, r_n) ↦ r_{n+1}``: the hidden state
    driven by two consecutive observations (continuous: ``dr/dt = g(x_obs(t), r)``
    with ``x_obs`` linear between them; discrete: ``r_{n+1} = cell(x_n, r_n)``),
    exactly :func:`mnemode.hybrid.warm_up` on a two-sample history. Looping it
    over ``W`` intervals of an observed history of ``W + 1`` samples gives the
    hidden state a forecast starts from. (A program that unrolled all ``W``
    intervals was measured at 60 s to export, 50 s to load and 19 MB for
    ``W = 250``; the interval program takes a fraction of a second.)
``simulator.onnx`` / ``warm_up.onnx`` (optional)
    The same programs through ``torch.onnx.export`` (dynamo path).
``simulator.json``
    The manifest: names, units, Δt, hidden size and how to initialise it, the
    training envelope, metrics, versions, config, dtype, file hashes, parity
    record and cautions. Written last, so a manifest exists only beside
    complete programs.

Normalisation needs no separate step: the closure's input and output scaling
are buffers inside the programs. Parity is checked at export time: the saved
and reloaded program against the eager model over ``parity_steps`` steps at
batch 1 and batch ``parity_batch``.
"""

from __future__ import annotations

import copy
import datetime as _dt
import hashlib
import io
import math
import platform
from pathlib import Path
from typing import Mapping

import numpy as np
import torch
from torch import nn

from .errors import CheckpointError, ConfigError, FitDiverged, MnemodeError
from .fileio import atomic_path, write_json
from .hybrid import HybridField, HybridFlowMap, warm_up
from .simulator import (FORMAT_NAME, FORMAT_VERSION, MANIFEST_FILE, STEP_FILE, WARM_UP_FILE, EnvelopeError,
                        EnvelopeWarning, Simulator, load_simulator)
from .solvers import RK4, Adaptive, Euler, FlowMap, Solver

__all__ = ["export_simulator", "check_exportable", "ParityError", "CAUTIONS", "DEFAULT_ENVELOPE_MARGIN",
           "load_simulator", "Simulator", "EnvelopeWarning", "EnvelopeError"]

STEP_ONNX_FILE = "simulator.onnx"
WARM_UP_ONNX_FILE = "warm_up.onnx"
_ALL_FILES = (STEP_FILE, WARM_UP_FILE, STEP_ONNX_FILE, WARM_UP_ONNX_FILE, MANIFEST_FILE)
_RESERVED = ("format", "format_version", "created_utc", "state", "time", "hidden_init", "programs", "model",
             "normalisation", "envelope", "metrics", "config", "versions", "dtype", "files", "parity", "onnx",
             "cautions")

# Widening of the training range, as a fraction of each component's range, before the
# loader warns (common practice: a tenth of the range of a trained input).
DEFAULT_ENVELOPE_MARGIN = 0.1

# float64 parity requirement (the task's contract); float32 runs through the same
# kernels, so its figure is recorded, not required, unless float32 is the export dtype.
_TOLERANCE = {torch.float64: 1e-6, torch.float32: 1e-3}

CAUTIONS = [
    "A learned correction is valid only inside its training envelope (the per-component ranges below, "
    "widened by the margin) and for the conditions of its training data (parameters, forcing, sensors, "
    "sampling interval); outside them its output is an extrapolation with no guarantee.",
    "Validate this simulator against independent measurements before any use in control, protection "
    "or safety decisions.",
    "The codes, standards and licensed practice of the application govern its use; this simulator does "
    "not replace them.",
]


class ParityError(MnemodeError):
    """The exported program does not reproduce the eager model within tolerance."""


# -- programs ------------------------------------------------------------------

class _StepProgram(nn.Module):
    """One observation interval of a hybrid model: ``[x, r] ↦ [x, r]`` after Δt."""

    def __init__(self, model: nn.Module, solver: Solver | None, dt: float):
        super().__init__()
        self.model, self.solver, self.dt = model, solver, float(dt)

    def forward(self, state: torch.Tensor) -> torch.Tensor:
        if isinstance(self.model, HybridFlowMap):
            return self.model(state)
        # Autonomous models only (forcing is refused at export): t restarts at 0 each interval.
        return self.solver.advance(self.model, 0.0, state, self.dt)


class _WarmUpInterval(nn.Module):
    """One warm-up interval ``(x_n, x_{n+1}, r_n) ↦ r_{n+1}``: :func:`warm_up` on two samples."""

    def __init__(self, model: nn.Module, solver: Solver | None, dt: float):
        super().__init__()
        self.model, self.solver, self.dt = model, solver, float(dt)

    def forward(self, x_a: torch.Tensor, x_b: torch.Tensor, r: torch.Tensor) -> torch.Tensor:
        return warm_up(self.model, torch.stack((x_a, x_b)), self.dt, self.solver, r0=r)


def _export_program(module: nn.Module, examples: tuple, what: str):
    batch = torch.export.Dim("batch", min=1)
    shapes = tuple({0: batch} for _ in examples)
    try:
        return torch.export.export(module, examples, dynamic_shapes=shapes)
    except Exception as exc:  # torch.export raises many kinds; all mean "not exportable as written"
        first = str(exc).strip().splitlines()[0][:300] if str(exc).strip() else type(exc).__name__
        raise ConfigError(what, f"cannot be captured by torch.export ({type(exc).__name__}: {first})",
                          "keep the model's forward free of data-dependent Python control flow, .item() "
                          "calls and non-torch libraries (torchdiffeq solvers are replaced by RK4 "
                          "automatically; custom ones are not).") from None


def _program_bytes(ep) -> bytes:
    buf = io.BytesIO()
    torch.export.save(ep, buf)
    return buf.getvalue()


def _reload(data: bytes):
    return torch.export.load(io.BytesIO(data)).module()


# -- argument checks -------------------------------------------------------------

def _check_model(model, solver, dt):
    if not isinstance(model, (HybridField, HybridFlowMap)):
        raise ConfigError("model", f"is a {type(model).__name__}; expected a HybridField or HybridFlowMap",
                          "wrap the physics and closure in mnemode.hybrid.HybridField (continuous) or "
                          "HybridFlowMap (discrete).")
    if not (isinstance(dt, (int, float)) and math.isfinite(dt) and dt > 0):
        raise ConfigError("dt", f"is {dt!r}; expected a positive observation interval",
                          "pass the sampling interval of the training data.")
    if isinstance(model, HybridField):
        if getattr(model, "forcing", None) is not None:
            raise ConfigError("model.forcing", "is set; a forced model's step depends on the forcing signal, "
                              "which an exported one-step map cannot carry yet",
                              "export an unforced model (forcing=None).")
        if solver is None:
            raise ConfigError("solver", "is None; a continuous model needs a solver for its one-step map",
                              "pass the solver the model was fitted with, e.g. RK4(0.01).")
        if not isinstance(solver, (Euler, RK4, Adaptive)):
            raise ConfigError("solver", f"is a {type(solver).__name__}; expected Euler, RK4 or Adaptive",
                              "pass a mnemode.solvers solver.")
    else:
        if abs(model.dt - dt) > 1e-12 * max(1.0, dt):
            raise ConfigError("dt", f"is {dt} but the discrete model steps by {model.dt}",
                              "pass the model's own interval (a flow map cannot change its step).")


def _check_names(model, state_names, state_units, envelope):
    names = [str(n) for n in state_names]
    if len(names) != model.dim or len(set(names)) != len(names):
        raise ConfigError("state_names", f"are {names}; expected {model.dim} distinct names",
                          f"give one name per observed component ({model.dim}).")
    units = [str(u) for u in (state_units or [""] * len(names))]
    if len(units) != len(names):
        raise ConfigError("state_units", f"are {units}; expected {len(names)} entries",
                          "give one unit per component (an empty string where there is none).")
    if not isinstance(envelope, Mapping) or set(envelope) != set(names):
        got = sorted(envelope) if isinstance(envelope, Mapping) else type(envelope).__name__
        raise ConfigError("envelope", f"has components {got}; expected exactly {names}",
                          "pass {name: [min, max]} over the training data (TrajectorySet.envelope()).")
    env = {}
    for n in names:
        try:
            lo, hi = (float(v) for v in envelope[n])
        except (TypeError, ValueError):
            raise ConfigError(f"envelope[{n!r}]", f"is {envelope[n]!r}; expected [min, max]",
                              "give two numbers.") from None
        if not (math.isfinite(lo) and math.isfinite(hi) and lo <= hi):
            raise ConfigError(f"envelope[{n!r}]", f"is [{lo}, {hi}]; expected finite min ≤ max",
                              "compute it from finite training data.")
        env[n] = [lo, hi]
    return names, units, env


# -- solver substitution --------------------------------------------------------

def _substitute_adaptive(model, solver, starts: torch.Tensor, dt: float):
    """Replace torchdiffeq integration (not exportable) by RK4 at a step matching it.

    The step halves from Δt until one interval of RK4 agrees with the adaptive
    solver within ten times its own tolerance on the parity starts (at most 256
    sub-steps). Returns ``(model, solver, record)``.
    """
    flow = model.flow_map if isinstance(model, HybridFlowMap) else None
    adaptive = flow.solver if flow is not None else solver
    if not isinstance(adaptive, Adaptive):
        return model, solver, None
    with torch.no_grad():
        if flow is not None:
            ref = flow(starts[..., : model.dim])
        else:
            ref = adaptive.advance(model, 0.0, starts, dt)
        tol = 10 * (adaptive.atol + adaptive.rtol * float(ref.abs().max()))
        n, diff = 1, math.inf
        while True:
            rk4 = RK4(dt / n)
            if flow is not None:
                out = FlowMap(flow.field, flow.dt, rk4)(starts[..., : model.dim])
            else:
                out = rk4.advance(model, 0.0, starts, dt)
            diff = float((out - ref).abs().max())
            if diff <= tol or n >= 256:
                break
            n *= 2
    record = {"fitted_with": repr(adaptive), "exported_with": repr(rk4), "substeps": n,
              "one_step_max_abs_diff_vs_fitted_solver": diff, "tolerance": tol}
    if flow is not None:
        model.flow_map = FlowMap(flow.field, flow.dt, rk4)  # ``model`` is the exporter's private copy
        return model, solver, record
    return model, rk4, record


# -- parity --------------------------------------------------------------------

def _rollout(fn, s0: torch.Tensor, n: int) -> torch.Tensor:
    out = [s0]
    s = s0
    with torch.no_grad():
        for _ in range(n):
            s = fn(s)
            out.append(s)
    return torch.stack(out)


def _max_diff(a: torch.Tensor, b: torch.Tensor) -> float:
    """Largest |a − b|; places non-finite in both count as agreeing, in one only as inf."""
    fa, fb = torch.isfinite(a), torch.isfinite(b)
    if not torch.equal(fa, fb):
        return math.inf
    if not fa.any():
        return 0.0
    return float((a[fa] - b[fb]).abs().max())


def _warm_up_loop(program, history: torch.Tensor, r0: torch.Tensor) -> torch.Tensor:
    r = r0
    with torch.no_grad():
        for i in range(history.shape[0] - 1):
            r = program(history[i], history[i + 1], r)
    return r


def _parity(model, solver, dt, step_prog, wu_prog, starts, r_init, steps, batches, history):
    """Max |program − eager| over ``steps`` steps for each batch size, and over a warm-up."""
    eager_step = _StepProgram(model, solver, dt)
    rec = {}
    worst = 0.0
    for b in batches:
        s0 = starts[:b]
        if r_init is not None:
            s0 = torch.cat((s0, r_init.expand(b, -1)), dim=-1)
        d = _max_diff(_rollout(step_prog, s0, steps), _rollout(eager_step, s0, steps))
        rec[f"batch_{b}"] = d
        worst = max(worst, d)
    out = {"step_program": {**rec, "max_abs_diff": worst}}
    if wu_prog is not None and history is not None:
        r0 = r_init.expand(history.shape[1], -1)
        with torch.no_grad():
            ref = warm_up(model, history, dt, solver, r0=r0)
        d = _max_diff(_warm_up_loop(wu_prog, history, r0), ref)
        out["warm_up_program"] = {"intervals": history.shape[0] - 1, f"batch_{history.shape[1]}": d,
                                  "max_abs_diff": d}
        worst = max(worst, d)
    return out, worst


def _parity_history(model, solver, dt, starts, r_init, w):
    """An observed-like history (``w + 1`` samples) from a free run of the eager model."""
    s0 = starts if r_init is None else torch.cat((starts, r_init.expand(starts.shape[0], -1)), dim=-1)
    traj = _rollout(_StepProgram(model, solver, dt), s0, w)
    hist = traj[..., : model.dim]
    return hist if torch.isfinite(hist).all() else None


def _parity_starts(envelope, names, parity_x0, n, dtype, dim):
    if parity_x0 is not None:
        x0 = torch.as_tensor(np.asarray(parity_x0, dtype=np.float64), dtype=dtype)
        if x0.ndim == 1:
            x0 = x0[None]
        if x0.ndim != 2 or x0.shape[-1] != dim or not torch.isfinite(x0).all():
            raise ConfigError("parity_x0", f"has shape {tuple(x0.shape)}; expected finite (B, {dim})",
                              "pass observed states from the test data, one per row.")
        return x0.repeat((n + x0.shape[0] - 1) // x0.shape[0], 1)[:n], "given"
    gen = torch.Generator().manual_seed(0)
    lo = torch.tensor([envelope[k][0] for k in names], dtype=torch.float64)
    hi = torch.tensor([envelope[k][1] for k in names], dtype=torch.float64)
    u = torch.rand((n, dim), generator=gen, dtype=torch.float64)
    return (lo + u * (hi - lo)).to(dtype), "uniform in the training envelope (seed 0)"


# -- the export --------------------------------------------------------------------

def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


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


def _versions(onnx: bool) -> dict:
    from .version import __version__

    v = {"mnemode": __version__, "torch": torch.__version__, "numpy": np.__version__,
         "python": platform.python_version()}
    if onnx:
        for pkg in ("onnx", "onnxscript", "onnxruntime"):
            try:
                v[pkg] = __import__(pkg).__version__
            except ImportError:
                v[pkg] = None
    return v


def _require_onnx() -> None:
    missing = []
    for pkg in ("onnx", "onnxscript"):
        try:
            __import__(pkg)
        except ImportError:
            missing.append(pkg)
    if missing:
        raise ConfigError("onnx export", f"needs the package(s) {', '.join(missing)}, which are not installed",
                          'pip install "mnemode[onnx]" (or export without onnx).')


def _onnx_bytes(module, examples, input_names, output_name, what) -> bytes:
    import tempfile
    import warnings

    batch = torch.export.Dim("batch", min=1)
    shapes = tuple({0: batch} for _ in examples)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "program.onnx"
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                torch.onnx.export(module, examples, str(path), dynamo=True, dynamic_shapes=shapes,
                                  input_names=list(input_names), output_names=[output_name],
                                  external_data=False, verbose=False)
        except Exception as exc:
            first = str(exc).strip().splitlines()[0][:300] if str(exc).strip() else type(exc).__name__
            raise ConfigError(what, f"cannot be exported to ONNX ({type(exc).__name__}: {first})",
                              "export without onnx; the .pt2 program is complete on its own.") from None
        return path.read_bytes()


def _onnx_check(data: bytes, program, examples: tuple) -> float | None:
    """Max |onnxruntime − .pt2| on one call with ``examples`` (None without onnxruntime)."""
    try:
        import onnxruntime as ort
    except ImportError:
        return None
    sess = ort.InferenceSession(data, providers=["CPUExecutionProvider"])
    feeds = {i.name: e.numpy() for i, e in zip(sess.get_inputs(), examples)}
    got = sess.run(None, feeds)[0]
    with torch.no_grad():
        want = program(*examples).numpy()
    return float(np.abs(got - want).max())


def export_simulator(model, out_dir, *, dt: float, solver: Solver | None = None, state_names, state_units,
                     warm_up_steps: int, envelope: Mapping, metrics: Mapping | None = None,
                     config: Mapping | None = None, time_unit: str = "", dtype: torch.dtype = torch.float64,
                     onnx: bool = False, parity_steps: int = 1000, extra_manifest: Mapping | None = None,
                     parity_x0=None, parity_batch: int = 8, envelope_margin: float | None = None,
                     check_float32: bool = True, overwrite: bool = False) -> dict:
    """Freeze a fitted hybrid model into programs plus a manifest, parity-checked.

    The exported one-step map is ``s_{n+1} = Φ_Δt(s_n)``, ``s = [x, r]``: for a
    :class:`~mnemode.hybrid.HybridField`, ``Φ`` is the fixed-step solver's
    advance over Δt (sub-steps unrolled into the program); for a
    :class:`~mnemode.hybrid.HybridFlowMap` it is ``[Ψ0(x) + Δt·m(x, r), cell(x, r)]``.
    An :class:`~mnemode.solvers.Adaptive` solver (torchdiffeq, not capturable)
    is replaced by RK4 with the step halved from Δt until one interval agrees
    with it within 10× its tolerance; the choice is recorded under
    ``model.solver_substitution``.

    Parity: the saved program is reloaded and rolled out for ``parity_steps``
    steps against the eager model at batch 1 and ``parity_batch``; the max abs
    difference must be ≤ 1e-6 in float64 (≤ 1e-3 for a float32 export). With
    ``check_float32`` (float64 exports) a float32 copy of the step program is
    exported in memory and its figure at batch ``parity_batch`` recorded under
    ``parity.float32``, with the one-interval float32-vs-float64 difference (the
    precision a float32 export gives up).

    Example::

        manifest = export_simulator(model, "runs/demo/export", dt=0.02, solver=RK4(0.01),
                                    state_names=system.state_names, state_units=system.state_units,
                                    warm_up_steps=250, envelope=train.envelope())
        sim = load_simulator("runs/demo/export")

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

    Returns:
        The manifest (a dict, also written to ``out_dir/simulator.json``).

    Raises:
        ConfigError: wrong model/solver/arguments, forcing, missing ONNX extra,
            an existing export without ``overwrite``, a model torch.export cannot capture.
        ParityError: the program differs from the eager model beyond tolerance.
    """
    _check_model(model, solver, dt)
    names, units, env = _check_names(model, state_names, state_units, envelope)
    if dtype not in _TOLERANCE:
        raise ConfigError("dtype", f"is {dtype}; expected torch.float64 or torch.float32", "pass one of them.")
    try:
        w = int(warm_up_steps)
    except (TypeError, ValueError):
        w = -1
    if w < 0 or w != warm_up_steps:
        raise ConfigError("warm_up_steps", f"is {warm_up_steps!r}; expected an integer ≥ 0",
                          "pass round(warm_up_time / dt).")
    if int(parity_steps) < 1 or int(parity_batch) < 2:
        raise ConfigError("parity_steps/parity_batch", f"are {parity_steps}/{parity_batch}; expected ≥ 1 and ≥ 2",
                          "check batch 1 and a batch of at least 2 over at least one step.")
    extra = dict(extra_manifest or {})
    clash = set(extra) & set(_RESERVED)
    if clash:
        raise ConfigError("extra_manifest", f"would replace the reserved key(s) {sorted(clash)}",
                          "use other key names.")
    margin = extra.pop("envelope_margin", None) if envelope_margin is None else envelope_margin
    margin = DEFAULT_ENVELOPE_MARGIN if margin is None else float(margin)
    if not (math.isfinite(margin) and margin >= 0):
        raise ConfigError("envelope_margin", f"is {margin}; expected ≥ 0", "use e.g. 0.1 (a tenth of each range).")
    metrics, config = _plain(metrics, "metrics"), _plain(config, "config")
    if onnx:
        _require_onnx()
    out = Path(out_dir)
    if (out / MANIFEST_FILE).exists() and not overwrite:
        raise ConfigError(str(out), "already holds an exported simulator",
                          "choose another directory, or pass overwrite=True to replace it.")

    dim, hidden = model.dim, model.hidden_size
    is_discrete = isinstance(model, HybridFlowMap)
    frozen = copy.deepcopy(model).to(dtype).eval().requires_grad_(False)
    starts, starts_kind = _parity_starts(env, names, parity_x0, int(parity_batch), dtype, dim)
    r_init = None
    if hidden:
        r_init = frozen.closure.initial_hidden((1,), dtype).detach()
        if not torch.equal(frozen.closure.initial_hidden((3,), dtype), r_init.expand(3, -1)):
            raise ConfigError(f"{type(frozen.closure).__name__}.initial_hidden",
                              "depends on the batch element; an exported simulator needs one initial vector",
                              "return the same vector for every batch element.")
    full_starts = starts if r_init is None else torch.cat((starts, r_init.expand(starts.shape[0], -1)), -1)
    frozen, ex_solver, substitution = _substitute_adaptive(frozen, None if is_discrete else solver, full_starts, dt)

    # -- capture and save the programs ---------------------------------------------
    width = dim + hidden
    step_mod = _StepProgram(frozen, ex_solver, dt)
    ex_state = full_starts[:2].clone()
    step_ep = _export_program(step_mod, (ex_state,), "model (one-step map)")
    blobs = {STEP_FILE: _program_bytes(step_ep)}
    wu_mod = None
    if hidden:
        wu_mod = _WarmUpInterval(frozen, ex_solver, dt)
        wu_examples = (starts[:2].clone(), starts[:2].clone(), r_init.expand(2, -1).clone())
        blobs[WARM_UP_FILE] = _program_bytes(_export_program(wu_mod, wu_examples, "model (warm-up interval)"))

    # -- parity: the saved bytes, reloaded, against eager -----------------------------
    step_prog = _reload(blobs[STEP_FILE])
    wu_prog = _reload(blobs[WARM_UP_FILE]) if hidden else None
    hist_w = w if w > 0 else 1
    history = _parity_history(frozen, ex_solver, dt, starts, r_init, hist_w) if hidden else None
    batches = (1, int(parity_batch))
    parity, worst = _parity(frozen, ex_solver, dt, step_prog, wu_prog, starts, r_init, int(parity_steps),
                            batches, history)
    tol = _TOLERANCE[dtype]
    parity = {"steps": int(parity_steps), "batches": list(batches), "starts": starts_kind,
              "dtype": str(dtype).replace("torch.", ""), "tolerance": tol, **parity,
              "max_abs_diff": worst, "passed": worst <= tol}
    if not worst <= tol:
        raise ParityError("exported simulator",
                          f"differs from the eager model by {worst:.3g} (max abs over {parity_steps} steps, "
                          f"batches {list(batches)}); required ≤ {tol:g}",
                          "the model's forward probably depends on state torch.export cannot see (globals, "
                          "Python-side randomness, in-place buffer updates); make it a pure function of its "
                          "inputs and buffers.")
    if check_float32 and dtype == torch.float64:
        parity["float32"] = _float32_figure(frozen, ex_solver, dt, starts, r_init, int(parity_steps),
                                            int(parity_batch))

    # -- optional ONNX -------------------------------------------------------------
    onnx_rec = None
    if onnx:
        onnx_rec = {"opset_note": "torch.onnx.export(dynamo=True)", "files": [STEP_ONNX_FILE]}
        blobs[STEP_ONNX_FILE] = _onnx_bytes(step_mod, (ex_state,), ["state"], "next_state", "model (one-step map)")
        check_states = full_starts.clone()
        onnx_rec["one_step_max_abs_diff_vs_pt2"] = _onnx_check(blobs[STEP_ONNX_FILE], step_prog, (check_states,))
        if hidden:
            blobs[WARM_UP_ONNX_FILE] = _onnx_bytes(wu_mod, wu_examples, ["x_a", "x_b", "r"], "r_next",
                                                   "model (warm-up interval)")
            onnx_rec["files"].append(WARM_UP_ONNX_FILE)
            n = starts.shape[0]
            wu_check = (starts.clone(), starts.flip(0).clone(), r_init.expand(n, -1).clone())
            onnx_rec["warm_up_max_abs_diff_vs_pt2"] = _onnx_check(blobs[WARM_UP_ONNX_FILE], wu_prog, wu_check)
        if onnx_rec["one_step_max_abs_diff_vs_pt2"] is None:
            onnx_rec["note"] = "onnxruntime not installed at export time: ONNX output not verified"
        elif dtype == torch.float64:
            # Measured with torch 2.13 / onnxscript 0.7: x*0.1 exported in float64 differs from torch by
            # exactly (float32(0.1) - 0.1)*x, i.e. Python-scalar constants pass through float32.
            onnx_rec["note"] = ("in float64 the ONNX programs agree with the .pt2 ones only to about float32 "
                                "precision in their Python-scalar constants (see the figures); use the .pt2 "
                                "programs where float64 accuracy matters")

    # -- manifest -------------------------------------------------------------------
    closure = frozen.closure
    init_kind = None
    if hidden:
        init_kind = "zeros" if not bool(r_init.abs().max() > 0) else "learned"
    hidden_init = {
        "method": "none" if not hidden else ("warm_up" if w > 0 else "initial_vector"),
        "initial_vector": None if not hidden else r_init[0].double().tolist(),
        "initial_vector_kind": init_kind,
        "closure_mode": getattr(closure, "initial_hidden_mode", None) if closure is not None else None,
        "warm_up_steps": w,
        "history_length": w + 1,
        "program": WARM_UP_FILE if hidden else None,
        "how": ("memoryless: the state is x alone" if not hidden else
                f"start r from initial_vector, then apply {WARM_UP_FILE} to each consecutive pair of the "
                f"last {w + 1} observations (x_n, x_(n+1)), oldest first; the final r and the last "
                "observation give the state [x, r] a forecast starts from"),
    }
    programs = {
        "step": {"file": STEP_FILE, "inputs": {"state": ["batch", width]}, "output": {"next_state": ["batch", width]},
                 "maps": "state [x, r] at t -> state at t + dt (one observation interval)"},
    }
    if hidden:
        programs["warm_up"] = {
            "file": WARM_UP_FILE,
            "inputs": {"x_a": ["batch", dim], "x_b": ["batch", dim], "r": ["batch", hidden]},
            "output": {"r_next": ["batch", hidden]},
            "maps": "hidden state driven by two consecutive observations over one interval",
        }
    physics = frozen.flow_map.field if is_discrete and frozen.flow_map is not None else getattr(frozen, "physics", None)
    model_rec = {
        "kind": "discrete" if is_discrete else "continuous",
        "physics": type(physics).__name__ if physics is not None else None,
        "closure": type(closure).__name__ if closure is not None else None,
        "solver": (repr(frozen.flow_map.solver) if is_discrete and frozen.flow_map is not None
                   else (repr(ex_solver) if not is_discrete else None)),
        "solver_substitution": substitution,
        "forcing": None,
        "time_dependence": "autonomous (the program restarts t at 0 each interval)",
    }
    if not is_discrete:
        from .solvers import substeps_for

        model_rec["substeps_per_interval"] = substeps_for(dt, ex_solver.step)
    files = {name: {"sha256": _sha256(data), "bytes": len(data)} for name, data in blobs.items()}
    manifest = {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "created_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "state": {"names": names, "units": units, "dim": dim, "hidden_size": hidden,
                  "hidden_names": [f"r{i + 1}" for i in range(hidden)],
                  "layout": f"last axis: x ({dim} observed components, in 'names' order), then r ({hidden} hidden)"},
        "time": {"dt": float(dt), "unit": str(time_unit)},
        "hidden_init": hidden_init,
        "programs": programs,
        "model": model_rec,
        "normalisation": {
            "baked_in": True,
            "note": "inputs and outputs are in physical units; the closure's input and output scaling are "
                    "buffers inside the programs (recorded here for information only, do not apply them)",
            "closure_scaling": _closure_scaling(closure) if closure is not None else None,
        },
        "envelope": {
            "components": env,
            "default_margin": margin,
            "rule": "component i is inside when min_i - margin*(max_i - min_i) <= x_i <= "
                    "max_i + margin*(max_i - min_i)",
        },
        "metrics": metrics,
        "config": config,
        "versions": _versions(onnx),
        "dtype": str(dtype).replace("torch.", ""),
        "files": files,
        "parity": parity,
        "onnx": onnx_rec,
        "cautions": list(CAUTIONS),
    }
    assert set(manifest) == set(_RESERVED)  # internal consistency of the reserved list
    manifest.update(extra)

    # -- write: programs first, manifest last (a manifest means a complete export) -----
    out.mkdir(parents=True, exist_ok=True)
    if overwrite:
        for stale in _ALL_FILES:
            if stale not in blobs and (out / stale).exists():
                (out / stale).unlink()
    for name, data in blobs.items():
        with atomic_path(out / name) as tmp:
            tmp.write_bytes(data)
    write_json(out / MANIFEST_FILE, manifest)
    return manifest


def _float32_figure(frozen, solver, dt, starts, r_init, steps, batch) -> dict:
    """Parity of a float32 copy of the step program (exported in memory, not written).

    ``frozen``/``solver`` are the float64 model and fixed-step solver being exported
    (any adaptive solver already replaced). Measured at batch ``batch`` over ``steps``
    steps against float32 eager, plus the one-interval float32-vs-float64 difference
    (the precision a float32 export gives up).
    """
    m32 = copy.deepcopy(frozen).to(torch.float32)
    s32 = starts.to(torch.float32)
    r32 = r_init.to(torch.float32) if r_init is not None else None
    full32 = s32 if r32 is None else torch.cat((s32, r32.expand(s32.shape[0], -1)), -1)
    step_ep = _export_program(_StepProgram(m32, solver, dt), (full32[:2].clone(),), "model (float32 copy)")
    rec, worst = _parity(m32, solver, dt, step_ep.module(), None, s32, r32, steps, (batch,), None)
    with torch.no_grad():
        one32 = _StepProgram(m32, solver, dt)(full32).double()
        one64 = _StepProgram(frozen, solver, dt)(full32.double())
    return {**rec["step_program"], "steps": steps,
            "one_step_max_abs_diff_vs_float64": float((one32 - one64).abs().max()),
            "note": "float32 step program vs float32 eager (recorded, not required)"}


# -- run-level checks ------------------------------------------------------------------

def _nonfinite_tensor(obj, path="") -> str | None:
    if isinstance(obj, torch.Tensor):
        if obj.is_floating_point() and not bool(torch.isfinite(obj).all()):
            return path or "<tensor>"
        return None
    if isinstance(obj, Mapping):
        for k, v in obj.items():
            hit = _nonfinite_tensor(v, f"{path}.{k}" if path else str(k))
            if hit:
                return hit
    elif isinstance(obj, (list, tuple)):
        for i, v in enumerate(obj):
            hit = _nonfinite_tensor(v, f"{path}[{i}]")
            if hit:
                return hit
    return None


def check_exportable(model_path, diagnostics: Mapping | None = None) -> None:
    """Refuse to export a model that is missing, unreadable or came from a diverged fit.

    Args:
        model_path: the fitted model file (``RUN_DIR/models/<name>.pt``).
        diagnostics: the fit's diagnostics (``metrics.json`` ``fit.<name>``), or
            ``None`` when not recorded. A fit counts as diverged when it says so
            (``diverged: true`` or ``status: "diverged"``) or when ``train_error``
            or ``val_error`` is present but non-finite (JSON writes NaN as null).

    Raises:
        CheckpointError: the file is missing, empty or not loadable with
            ``weights_only=True``.
        FitDiverged: the diagnostics or the saved tensors show a diverged fit.
    """
    path = Path(model_path)
    if not path.is_file():
        raise CheckpointError(str(path), "fitted model file is missing",
                              "fit the model first (or resume the run) before exporting it.")
    if path.stat().st_size == 0:
        raise CheckpointError(str(path), "fitted model file is empty (truncated write)", "refit the model.")
    if diagnostics is not None:
        if diagnostics.get("diverged") is True or str(diagnostics.get("status", "")).lower() == "diverged":
            raise FitDiverged(str(path), "the fit that produced this model diverged; it will not be exported",
                              "refit with a smaller learning rate or step, or shorter windows.")
        for key in ("train_error", "val_error"):
            if key in diagnostics:
                v = diagnostics[key]
                ok = isinstance(v, (int, float)) and math.isfinite(float(v))
                if not ok:
                    raise FitDiverged(str(path), f"the fit's {key} is {v!r} (not a finite number): the fit diverged",
                                      "refit with a smaller learning rate or step, or shorter windows, "
                                      "before exporting.")
    try:
        payload = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:
        raise CheckpointError(str(path), f"cannot be read as tensors and plain data ({type(exc).__name__})",
                              "the file is corrupt or truncated; refit the model.") from None
    bad = _nonfinite_tensor(payload)
    if bad:
        raise FitDiverged(f"{path} [{bad}]", "holds non-finite values: the fit diverged",
                          "refit with a smaller learning rate or step before exporting.")
