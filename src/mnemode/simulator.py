"""Load and run an exported simulator: archive and signature checks, input checks, envelope guard.

A directory written by :func:`mnemode.export.export_simulator` holds
``simulator.pt2`` (one observation interval, ``[x, r] ↦ [x, r]``),
``warm_up.pt2`` when the model has memory (``(x_n, x_{n+1}, r_n) ↦ r_{n+1}``),
``simulator.json`` (the manifest) and, when signed, ``simulator.sig``.
:func:`load_simulator` checks the signature (when given a key), the files'
SHA-256 hashes and the archives' entries (nothing is unpickled), then returns a
:class:`Simulator`::

    sim = load_simulator("runs/demo/export/memory")
    traj = sim.rollout(None, 500, history=observed)     # (501, B, D)

Free-running with memory::

    r_0    = initial vector (manifest), or r0
    r_{k+1} = warm_up(x_k, x_{k+1}, r_k)   over the observed history x_0..x_W
    s_0    = [x0 (default x_W), r_W],  s_{n+1} = step(s_n)

A forced simulator's programs also take ``t`` and the forcing samples at both
ends of each interval (linear between them, as in fitting); a timed simulator
(unforced, physics that reads ``t``) has the step program ``(t, state)``. The
manifest's ``programs.step.inputs`` is the signature the simulator calls.

The guard watches the observed components, the forcing inputs and the hidden
state: component ``i`` is inside when ``min_i − m·(max_i − min_i) ≤ x_i ≤
max_i + m·(max_i − min_i)`` (``m`` the margin). Leaving it warns
(:class:`EnvelopeWarning`), raises (:class:`EnvelopeError`) or is ignored, as
configured; a state that turns non-finite stops the run in every mode
(:class:`NonFiniteStateError`).

This module uses only torch, numpy, json and the standard library (plus
:mod:`mnemode.errors` and :mod:`mnemode.archive`) so that
``scripts/run_exported_simulator.py`` can mirror it without mnemode installed.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import os
import tempfile
import warnings
from pathlib import Path

import numpy as np
import torch

from .archive import KEY_ENV, SIGNATURE_FILE, archive_problem, signature_matches
from .errors import CheckpointError, ConfigError, DataError, MnemodeError

__all__ = ["load_simulator", "Simulator", "EnvelopeWarning", "EnvelopeError", "NonFiniteStateError",
           "rollout_to_file", "read_key", "read_forcing", "write_rollout_csv", "FORMAT_NAME", "FORMAT_VERSION",
           "FORMAT_VERSIONS", "MANIFEST_FILE", "STEP_FILE",
           "WARM_UP_FILE", "INDEX_FILE"]

FORMAT_NAME = "mnemode-simulator"
FORMAT_VERSION = 3  # the newest this code reads and writes
# An export records the oldest version whose readers run it: 1 autonomous programs (state), 2 forced
# ones (t, state, u_a, u_b), 3 the timed step program (t, state) of unforced physics that reads t.
FORMAT_VERSIONS = {"autonomous": 1, "forced": 2, "timed": 3}
MANIFEST_FILE = "simulator.json"
STEP_FILE = "simulator.pt2"
WARM_UP_FILE = "warm_up.pt2"
INDEX_FILE = "exports.json"  # in RUN_DIR/export: which model folder is the default
_ON_ENVELOPE = ("warn", "error", "ignore")
_DTYPES = {"float64": torch.float64, "float32": torch.float32}


class EnvelopeWarning(UserWarning):
    """A state left the training envelope (the correction is extrapolating)."""


class EnvelopeError(MnemodeError):
    """A state left the training envelope and the simulator was told to stop there."""


class NonFiniteStateError(MnemodeError):
    """A rollout or warm-up produced a non-finite state (stopped in every guard mode)."""

    exit_code = 3


# -- loading ---------------------------------------------------------------------------

def _resolve(path) -> Path:
    """The export directory of ``path``: itself, its program's folder, or the default model of ``RUN_DIR/export``."""
    p = Path(path)
    if p.is_dir():
        if (p / MANIFEST_FILE).exists():
            return p
        index = p / INDEX_FILE
        if index.is_file():
            try:
                default = json.loads(index.read_text(encoding="utf-8"))["default"]
            except (OSError, ValueError, KeyError, TypeError):
                raise CheckpointError(str(index), "is not a readable export index",
                                      "pass one model's export folder (RUN_DIR/export/<model>).") from None
            if (p / str(default) / MANIFEST_FILE).exists():
                return p / str(default)
        found = sorted(q.parent for q in p.glob(f"*/{MANIFEST_FILE}"))
        if len(found) == 1:
            return found[0]
        if found:
            raise CheckpointError(str(p), f"holds exports of several models ({', '.join(q.name for q in found)}) "
                                  "and no default", f"pass one of them, e.g. {found[0]}.")
        return p
    if p.suffix in (".pt2", ".json") and p.exists():
        return p.parent
    raise CheckpointError(str(p), "is not an exported simulator (no such directory, .pt2 or .json file)",
                          "pass the export directory (RUN_DIR/export/<model>) or its simulator.pt2 / simulator.json.")


def _read_manifest(directory: Path, key: bytes | None) -> dict:
    mpath = directory / MANIFEST_FILE
    if not mpath.is_file():
        raise CheckpointError(str(mpath), "manifest is missing",
                              "re-export the run (`mnemode export RUN_DIR`); the manifest is written last, so "
                              "a missing one means the export did not finish.")
    raw = mpath.read_bytes()
    if key is not None:
        sig = directory / SIGNATURE_FILE
        if not sig.is_file():
            raise CheckpointError(str(sig), "is missing, so the export cannot be verified with the given key; "
                                  "it may have been tampered with",
                                  "obtain the export from its author again, signed (`mnemode export --key-file`).")
        if not signature_matches(raw, sig.read_text(encoding="utf-8", errors="replace"), key):
            raise CheckpointError(str(mpath), "does not match its signature under the given key: the export may "
                                  "have been tampered with (or the key is not the one it was signed with)",
                                  "do not use it; obtain the export from its author again and check the key.")
    try:
        manifest = json.loads(raw.decode("utf-8"))
    except (ValueError, UnicodeDecodeError) as exc:
        raise CheckpointError(str(mpath), f"is not readable JSON ({type(exc).__name__})",
                              "the file is damaged; re-export the run or copy the export directory again.") from None
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT_NAME:
        raise CheckpointError(str(mpath), f"is not a {FORMAT_NAME} manifest",
                              "point to a directory written by mnemode export.")
    version = manifest.get("format_version")
    if not isinstance(version, int) or version > FORMAT_VERSION:
        raise CheckpointError(str(mpath), f"has format version {version!r}; this mnemode reads up to "
                              f"{FORMAT_VERSION}", "load it with the mnemode version that wrote it.")
    return manifest


def _load_program(directory: Path, name: str, manifest: dict, verify: bool):
    path = directory / name
    rec = manifest.get("files", {}).get(name)
    if rec is None:
        raise CheckpointError(str(directory / MANIFEST_FILE), f"does not list {name}",
                              "re-export the run; the manifest and programs do not belong together.")
    if not path.is_file():
        raise CheckpointError(str(path), "is missing from the export directory",
                              "copy the whole export directory, or re-export the run.")
    data = path.read_bytes()
    if verify and hashlib.sha256(data).hexdigest() != rec.get("sha256"):
        raise CheckpointError(str(path), f"does not match the SHA-256 recorded in {MANIFEST_FILE} "
                              f"({len(data)} bytes, {rec.get('bytes')} expected): it was modified or truncated "
                              "after export", "copy the export directory again or re-export the run.")
    problem = archive_problem(data)
    if problem is not None:
        raise CheckpointError(str(path), f"was refused before loading: {problem}, which loading would unpickle "
                              "(and so could run code); mnemode never writes such entries, so the file may have "
                              "been tampered with", "do not use it; re-export the run or obtain the export from its "
                              "author again (signed: `mnemode export --key-file`).")
    try:
        return torch.export.load(io.BytesIO(data)).module()
    except Exception as exc:
        raise CheckpointError(str(path), f"cannot be loaded by torch.export ({type(exc).__name__}); it was "
                              f"written with torch {manifest.get('versions', {}).get('torch')}, this is "
                              f"torch {torch.__version__}",
                              "load it with the torch version that wrote it, or re-export the run.") from None


def _load_compiled(directory: Path, manifest: dict, verify: bool, with_warm_up: bool):
    """The ahead-of-time compiled step, warm-up (or ``None``) and block (or ``None``) programs, hash-checked."""
    rec = manifest.get("compiled") or {}
    files = [rec.get(role, {}).get("file") for role in ("step", "warm_up")[: 2 if with_warm_up else 1]]
    block_file = (rec.get("block") or {}).get("file")
    if not all(files):
        why = "; ".join(f"{r}: {v.get('reason')}" for r, v in rec.items() if v.get("reason")) or "not requested"
        raise CheckpointError(str(directory / MANIFEST_FILE), f"lists no compiled programs ({why})",
                              "load without compiled=True, or re-export with `mnemode export --compiled` on a "
                              "machine with a C++ compiler.")
    from torch._inductor import aoti_load_package

    out = []
    for name in files + ([block_file] if block_file else []):
        path = directory / name
        entry = manifest.get("files", {}).get(name, {})
        data = path.read_bytes() if path.is_file() else b""
        if not data or (verify and hashlib.sha256(data).hexdigest() != entry.get("sha256")):
            raise CheckpointError(str(path), "is missing or does not match the SHA-256 in the manifest",
                                  "copy the export directory again or re-export the run.")
        out.append(aoti_load_package(str(path)))
    return out[0], (out[1] if with_warm_up else None), (out[-1] if block_file else None)


def read_key(key_file=None) -> bytes | None:
    """A signing key from ``key_file`` (trailing newline dropped) or the ``MNEMODE_SIGNING_KEY`` variable."""
    if key_file is not None:
        try:
            data = Path(key_file).read_bytes().rstrip(b"\r\n")
        except OSError as exc:
            raise ConfigError(str(key_file), f"cannot be read as a key file ({type(exc).__name__})",
                              "pass a file holding the signing key.") from None
        if not data:
            raise ConfigError(str(key_file), "is empty", "write the signing key into it.")
        return data
    env = os.environ.get(KEY_ENV)
    return env.encode("utf-8") if env else None


def load_simulator(path, envelope_margin: float | None = None, on_envelope: str = "warn",
                   verify: bool = True, key=None, compiled: bool = False) -> "Simulator":
    """Load an exported simulator after checking its files; never runs code from them.

    Checks, in order: the signature of the manifest when ``key`` is given
    (HMAC-SHA256, :mod:`mnemode.archive`), each program's SHA-256 against the
    manifest, and each program archive's entries (anything ``torch.export.load``
    would unpickle is refused) -- only then are the programs loaded.

    Args:
        path: the export directory (``RUN_DIR/export/<model>``, or ``RUN_DIR/export``
            for the run's default model), or its ``simulator.pt2`` / ``simulator.json``.
        envelope_margin: widening of each training range, as a fraction of it,
            before the guard acts (default: the manifest's ``default_margin``).
        on_envelope: ``'warn'`` (:class:`EnvelopeWarning`, once per call),
            ``'error'`` (:class:`EnvelopeError` at the first excursion) or ``'ignore'``.
            A state that turns non-finite stops the rollout in every mode.
        verify: check the SHA-256 hashes (leave on outside tests of tampering).
        key: the signing key (bytes or str); when given, an unsigned export or a
            signature that does not match is refused.
        compiled: run the ahead-of-time compiled programs (``mnemode export --compiled``)
            instead of the ``.pt2`` ones (many times faster per step). A compiled
            package holds native code that runs when it is loaded, so it is loaded
            only when asked, after its hash (and, with ``key``, the signature) is
            checked: load compiled packages only from exports you made or trust.

    Raises:
        CheckpointError: missing/unreadable manifest or program, a hash or
            signature that does not match, a program archive with pickled
            entries, a format version this code cannot read.
        ConfigError: a bad ``on_envelope`` or ``envelope_margin``.
    """
    if on_envelope not in _ON_ENVELOPE:  # before the (slower) program loads
        raise ConfigError("on_envelope", f"is {on_envelope!r}; expected one of {_ON_ENVELOPE}",
                          "pass 'warn' (default), 'error' or 'ignore'.")
    key = key.encode("utf-8") if isinstance(key, str) else key
    directory = _resolve(path)
    manifest = _read_manifest(directory, key)
    try:
        step_file = manifest["programs"]["step"]["file"]
        wu_file = manifest["programs"]["warm_up"]["file"] if manifest["state"]["hidden_size"] > 0 else None
    except (KeyError, TypeError):
        raise CheckpointError(str(directory / MANIFEST_FILE), "is incomplete (no program entries)",
                              "re-export the run or copy the export directory again.") from None
    block = None
    if compiled:
        step, wu, block = _load_compiled(directory, manifest, verify, wu_file is not None)
    else:
        step = _load_program(directory, step_file, manifest, verify)
        wu = _load_program(directory, wu_file, manifest, verify) if wu_file else None
    try:
        return Simulator(manifest, step, wu, directory=directory, envelope_margin=envelope_margin,
                         on_envelope=on_envelope, block_program=block)
    except (KeyError, TypeError, ValueError) as exc:
        raise CheckpointError(str(directory / MANIFEST_FILE), f"is incomplete or malformed ({type(exc).__name__}: "
                              f"{exc})", "re-export the run or copy the export directory again.") from None


# -- the simulator ----------------------------------------------------------------------

def _step_kind(manifest: dict, forced: bool) -> str:
    """``'autonomous'``, ``'timed'`` or ``'forced'``: from the step program's recorded inputs.

    Manifests of format 1 written before programs listed their inputs are autonomous.
    """
    inputs = (manifest.get("programs", {}).get("step") or {}).get("inputs")
    if not isinstance(inputs, dict):
        return "forced" if forced else "autonomous"
    names = tuple(inputs)
    kinds = {("state",): "autonomous", ("t", "state"): "timed", ("t", "state", "u_a", "u_b"): "forced"}
    if names not in kinds or (kinds[names] == "forced") != forced:
        raise ValueError(f"step program inputs {list(names)} do not match a {'forced' if forced else 'unforced'} "
                         "simulator (expected [state], [t, state] or [t, state, u_a, u_b])")
    return kinds[names]


def _bounds(env: dict, names, margin: float, dtype) -> tuple[torch.Tensor, torch.Tensor]:
    lo = np.array([env[n][0] for n in names], dtype=np.float64)
    hi = np.array([env[n][1] for n in names], dtype=np.float64)
    width = hi - lo
    return torch.as_tensor(lo - margin * width, dtype=dtype), torch.as_tensor(hi + margin * width, dtype=dtype)


class Simulator:
    """A frozen corrected simulator: one-step map, warm-up map, manifest and envelope guard.

    Build it with :func:`load_simulator`. States are ``[x, r]`` on the last axis:
    ``x`` the observed components (``state_names``), ``r`` the ``hidden_size``
    hidden components. Inputs may be tensors of the simulator's dtype, numpy
    arrays or nested lists (converted).

    A forced simulator (``forcing_names`` not empty) takes forcing samples
    ``(L, B, U)`` or ``(L, U)`` (the same for every trajectory) at the
    observation times, linear between them: ``n_steps + 1`` samples from ``x0``,
    or ``T + n_steps`` with a history of ``T`` samples (the history's times, then
    the forecast's). Its physics sees the rollout's clock: ``t0`` at the start
    state (default 0), ``t0 + k·Δt`` at step ``k`` (plus the solver's sub-steps),
    the history at ``t0 − (T − 1)·Δt … t0``. ``t0`` is one float for the whole
    batch; pass the start state's true time for physics that reads ``t``. A
    timed simulator (``step_kind == 'timed'``: no forcing, physics that reads
    ``t``) runs on the same clock: its step program takes ``t0 + k·Δt``. An
    autonomous one's program restarts ``t`` at 0 each interval, so ``t0`` only
    labels its output times.
    """

    def __init__(self, manifest: dict, step_program, warm_up_program=None, *, directory: Path | None = None,
                 envelope_margin: float | None = None, on_envelope: str = "warn", block_program=None):
        self.manifest = manifest
        self.directory = directory
        self._step = step_program
        self._warm = warm_up_program
        # a compiled block program (several intervals per call) and its length, when loaded
        self._block = block_program
        self._block_steps = int((manifest.get("compiled") or {}).get("block", {}).get("steps", 0) or 0)
        st = manifest["state"]
        self.state_names: tuple[str, ...] = tuple(st["names"])
        self.state_units: tuple[str, ...] = tuple(st.get("units", ()))
        self.dim: int = int(st["dim"])
        self.hidden_size: int = int(st["hidden_size"])
        self.dt: float = float(manifest["time"]["dt"])
        self.time_unit: str = manifest["time"].get("unit", "")
        self.dtype: torch.dtype = _DTYPES[manifest["dtype"]]
        self.warm_up_steps: int = int(manifest["hidden_init"].get("warm_up_steps", 0))
        init = manifest["hidden_init"].get("initial_vector")
        self._r_init = torch.tensor(init, dtype=self.dtype) if self.hidden_size else None
        forcing = manifest.get("forcing") or {}
        self.forcing_names: tuple[str, ...] = tuple(forcing.get("names", ()))
        self.forcing_units: tuple[str, ...] = tuple(forcing.get("units", ("",) * len(self.forcing_names)))
        self.step_kind: str = _step_kind(manifest, self.forced)
        env = manifest["envelope"]
        self.envelope: dict[str, list[float]] = {k: list(v) for k, v in env["components"].items()}
        self.forcing_envelope: dict[str, list[float]] = {k: list(v) for k, v in (forcing.get("envelope") or {}).items()}
        self.hidden_envelope = env.get("hidden")
        self.envelope_margin = env.get("default_margin", 0.1) if envelope_margin is None else envelope_margin
        self.on_envelope = on_envelope

    @property
    def forced(self) -> bool:
        return bool(self.forcing_names)

    @property
    def timed(self) -> bool:
        """Whether the step program takes the rollout's clock ``t`` without forcing inputs."""
        return self.step_kind == "timed"

    @property
    def history_length(self) -> int:
        """Observations a warm-up needs: ``warm_up_steps + 1`` (1 when memoryless)."""
        return self.warm_up_steps + 1 if self.hidden_size else 1

    # -- settings -------------------------------------------------------------
    @property
    def on_envelope(self) -> str:
        return self._on_envelope

    @on_envelope.setter
    def on_envelope(self, value: str) -> None:
        if value not in _ON_ENVELOPE:
            raise ConfigError("on_envelope", f"is {value!r}; expected one of {_ON_ENVELOPE}",
                              "pass 'warn' (default), 'error' or 'ignore'.")
        self._on_envelope = value

    @property
    def envelope_margin(self) -> float:
        return self._margin

    @envelope_margin.setter
    def envelope_margin(self, value: float) -> None:
        try:
            m = float(value)
        except (TypeError, ValueError):
            m = math.nan
        if not (math.isfinite(m) and m >= 0):
            raise ConfigError("envelope_margin", f"is {value!r}; expected a number ≥ 0",
                              "use a fraction of each training range, e.g. 0.1.")
        self._margin = m
        self._lo, self._hi = _bounds(self.envelope, self.state_names, m, self.dtype)
        self._ulo = self._uhi = self._rlo = self._rhi = None
        if self.forced:
            self._ulo, self._uhi = _bounds(self.forcing_envelope, self.forcing_names, m, self.dtype)
        if self.hidden_envelope:
            hn = [f"r{i + 1}" for i in range(self.hidden_size)]
            self._rlo, self._rhi = _bounds(dict(zip(hn, self.hidden_envelope)), hn, m, self.dtype)

    def with_envelope(self, envelope_margin: float | None = None, on_envelope: str | None = None) -> "Simulator":
        """A simulator sharing these programs with other guard settings (no reload)."""
        return Simulator(self.manifest, self._step, self._warm, directory=self.directory,
                         envelope_margin=self._margin if envelope_margin is None else envelope_margin,
                         on_envelope=self._on_envelope if on_envelope is None else on_envelope,
                         block_program=self._block)

    def bounds(self) -> tuple[torch.Tensor, torch.Tensor]:
        """Lower and upper limits ``(D,)`` of the guarded region (envelope widened by the margin)."""
        return self._lo.clone(), self._hi.clone()

    def __repr__(self) -> str:
        where = f" from {self.directory}" if self.directory is not None else ""
        forced = f"; forcing {', '.join(self.forcing_names)}" if self.forced else ("; reads t" if self.timed else "")
        return (f"Simulator({', '.join(self.state_names)}{forced}; hidden_size={self.hidden_size}, dt={self.dt:g} "
                f"{self.time_unit}, {self.manifest['dtype']}{where})").replace(" ,", ",")

    # -- input checks -----------------------------------------------------------
    def _components(self) -> str:
        return ", ".join(self.state_names)

    def _tensor(self, value, what: str) -> torch.Tensor:
        dname = str(self.dtype).replace("torch.", "")
        if isinstance(value, torch.Tensor):
            if value.dtype != self.dtype:
                raise DataError(what, f"is a {value.dtype} tensor; this simulator was exported in {dname}",
                                f"pass {what}.to(torch.{dname}) (numpy arrays and lists are converted for you).")
            t = value.detach().cpu()
        else:
            try:
                t = torch.as_tensor(np.asarray(value, dtype=np.float64), dtype=self.dtype)
            except (TypeError, ValueError, OverflowError):
                raise DataError(what, f"is a {type(value).__name__} that is not an array of numbers",
                                "pass a tensor, numpy array or nested list of floats.") from None
        if not bool(torch.isfinite(t).all()):
            raise DataError(what, "holds non-finite values (NaN or inf)", "remove or fill the missing values.")
        return t

    def _batch_of_states(self, value, what: str, widths: tuple[int, ...]) -> tuple[torch.Tensor, bool]:
        t = self._tensor(value, what)
        given = tuple(t.shape)
        single = t.ndim == 1
        if single:
            t = t[None]
        if t.ndim != 2 or t.shape[-1] not in widths or t.shape[0] < 1:
            want = f"(B, {self.dim}) with components ({self._components()}) or ({self.dim},), B ≥ 1"
            if self.dim + self.hidden_size in widths and self.hidden_size:
                want += f", or (B, {self.dim + self.hidden_size}) for [x, r] with {self.hidden_size} hidden components"
            raise DataError(what, f"has shape {given}; expected {want}", f"reshape {what} to one row per trajectory.")
        return t, single

    def _hidden(self, r0, batch: int) -> torch.Tensor:
        if r0 is None:
            return self._r_init.expand(batch, -1).clone()
        r, _ = self._shape_hidden(r0)
        if r.shape[0] == 1 and batch > 1:
            r = r.expand(batch, -1).clone()
        if r.shape[0] != batch:
            raise DataError("r0", f"has {r.shape[0]} rows but the initial states have {batch}",
                            "give one hidden state per trajectory, or one for all.")
        return r

    def _shape_hidden(self, r0):
        if not self.hidden_size:
            raise DataError("r0", "was given but this simulator is memoryless (hidden_size 0)", "drop r0.")
        r = self._tensor(r0, "r0")
        given = tuple(r.shape)
        single = r.ndim == 1
        if single:
            r = r[None]
        if r.ndim != 2 or r.shape[-1] != self.hidden_size or r.shape[0] < 1:
            raise DataError("r0", f"has shape {given}; "
                            f"expected (B, {self.hidden_size}) or ({self.hidden_size},) hidden components",
                            "pass the hidden state returned by warm_up().")
        return r, single

    def _history(self, history) -> torch.Tensor:
        h = self._tensor(history, "history")
        if h.ndim == 2:
            h = h[:, None, :]
        if h.ndim != 3 or h.shape[-1] != self.dim or h.shape[0] < 2 or h.shape[1] < 1:
            raise DataError("history", f"has shape {tuple(h.shape)}; expected (T, B, {self.dim}) or (T, {self.dim}) "
                            f"with components ({self._components()}) and T ≥ 2 "
                            f"(a full warm-up needs T = {self.history_length})",
                            "pass observed states in (time, batch, component) order, oldest first.")
        return h

    def _forcing(self, forcing, length: int, batch: int) -> torch.Tensor | None:
        """Forcing samples ``(length, batch, U)`` checked against the manifest, or ``None`` when autonomous."""
        if not self.forced:
            if forcing is not None:
                raise DataError("forcing", "was given but this simulator is autonomous (its manifest names no "
                                "forcing inputs)", "drop forcing.")
            return None
        k = len(self.forcing_names)
        if forcing is None:
            raise DataError("forcing", f"is missing; this simulator is driven by {k} forcing input(s) "
                            f"({', '.join(self.forcing_names)})",
                            f"pass forcing samples ({length}, B, {k}) or ({length}, {k}) at the observation times.")
        u = self._tensor(forcing, "forcing")
        given = tuple(u.shape)
        if u.ndim == 2:
            u = u[:, None, :].expand(-1, batch, -1)
        if u.ndim != 3 or u.shape[-1] != k or u.shape[0] != length or u.shape[1] not in (1, batch):
            raise DataError("forcing", f"has shape {given}; expected ({length}, {batch}, {k}) or ({length}, {k}): "
                            f"one sample of ({', '.join(self.forcing_names)}) per observation time "
                            "(history rows + steps with a history, steps + 1 without)",
                            "give forcing samples covering the history and the whole forecast.")
        return u.expand(-1, batch, -1) if u.shape[1] == 1 else u

    # -- guards ---------------------------------------------------------------------
    def _guard(self, x: torch.Tensor, what: str, step: int | None = None, part: str = "state",
               t0: float = 0.0) -> bool:
        """Act on the first component of ``x`` (``(..., n)``) outside its guarded region; True if outside."""
        if self._on_envelope == "ignore":
            return False
        names, lo_t, hi_t, env = {
            "state": (self.state_names, self._lo, self._hi, self.envelope),
            "forcing": (self.forcing_names, self._ulo, self._uhi, self.forcing_envelope),
            "hidden": (tuple(f"r{i + 1}" for i in range(self.hidden_size)), self._rlo, self._rhi,
                       dict(zip((f"r{i + 1}" for i in range(self.hidden_size)), self.hidden_envelope or []))),
        }[part]
        if lo_t is None:
            return False
        bad = (x < lo_t) | (x > hi_t)
        if not bool(bad.any()):
            return False
        idx = tuple(int(i) for i in bad.nonzero()[0])
        comp = idx[-1]
        name = names[comp]
        value = float(x[idx])
        lo, hi = env[name]
        where = what if step is None else self._at(what, step, t0)
        if x.ndim > 2:
            where += f", sample {idx[0]}"
        if x.ndim > 1:
            where += f", trajectory {idx[-2]}"
        label = {"state": "component", "forcing": "forcing input", "hidden": "hidden component"}[part]
        region = "training envelope" if part != "hidden" else "range it took in the export's check runs"
        msg = (f"{label} {name!r} = {value:.6g} is outside the {region} [{float(lo_t[comp]):.6g}, "
               f"{float(hi_t[comp]):.6g}] ([{lo:.6g}, {hi:.6g}] widened by {self._margin:g} × range); the learned "
               "correction is extrapolating there")
        fix = ("keep the inputs inside the envelope, retrain on data that cover this region, or accept "
               "extrapolation knowingly with on_envelope='ignore' or a larger envelope_margin.")
        if self._on_envelope == "error":
            raise EnvelopeError(where, msg, fix)
        warnings.warn(EnvelopeWarning(f"{where}: {msg}. Further excursions in this call are not reported. "
                                      f"Fix: {fix}"), stacklevel=_caller_level())
        return True

    def _at(self, what: str, step: int, t0: float) -> str:
        """``"<what> at step k (t = … unit)"``, without a dangling space when the time has no unit."""
        when = f"{t0 + step * self.dt:g} {self.time_unit}".strip()
        return f"{what} at step {step} (t = {when})"

    def _finite(self, s: torch.Tensor, what: str, step: int, t0: float) -> None:
        """Stop with :class:`NonFiniteStateError` when any component of ``s`` (``(B, n)``) is NaN or inf."""
        if bool(torch.isfinite(s).all()):
            return
        b, c = (int(i) for i in (~torch.isfinite(s)).nonzero()[0])
        names = list(self.state_names) + [f"r{i + 1}" for i in range(self.hidden_size)]
        if what == "warm-up":
            names = names[self.dim:]
        raise NonFiniteStateError(
            f"{self._at(what, step, t0)}, trajectory {b}",
            f"component {names[c]!r} became {float(s[b, c])}; the simulator blew up (the state had left the "
            "region where the learned correction is trustworthy)",
            "start inside the training envelope, shorten the rollout, or retrain on data covering this region; "
            "the trajectory up to the previous step is valid output of the model.")

    # -- running ------------------------------------------------------------------
    def initial_hidden(self, batch: int = 1) -> torch.Tensor | None:
        """The hidden state before warm-up (manifest's ``initial_vector``), ``(batch, d_r)``."""
        return None if not self.hidden_size else self._r_init.expand(batch, -1).clone()

    def split(self, state: torch.Tensor):
        """``(x, r)`` of full states ``(..., D + d_r)``."""
        return state[..., : self.dim], state[..., self.dim:]

    def _call_step(self, s: torch.Tensor, t: float, u: torch.Tensor | None, k: int) -> torch.Tensor:
        if self.step_kind == "autonomous":
            return self._step(s)
        if self.step_kind == "timed":
            return self._step(torch.tensor(t, dtype=self.dtype), s)
        return self._step(torch.tensor(t, dtype=self.dtype), s, u[k], u[k + 1])

    def step(self, state, forcing=None, t: float = 0.0) -> torch.Tensor:
        """One observation interval: ``[x, r]`` at ``t`` → ``[x, r]`` at ``t + Δt``.

        Args:
            state: ``(B, D + d_r)`` full states, or ``(B, D)`` observed states
                (the hidden part then starts from the initial vector); ``(D,)``
                or ``(D + d_r,)`` for one state.
            forcing: forced simulators only: the samples at ``t`` and ``t + Δt``,
                ``(2, B, U)`` or ``(2, U)``.
            t: the interval's start on the rollout's clock (forced and timed simulators).

        Returns:
            The next full state ``(B, D + d_r)`` (``(D + d_r,)`` for one state).
        """
        widths = (self.dim, self.dim + self.hidden_size)
        s, single = self._batch_of_states(state, "state", widths)
        if s.shape[-1] == self.dim and self.hidden_size:
            s = torch.cat((s, self._hidden(None, s.shape[0])), dim=-1)
        u = self._forcing(forcing, 2, s.shape[0])
        watch = _Watch(self)
        watch(s[..., : self.dim], "state")
        if u is not None:
            watch(u, "forcing", part="forcing")
        with torch.no_grad():
            out = self._call_step(s, float(t), u, 0)
        self._finite(out, "step", 1, float(t))
        watch(out[..., : self.dim], "state after one step", 1, t0=float(t))
        return out[0] if single else out

    def warm_up(self, history, r0=None, forcing=None, t0: float = 0.0) -> torch.Tensor | None:
        """Hidden state after being driven by an observed ``history`` ``(T, B, D)`` (or ``(T, D)``).

        ``r_{k+1} = warm_up(x_k, x_{k+1}, r_k)`` from ``r0`` (default: the initial
        vector) over the ``T − 1`` intervals; a forced simulator also takes the
        ``T`` forcing samples at the history's times, the last at ``t0``. The
        model was fitted with ``T = history_length``; a shorter history warns
        (the hidden state will not have forgotten its start). Returns ``None``
        when memoryless.
        """
        h = self._history(history)
        u = self._forcing(forcing, h.shape[0], h.shape[1])
        return self._warm_up(h, r0, _Watch(self), u, float(t0))

    def _warm_up(self, h: torch.Tensor, r0, watch: "_Watch", u: torch.Tensor | None, t_end: float):
        if not self.hidden_size:
            return None
        if h.shape[0] < self.history_length:
            warnings.warn(f"history has {h.shape[0]} samples but the model was fitted with warm-ups of "
                          f"{self.history_length}; the hidden state may still remember its start",
                          UserWarning, stacklevel=_caller_level())
        watch(h, "history")
        if u is not None:
            watch(u, "forcing over the history", part="forcing")
        r = self._hidden(r0, h.shape[1])
        t_first = t_end - (h.shape[0] - 1) * self.dt
        with torch.no_grad():
            for k in range(h.shape[0] - 1):
                if u is None:
                    r = self._warm(h[k], h[k + 1], r)
                else:
                    t = torch.tensor(t_first + k * self.dt, dtype=self.dtype)
                    r = self._warm(t, h[k], h[k + 1], r, u[k], u[k + 1])
                self._finite(r, "warm-up", k + 1, t_first)
        return r

    def _start(self, x0, n_steps, history, r0, forcing, t0: float, cold_start: bool, watch: "_Watch"):
        """The full start state ``[x0, r0]`` and the forcing samples of the forecast."""
        if not isinstance(n_steps, (int, np.integer)) or isinstance(n_steps, bool) or n_steps < 0:
            raise ConfigError("n_steps", f"is {n_steps!r}; expected an integer ≥ 0", "pass the number of intervals.")
        if not (isinstance(t0, (int, float, np.floating)) and math.isfinite(float(t0))):
            raise ConfigError("t0", f"is {t0!r}; expected a finite time", "pass the time of the start state.")
        r = None
        u_fore = None
        if history is not None:
            h = self._history(history)
            u_all = self._forcing(forcing, h.shape[0] + int(n_steps), h.shape[1])
            if u_all is not None:
                u_fore = u_all[h.shape[0] - 1:]
            if self.hidden_size:
                r = self._warm_up(h, r0, watch, None if u_all is None else u_all[: h.shape[0]], float(t0))
            else:
                if r0 is not None:
                    self._shape_hidden(r0)
                watch(h, "history")
            x, _ = (h[-1], False) if x0 is None else self._batch_of_states(x0, "x0", (self.dim,))
            if x.shape[0] != h.shape[1]:
                raise DataError("x0", f"has {x.shape[0]} rows but history has {h.shape[1]} trajectories",
                                "give one initial state per history trajectory (or omit x0 to start at the "
                                "last observation).")
        elif x0 is None:
            raise DataError("rollout", "needs a starting point: x0 or history", "pass x0 or history.")
        else:
            x, _ = self._batch_of_states(x0, "x0", (self.dim,))
            if self.hidden_size:
                if r0 is None and not cold_start:
                    raise DataError("rollout", f"starts a model with memory ({self.hidden_size} hidden components) "
                                    "from x0 alone, so its hidden state would be the untrained initial vector",
                                    f"pass a history of {self.history_length} observations (warm_up_steps + 1) to "
                                    "warm it up, or r0, or start cold knowingly (cold_start=True, `--cold-start`).")
                r = self._hidden(r0, x.shape[0])
            elif r0 is not None:
                self._shape_hidden(r0)
            u_fore = self._forcing(forcing, int(n_steps) + 1, x.shape[0])
        watch(x, "x0")
        if u_fore is not None:
            watch(u_fore, "forcing", part="forcing")
        return (x if r is None else torch.cat((x, r), dim=-1)), u_fore

    def _run(self, s0: torch.Tensor, n_steps: int, watch: "_Watch", u: torch.Tensor | None = None,
             t0: float = 0.0, progress=None) -> torch.Tensor:
        """``n_steps`` intervals from ``s0``; the checks of each step run once per chunk of steps.

        Steps are taken a chunk at a time (the compiled block program's length when
        there is one, else :data:`_CHECK_EVERY` single steps), then the chunk's states
        are checked together: the first step that is non-finite or outside the
        envelope is found and reported exactly as a step-by-step check would report
        it (same step, same message, same order); only the states computed after a
        blow-up within its chunk are wasted work.
        """
        out = torch.empty((n_steps + 1, *s0.shape), dtype=self.dtype)
        out[0] = s0
        s, k = s0, 0
        block = self._block if (self._block is not None and self.step_kind == "autonomous") else None
        with torch.no_grad():
            while k < n_steps:
                if block is not None and n_steps - k >= self._block_steps:
                    n = self._block_steps
                    out[k + 1: k + 1 + n] = block(s)
                else:
                    n = min(_CHECK_EVERY, n_steps - k)
                    for j in range(n):
                        s = self._call_step(s, t0 + (k + j) * self.dt, u, k + j)
                        out[k + 1 + j] = s
                self._check_chunk(out[k + 1: k + 1 + n], k + 1, watch, t0)
                s = out[k + n]
                k += n
                if progress is not None:
                    progress(n)
        return out

    def _check_chunk(self, chunk: torch.Tensor, first: int, watch: "_Watch", t0: float) -> None:
        """Finiteness and envelope checks of consecutive states ``(n, B, width)``, the first at step ``first``."""
        flags = ~torch.isfinite(chunk).flatten(1).all(1)
        parts = []
        if watch.active:
            parts = [(sl, part, lo, hi) for sl, part, lo, hi in (
                (slice(None, self.dim), "state", self._lo, self._hi),
                (slice(self.dim, None), "hidden", self._rlo, self._rhi)) if lo is not None
                and (part == "state" or self.hidden_size)]
            for sl, _, lo, hi in parts:
                x = chunk[..., sl]
                flags = flags | ((x < lo) | (x > hi)).flatten(1).any(1)
        for j in flags.nonzero().flatten().tolist():  # the flagged steps only, in order
            self._finite(chunk[j], "rollout", first + j, t0)
            for sl, part, _, _ in parts:
                if watch.active:
                    watch(chunk[j][..., sl], "rollout", first + j, part=part, t0=t0)

    def rollout(self, x0, n_steps: int, history=None, r0=None, return_hidden: bool = False, forcing=None,
                t0: float = 0.0, cold_start: bool = False):
        """Free-run ``n_steps`` observation intervals.

        Args:
            x0: initial observed states ``(B, D)`` or ``(D,)``; with ``history``
                it may be ``None`` (start at the last observation).
            n_steps: number of intervals.
            history: observed ``(T, B, D)`` (or ``(T, D)``) to warm the hidden
                state up from first (``history_length`` samples for a full warm-up).
            r0: hidden state at ``x0`` (no history) or where the warm-up starts
                (with history); default the initial vector.
            return_hidden: also return the hidden states.
            forcing: forced simulators: samples ``(L, B, U)`` or ``(L, U)`` at the
                observation times, ``L = T + n_steps`` with a history of ``T``
                samples, else ``n_steps + 1``.
            t0: the time of the start state on the rollout's clock, one float (forced
                and timed simulators' physics sees ``t0 + k·Δt`` at step ``k``; the
                history ends there).
            cold_start: let a model with memory start from ``x0`` without a
                warm-up or ``r0`` (its hidden state is then the initial vector).

        Returns:
            Observed states ``(n_steps + 1, B, D)`` (row 0 is ``x0``), and hidden
            states ``(n_steps + 1, B, d_r)`` if ``return_hidden``.

        Raises:
            DataError: bad shapes, dtypes, non-finite inputs, a wrong forcing
                length, or a memory model started from ``x0`` alone.
            EnvelopeError: an excursion with ``on_envelope='error'``.
            NonFiniteStateError: the state turned non-finite (every mode).
        """
        watch = _Watch(self)
        s0, u = self._start(x0, n_steps, history, r0, forcing, t0, cold_start, watch)
        traj = self._run(s0, int(n_steps), watch, u, float(t0))
        x, r = self.split(traj)
        return (x, r) if return_hidden else x


#: single steps taken between checks of a rollout (:meth:`Simulator._run`)
_CHECK_EVERY = 64


class _Watch:
    """One call's envelope watch: the guard acts on the first excursion only (then stays quiet)."""

    def __init__(self, sim: Simulator):
        self.sim = sim
        self.active = sim.on_envelope != "ignore"

    def __call__(self, x: torch.Tensor, what: str, step: int | None = None, part: str = "state",
                 t0: float = 0.0) -> None:
        if self.active and self.sim._guard(x, what, step, part, t0):
            self.active = False


def _caller_level() -> int:
    """``stacklevel`` that points a warning at the first frame outside this module."""
    import sys

    level, frame = 1, sys._getframe(1)
    while frame is not None and frame.f_code.co_filename == __file__:
        frame, level = frame.f_back, level + 1
    return level


# -- rollout to a file -------------------------------------------------------------

def write_rollout_csv(fh, names, units, times, x, u=None, forcing_names=(), forcing_units=(), hidden=None,
                      hidden_names=(), dt=None, time_unit="") -> None:
    """The one CSV layout of a rollout (also written by ``scripts/run_exported_simulator.py``).

    ``# units: ...`` (one per value column), ``# mnemode exported simulator rollout: dt=...``,
    then the header ``trajectory,time,<states>[,<forcing>][,<hidden>]`` and one row per
    trajectory and time, trajectory by trajectory, values written with ``repr``.
    """
    cols_units = [*units, *forcing_units, *[""] * len(hidden_names)]
    fh.write("# units: " + ",".join(cols_units) + "\n")
    fh.write(f"# mnemode exported simulator rollout: dt={dt!r} {time_unit}\n")
    fh.write(",".join(["trajectory", "time", *names, *forcing_names, *hidden_names]) + "\n")
    for b in range(x.shape[1]):
        for i in range(x.shape[0]):
            row = [str(b), repr(float(times[i]))] + [repr(float(v)) for v in x[i, b]]
            if u is not None:
                row += [repr(float(v)) for v in u[i, b]]
            if hidden is not None:
                row += [repr(float(v)) for v in hidden[i, b]]
            fh.write(",".join(row) + "\n")


def rollout_to_file(simulator: Simulator, x0, n_steps: int, out_path, history=None, progress: bool = True,
                    overwrite: bool = False, r0=None, include_hidden: bool = False, forcing=None,
                    t0: float = 0.0, cold_start: bool = False) -> Path:
    """Roll a simulator out and write the trajectory to ``.csv`` or ``.npz``.

    The files read back with :func:`mnemode.load_trajectories`: CSV in the layout
    of :func:`write_rollout_csv`; NPZ holds ``times`` ``(T,)``, ``states``
    ``(T, B, D)``, ``names``, ``units``, ``meta`` (and ``forcing``/``forcing_names``
    for a forced simulator, ``hidden`` when ``include_hidden``). Times start at
    ``t0`` at ``x0`` (pass the history's last time to continue its clock).

    Raises:
        MnemodeError: ``out_path`` exists and ``overwrite`` is false (checked
            before any work), or an unknown suffix; and whatever
            :meth:`Simulator.rollout` raises.
    """
    path = Path(out_path)
    if path.suffix not in (".csv", ".npz"):
        raise DataError(str(path), f"has suffix {path.suffix!r}; expected .csv or .npz",
                        "name the output file with a .csv or .npz suffix.")
    if path.exists() and not overwrite:
        raise MnemodeError(str(path), "already exists; a rollout never overwrites a file",
                           "choose another output path or delete the file first (overwrite=True; `--overwrite` on the command line).")
    watch = _Watch(simulator)
    s0, u = simulator._start(x0, n_steps, history, r0, forcing, t0, cold_start, watch)
    bar = None
    if progress and n_steps >= 1000:
        try:
            from tqdm.auto import tqdm

            bar = tqdm(total=int(n_steps), desc="rollout", unit="step", leave=False)
        except ImportError:  # progress bar is optional
            bar = None
    try:
        traj = simulator._run(s0, int(n_steps), watch, u, float(t0), bar.update if bar is not None else None)
    finally:
        if bar is not None:
            bar.close()
    x, r = simulator.split(traj)
    x, r = x.double().numpy(), r.double().numpy()
    un = None if u is None else u.double().numpy()
    times = float(t0) + np.arange(int(n_steps) + 1) * simulator.dt
    units = list(simulator.state_units) or [""] * simulator.dim
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(fd)
    try:
        if path.suffix == ".npz":
            meta = {"source": "mnemode exported simulator", "simulator": str(simulator.directory),
                    "dt": simulator.dt, "time_unit": simulator.time_unit,
                    "warmed_up": history is not None, "model_name": simulator.manifest.get("model_name")}
            arrays = dict(times=times, states=x, names=np.array(simulator.state_names), units=np.array(units),
                          meta=np.array(json.dumps(meta)))
            if un is not None:
                arrays.update(forcing=un, forcing_names=np.array(simulator.forcing_names))
            if include_hidden and simulator.hidden_size:
                arrays["hidden"] = r
            with open(tmp, "wb") as fh:
                np.savez(fh, **arrays)
        else:
            hidden_names = tuple(simulator.manifest["state"].get("hidden_names", [])) if include_hidden else ()
            with open(tmp, "w", encoding="utf-8", newline="") as fh:
                write_rollout_csv(fh, simulator.state_names, units, times, x, un, simulator.forcing_names,
                                  simulator.forcing_units, r if hidden_names else None, hidden_names,
                                  simulator.dt, simulator.time_unit)
        if path.exists() and not overwrite:  # appeared while we computed: still never overwrite
            raise MnemodeError(str(path), "appeared while the rollout ran; not overwritten",
                               "choose another output path.")
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return path


def read_forcing(path, names, times) -> np.ndarray:
    """Forcing samples ``(len(times), B, U)`` from a CSV file, linear between its rows.

    The file has a ``time`` column and one column per forcing input (named as in
    the manifest; other columns are ignored; ``#`` lines are comments) and,
    optionally, a ``trajectory`` column (one signal per trajectory, ``B`` of
    them; without it ``B = 1``). Each input is interpolated linearly at ``times``
    -- the piecewise-linear rule the model was fitted with -- which must lie
    within the file's time range.

    Raises:
        DataError: unreadable file, missing columns, non-numeric or non-finite
            values, times not increasing, or ``times`` outside the file's range.
    """
    import csv

    p = Path(path)
    try:
        with open(p, newline="", encoding="utf-8") as fh:
            rows = list(csv.DictReader(line for line in fh if not line.startswith("#")))
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise DataError(str(p), f"cannot be read as a CSV file ({type(exc).__name__})",
                        "pass a CSV file with a time column and the forcing columns.") from None
    missing = [c for c in ("time", *names) if not rows or c not in rows[0]]
    if missing:
        raise DataError(str(p), f"lacks the column(s) {missing} (or has no rows); a forcing file needs 'time' and "
                        f"{list(names)}", "name the columns as in the simulator's manifest (forcing.names).")
    groups: dict[str, list] = {}
    for i, row in enumerate(rows):
        try:
            values = [float(row["time"])] + [float(row[n]) for n in names]
        except (TypeError, ValueError):
            raise DataError(str(p), f"row {i + 1} holds a value that is not a number", "fix or remove the row.") from None
        if not all(math.isfinite(v) for v in values):
            raise DataError(str(p), f"row {i + 1} holds a non-finite value", "fill the missing forcing values.")
        groups.setdefault(row.get("trajectory", "0"), []).append(values)
    t = np.asarray(times, dtype=np.float64)
    out = []
    for label, g in groups.items():
        a = np.asarray(g)
        if len(a) < 2 or np.any(np.diff(a[:, 0]) <= 0):
            raise DataError(str(p), f"trajectory {label}: times must increase over at least two rows",
                            "sort the rows by time, one trajectory after another.")
        tol = 1e-9 * max(1.0, float(np.abs(a[:, 0]).max()))
        if t[0] < a[0, 0] - tol or t[-1] > a[-1, 0] + tol:
            raise DataError(str(p), f"trajectory {label}: covers times {a[0, 0]:g} to {a[-1, 0]:g} but the run needs "
                            f"{t[0]:g} to {t[-1]:g}", "give forcing over the whole history and forecast.")
        out.append(np.stack([np.interp(t, a[:, 0], a[:, 1 + j]) for j in range(len(names))], axis=-1))
    return np.stack(out, axis=1)
