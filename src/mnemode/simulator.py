"""Load and run an exported simulator: hash checks, shape and dtype checks, envelope guard.

A directory written by :func:`mnemode.export.export_simulator` holds
``simulator.pt2`` (one observation interval, ``[x, r] ↦ [x, r]``),
``warm_up.pt2`` when the model has memory (``(x_n, x_{n+1}, r_n) ↦ r_{n+1}``) and
``simulator.json`` (the manifest). :func:`load_simulator` checks the files
against the SHA-256 hashes in the manifest and returns a :class:`Simulator`::

    sim = load_simulator("runs/demo/export")
    traj = sim.rollout(None, 500, history=observed)     # (501, B, D)

Free-running with memory::

    r_0    = initial vector (manifest), or r0
    r_{k+1} = warm_up(x_k, x_{k+1}, r_k)   over the observed history x_0..x_W
    s_0    = [x0 (default x_W), r_W],  s_{n+1} = step(s_n)

The guard watches the observed components: component ``i`` is inside the
training envelope when ``min_i − m·(max_i − min_i) ≤ x_i ≤ max_i + m·(max_i − min_i)``
(``m`` the margin). Leaving it warns (:class:`EnvelopeWarning`), raises
(:class:`EnvelopeError`) or is ignored, as configured.

This module uses only torch, numpy, json and the standard library (plus
:mod:`mnemode.errors`) so that ``scripts/run_exported_simulator.py`` can mirror
it without mnemode installed.
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

from .errors import CheckpointError, ConfigError, DataError, MnemodeError

__all__ = ["load_simulator", "Simulator", "EnvelopeWarning", "EnvelopeError", "rollout_to_file",
           "FORMAT_NAME", "FORMAT_VERSION", "MANIFEST_FILE", "STEP_FILE", "WARM_UP_FILE"]

FORMAT_NAME = "mnemode-simulator"
FORMAT_VERSION = 1
MANIFEST_FILE = "simulator.json"
STEP_FILE = "simulator.pt2"
WARM_UP_FILE = "warm_up.pt2"
_ON_ENVELOPE = ("warn", "error", "ignore")
_DTYPES = {"float64": torch.float64, "float32": torch.float32}


class EnvelopeWarning(UserWarning):
    """A state left the training envelope (the correction is extrapolating)."""


class EnvelopeError(MnemodeError):
    """A state left the training envelope and the simulator was told to stop there."""


# -- loading ---------------------------------------------------------------------------

def _resolve(path) -> Path:
    p = Path(path)
    if p.is_dir():
        return p
    if p.suffix in (".pt2", ".json") and p.exists():
        return p.parent
    raise CheckpointError(str(p), "is not an exported simulator (no such directory, .pt2 or .json file)",
                          "pass the export directory (RUN_DIR/export) or its simulator.pt2 / simulator.json.")


def _read_manifest(directory: Path) -> dict:
    mpath = directory / MANIFEST_FILE
    if not mpath.is_file():
        raise CheckpointError(str(mpath), "manifest is missing",
                              "re-export the run (`mnemode export RUN_DIR`); the manifest is written last, so "
                              "a missing one means the export did not finish.")
    try:
        manifest = json.loads(mpath.read_text(encoding="utf-8"))
    except (OSError, ValueError, UnicodeDecodeError) as exc:
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
    try:
        return torch.export.load(io.BytesIO(data)).module()
    except Exception as exc:
        raise CheckpointError(str(path), f"cannot be loaded by torch.export ({type(exc).__name__}); it was "
                              f"written with torch {manifest.get('versions', {}).get('torch')}, this is "
                              f"torch {torch.__version__}",
                              "load it with the torch version that wrote it, or re-export the run.") from None


def load_simulator(path, envelope_margin: float | None = None, on_envelope: str = "warn",
                   verify: bool = True) -> "Simulator":
    """Load an exported simulator after checking its files against the manifest.

    Args:
        path: the export directory, or its ``simulator.pt2`` / ``simulator.json``.
        envelope_margin: widening of each training range, as a fraction of it,
            before the guard acts (default: the manifest's ``default_margin``).
        on_envelope: ``'warn'`` (:class:`EnvelopeWarning`, once per call),
            ``'error'`` (:class:`EnvelopeError` at the first excursion) or ``'ignore'``.
        verify: check the SHA-256 hashes (leave on outside tests of tampering).

    Raises:
        CheckpointError: missing/unreadable manifest or program, a hash that does
            not match, a format version this code cannot read.
        ConfigError: a bad ``on_envelope`` or ``envelope_margin``.
    """
    if on_envelope not in _ON_ENVELOPE:  # before the (slower) program loads
        raise ConfigError("on_envelope", f"is {on_envelope!r}; expected one of {_ON_ENVELOPE}",
                          "pass 'warn' (default), 'error' or 'ignore'.")
    directory = _resolve(path)
    manifest = _read_manifest(directory)
    try:
        step_file = manifest["programs"]["step"]["file"]
        wu_file = manifest["programs"]["warm_up"]["file"] if manifest["state"]["hidden_size"] > 0 else None
    except (KeyError, TypeError):
        raise CheckpointError(str(directory / MANIFEST_FILE), "is incomplete (no program entries)",
                              "re-export the run or copy the export directory again.") from None
    step = _load_program(directory, step_file, manifest, verify)
    wu = _load_program(directory, wu_file, manifest, verify) if wu_file else None
    try:
        return Simulator(manifest, step, wu, directory=directory, envelope_margin=envelope_margin,
                         on_envelope=on_envelope)
    except (KeyError, TypeError, ValueError) as exc:
        raise CheckpointError(str(directory / MANIFEST_FILE), f"is incomplete or malformed ({type(exc).__name__}: "
                              f"{exc})", "re-export the run or copy the export directory again.") from None


# -- the simulator ----------------------------------------------------------------------

class Simulator:
    """A frozen corrected simulator: one-step map, warm-up map, manifest and envelope guard.

    Build it with :func:`load_simulator`. States are ``[x, r]`` on the last axis:
    ``x`` the observed components (``state_names``), ``r`` the ``hidden_size``
    hidden components. Inputs may be tensors of the simulator's dtype, numpy
    arrays or nested lists (converted).
    """

    def __init__(self, manifest: dict, step_program, warm_up_program=None, *, directory: Path | None = None,
                 envelope_margin: float | None = None, on_envelope: str = "warn"):
        self.manifest = manifest
        self.directory = directory
        self._step = step_program
        self._warm = warm_up_program
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
        env = manifest["envelope"]
        self.envelope: dict[str, list[float]] = {k: list(v) for k, v in env["components"].items()}
        self.envelope_margin = env.get("default_margin", 0.1) if envelope_margin is None else envelope_margin
        self.on_envelope = on_envelope

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
        lo = np.array([self.envelope[n][0] for n in self.state_names])
        hi = np.array([self.envelope[n][1] for n in self.state_names])
        width = hi - lo
        self._lo = torch.as_tensor(lo - m * width, dtype=self.dtype)
        self._hi = torch.as_tensor(hi + m * width, dtype=self.dtype)

    def with_envelope(self, envelope_margin: float | None = None, on_envelope: str | None = None) -> "Simulator":
        """A simulator sharing these programs with other guard settings (no reload)."""
        return Simulator(self.manifest, self._step, self._warm, directory=self.directory,
                         envelope_margin=self._margin if envelope_margin is None else envelope_margin,
                         on_envelope=self._on_envelope if on_envelope is None else on_envelope)

    def bounds(self) -> tuple[torch.Tensor, torch.Tensor]:
        """Lower and upper limits ``(D,)`` of the guarded region (envelope widened by the margin)."""
        return self._lo.clone(), self._hi.clone()

    def __repr__(self) -> str:
        where = f" from {self.directory}" if self.directory is not None else ""
        return (f"Simulator({', '.join(self.state_names)}; hidden_size={self.hidden_size}, dt={self.dt:g} "
                f"{self.time_unit}, {self.manifest['dtype']}{where})").replace(" )", ")")

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
            except (TypeError, ValueError):
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
        if t.ndim != 2 or t.shape[-1] not in widths:
            names = self._components()
            want = f"(B, {self.dim}) with components ({names}) or ({self.dim},)"
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
        if r.ndim != 2 or r.shape[-1] != self.hidden_size:
            raise DataError("r0", f"has shape {given}; "
                            f"expected (B, {self.hidden_size}) or ({self.hidden_size},) hidden components",
                            "pass the hidden state returned by warm_up().")
        return r, single

    def _history(self, history) -> torch.Tensor:
        h = self._tensor(history, "history")
        if h.ndim == 2:
            h = h[:, None, :]
        if h.ndim != 3 or h.shape[-1] != self.dim or h.shape[0] < 2:
            raise DataError("history", f"has shape {tuple(h.shape)}; expected (T, B, {self.dim}) or (T, {self.dim}) "
                            f"with components ({self._components()}) and T ≥ 2 "
                            f"(the model was fitted with T = {self.warm_up_steps + 1})",
                            "pass observed states in (time, batch, component) order, oldest first.")
        return h

    # -- envelope guard ---------------------------------------------------------------
    def _guard(self, x: torch.Tensor, what: str, step: int | None = None) -> bool:
        """Act on the first component of ``x`` (``(..., D)``) outside the guarded region; True if outside."""
        if self._on_envelope == "ignore":
            return False
        bad = (x < self._lo) | (x > self._hi) | ~torch.isfinite(x)
        if not bool(bad.any()):
            return False
        idx = tuple(int(i) for i in bad.nonzero()[0])
        comp = idx[-1]
        name = self.state_names[comp]
        value = float(x[idx])
        lo, hi = self.envelope[name]
        where = f"{what} at step {step} (t = {step * self.dt:g} {self.time_unit})".rstrip() if step is not None \
            else what
        if x.ndim > 2:
            where += f", sample {idx[0]}"
        if x.ndim > 1:
            where += f", trajectory {idx[-2]}"
        msg = (f"component {name!r} = {value:.6g} is outside the training envelope [{float(self._lo[comp]):.6g}, "
               f"{float(self._hi[comp]):.6g}] (training range [{lo:.6g}, {hi:.6g}] widened by "
               f"{self._margin:g} × range); the learned correction is extrapolating there")
        fix = ("keep the inputs inside the envelope, retrain on data that cover this region, or accept "
               "extrapolation knowingly with on_envelope='ignore' or a larger envelope_margin.")
        if self._on_envelope == "error":
            raise EnvelopeError(where, msg, fix)
        warnings.warn(EnvelopeWarning(f"{where}: {msg}. Further excursions in this call are not reported. "
                                      f"Fix: {fix}"), stacklevel=_caller_level())
        return True

    # -- running ------------------------------------------------------------------
    def initial_hidden(self, batch: int = 1) -> torch.Tensor | None:
        """The hidden state before warm-up (manifest's ``initial_vector``), ``(batch, d_r)``."""
        return None if not self.hidden_size else self._r_init.expand(batch, -1).clone()

    def split(self, state: torch.Tensor):
        """``(x, r)`` of full states ``(..., D + d_r)``."""
        return state[..., : self.dim], state[..., self.dim:]

    def step(self, state) -> torch.Tensor:
        """One observation interval: ``[x, r]`` at ``t`` → ``[x, r]`` at ``t + Δt``.

        Args:
            state: ``(B, D + d_r)`` full states, or ``(B, D)`` observed states
                (the hidden part then starts from the initial vector); ``(D,)``
                or ``(D + d_r,)`` for one state.

        Returns:
            The next full state ``(B, D + d_r)`` (``(D + d_r,)`` for one state).
        """
        widths = (self.dim, self.dim + self.hidden_size)
        s, single = self._batch_of_states(state, "state", widths)
        if s.shape[-1] == self.dim and self.hidden_size:
            s = torch.cat((s, self._hidden(None, s.shape[0])), dim=-1)
        watch = _Watch(self)
        watch(s[..., : self.dim], "state")
        with torch.no_grad():
            out = self._step(s)
        watch(out[..., : self.dim], "state after one step", 1)
        return out[0] if single else out

    def warm_up(self, history, r0=None) -> torch.Tensor | None:
        """Hidden state after being driven by an observed ``history`` ``(T, B, D)`` (or ``(T, D)``).

        ``r_{k+1} = warm_up(x_k, x_{k+1}, r_k)`` from ``r0`` (default: the initial
        vector) over the ``T − 1`` intervals. The model was fitted with
        ``T = warm_up_steps + 1``; a shorter history warns (the hidden state
        will not have forgotten its start). Returns ``None`` when memoryless.
        """
        return self._warm_up(self._history(history), r0, _Watch(self))

    def _warm_up(self, h: torch.Tensor, r0, watch: "_Watch") -> torch.Tensor | None:
        if not self.hidden_size:
            return None
        if h.shape[0] < self.warm_up_steps + 1:
            warnings.warn(f"history has {h.shape[0]} samples but the model was fitted with warm-ups of "
                          f"{self.warm_up_steps + 1}; the hidden state may still remember its start",
                          UserWarning, stacklevel=_caller_level())
        watch(h, "history")
        r = self._hidden(r0, h.shape[1])
        with torch.no_grad():
            for k in range(h.shape[0] - 1):
                r = self._warm(h[k], h[k + 1], r)
        return r

    def _start(self, x0, n_steps, history, r0, watch: "_Watch") -> torch.Tensor:
        if not isinstance(n_steps, (int, np.integer)) or isinstance(n_steps, bool) or n_steps < 0:
            raise ConfigError("n_steps", f"is {n_steps!r}; expected an integer ≥ 0", "pass the number of intervals.")
        r = None
        if history is not None:
            h = self._history(history)
            if self.hidden_size:
                r = self._warm_up(h, r0, watch)
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
                r = self._hidden(r0, x.shape[0])
            elif r0 is not None:
                self._shape_hidden(r0)
        watch(x, "x0")
        return x if r is None else torch.cat((x, r), dim=-1)

    def _run(self, s0: torch.Tensor, n_steps: int, watch: "_Watch", progress=None) -> torch.Tensor:
        out = torch.empty((n_steps + 1, *s0.shape), dtype=self.dtype)
        out[0] = s0
        s = s0
        with torch.no_grad():
            for k in range(1, n_steps + 1):
                s = self._step(s)
                out[k] = s
                if watch.active:
                    watch(s[..., : self.dim], "rollout", k)
                if progress is not None:
                    progress(1)
        return out

    def rollout(self, x0, n_steps: int, history=None, r0=None, return_hidden: bool = False):
        """Free-run ``n_steps`` observation intervals.

        Args:
            x0: initial observed states ``(B, D)`` or ``(D,)``; with ``history``
                it may be ``None`` (start at the last observation).
            n_steps: number of intervals.
            history: observed ``(T, B, D)`` (or ``(T, D)``) to warm the hidden
                state up from first.
            r0: hidden state at ``x0`` (no history) or where the warm-up starts
                (with history); default the initial vector.
            return_hidden: also return the hidden states.

        Returns:
            Observed states ``(n_steps + 1, B, D)`` (row 0 is ``x0``), and hidden
            states ``(n_steps + 1, B, d_r)`` if ``return_hidden``.
        """
        watch = _Watch(self)
        traj = self._run(self._start(x0, n_steps, history, r0, watch), int(n_steps), watch)
        x, r = self.split(traj)
        return (x, r) if return_hidden else x


class _Watch:
    """One call's envelope watch: the guard acts on the first excursion only (then stays quiet)."""

    def __init__(self, sim: Simulator):
        self.sim = sim
        self.active = sim.on_envelope != "ignore"

    def __call__(self, x: torch.Tensor, what: str, step: int | None = None) -> None:
        if self.active and self.sim._guard(x, what, step):
            self.active = False


def _caller_level() -> int:
    """``stacklevel`` that points a warning at the first frame outside this module."""
    import sys

    level, frame = 1, sys._getframe(1)
    while frame is not None and frame.f_code.co_filename == __file__:
        frame, level = frame.f_back, level + 1
    return level


# -- rollout to a file -------------------------------------------------------------

def rollout_to_file(simulator: Simulator, x0, n_steps: int, out_path, history=None, progress: bool = True,
                    overwrite: bool = False, r0=None, include_hidden: bool = False) -> Path:
    """Roll a simulator out and write the trajectory to ``.csv`` or ``.npz``.

    The files read back with :func:`mnemode.load_trajectories`: CSV rows are
    ``trajectory, time, <components>`` after a ``# units:`` line; NPZ holds
    ``times`` ``(T,)``, ``states`` ``(T, B, D)``, ``names``, ``units``, ``meta``
    (and ``hidden`` when ``include_hidden``). Times start at 0 at ``x0``.

    Raises:
        MnemodeError: ``out_path`` exists and ``overwrite`` is false (checked
            before any work), or an unknown suffix.
    """
    path = Path(out_path)
    if path.suffix not in (".csv", ".npz"):
        raise DataError(str(path), f"has suffix {path.suffix!r}; expected .csv or .npz",
                        "name the output file with a .csv or .npz suffix.")
    if path.exists() and not overwrite:
        raise MnemodeError(str(path), "already exists; a rollout never overwrites a file",
                           "choose another output path or delete the file first (from Python: overwrite=True).")
    watch = _Watch(simulator)
    s0 = simulator._start(x0, n_steps, history, r0, watch)
    bar = None
    if progress and n_steps >= 1000:
        try:
            from tqdm.auto import tqdm

            bar = tqdm(total=int(n_steps), desc="rollout", unit="step", leave=False)
        except ImportError:  # progress bar is optional
            bar = None
    try:
        traj = simulator._run(s0, int(n_steps), watch, bar.update if bar is not None else None)
    finally:
        if bar is not None:
            bar.close()
    x, r = simulator.split(traj)
    x, r = x.double().numpy(), r.double().numpy()
    times = np.arange(int(n_steps) + 1) * simulator.dt
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
            if include_hidden and simulator.hidden_size:
                arrays["hidden"] = r
            with open(tmp, "wb") as fh:
                np.savez(fh, **arrays)
        else:
            names = list(simulator.state_names)
            if include_hidden:
                names += list(simulator.manifest["state"].get("hidden_names", []))
                units += [""] * simulator.hidden_size
                x = np.concatenate((x, r), axis=-1)
            with open(tmp, "w", encoding="utf-8", newline="") as fh:
                fh.write("# units: " + ",".join(units) + "\n")
                fh.write(f"# mnemode exported simulator rollout: dt={simulator.dt!r} {simulator.time_unit}\n")
                fh.write(",".join(["trajectory", "time", *names]) + "\n")
                for b in range(x.shape[1]):
                    for i in range(x.shape[0]):
                        fh.write(",".join([str(b), repr(float(times[i]))] + [repr(float(v)) for v in x[i, b]]) + "\n")
        if path.exists() and not overwrite:  # appeared while we computed: still never overwrite
            raise MnemodeError(str(path), "appeared while the rollout ran; not overwritten",
                               "choose another output path.")
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return path
