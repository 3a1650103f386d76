"""Data sources: configured objects that turn a system into training, validation and test sets.

The ``data`` config group names a source by ``_target_``:

- :class:`GeneratedSource` samples the system's truth generator (cached on disk);
- :class:`FileSource` reads the user's ``.csv``/``.npz`` files with named column
  roles, explicit train/validation/test files or one set split by trajectory,
  trajectories of their own lengths and start times, and gaps cut into segments
  (:mod:`mnemode.loading`).

Both answer ``prepare(system, progress=False, key="") -> DataSplits``. The fitters
and the assessment take dense ``(time, batch, dim)`` sets, so a file source packs
its segments into equal pieces (:func:`pack_segments`); each piece keeps its true
start time in :attr:`TrajectorySet.start_times`.
"""

from __future__ import annotations

import hashlib
import json
import logging
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import numpy as np
from omegaconf import DictConfig, OmegaConf

from .data import TrajectorySet, generate, load_trajectories
from .errors import ConfigError, DataError
from .resolvers import data_run_name
from .loading import Columns, RawTrajectory, Segment, SegmentedData, expand_files, read_file, segment
from .rundir import RunDir
from .solvers import RK4
from .systems.base import System

__all__ = ["DataSplits", "GeneratedSource", "FileSource", "pack_segments", "prepare_data", "save_run_data",
           "run_data", "data_run_name"]


log = logging.getLogger("mnemode")

_SPLITS = ("train", "val", "test")


@dataclass
class DataSplits:
    """Training, validation and test trajectories, and where they came from.

    ``layout`` holds plain counts per split (files, trajectories, segments, gaps,
    dropped segments, pieces) for the log and ``metrics.json``; empty for
    generated data.
    """

    train: TrajectorySet
    val: TrajectorySet
    test: TrajectorySet
    source: str
    layout: dict = field(default_factory=dict)

    @property
    def dt(self) -> float:
        return self.train.dt

    @property
    def n_forcing(self) -> int:
        return 0 if self.train.forcing is None else int(self.train.forcing.shape[-1])


# -- generated -------------------------------------------------------------------------

class GeneratedSource:
    """Truth trajectories sampled from the system, cached on disk under a key of the config.

    Args:
        dt: sampling interval; duration: per training/validation trajectory;
        n_train, n_val, n_test: trajectory counts; test_duration: per test trajectory;
        noise: observation noise (fraction of each component's std); spin_up: transient
        discarded (``None``: the system's default); solver_step: truth RK4 step;
        seed: random starts; cache_dir: where generated sets are kept;
        run_name: the run family name this source suggests (read by the config only).
    """

    def __init__(self, dt: float = 0.02, duration: float = 100.0, n_train: int = 10, n_val: int = 4,
                 n_test: int = 8, test_duration: float = 100.0, noise: float = 0.0, spin_up: float | None = None,
                 solver_step: float = 0.005, seed: int = 0, cache_dir: str = "data-cache", run_name: str = "demo"):
        self.dt, self.duration, self.test_duration = float(dt), float(duration), float(test_duration)
        self.n_train, self.n_val, self.n_test = int(n_train), int(n_val), int(n_test)
        self.noise, self.spin_up, self.solver_step = float(noise), spin_up, float(solver_step)
        self.seed, self.cache_dir, self.run_name = int(seed), str(cache_dir), str(run_name)

    def prepare(self, system: System, progress: bool = False, key: str = "") -> DataSplits:
        cache = Path(self.cache_dir).expanduser() / f"{system.name}-{key or 'default'}"
        fit_path, test_path = cache / "train_val.npz", cache / "test.npz"
        if fit_path.exists() and test_path.exists():
            log.info("using cached data %s", cache)
        else:
            log.info("generating %s data into %s", system.name, cache)
            solver = RK4(self.solver_step)
            fit_set = generate(system, n_trajectories=self.n_train + self.n_val, duration=self.duration,
                               dt=self.dt, solver=solver, seed=self.seed, noise=self.noise,
                               spin_up=self.spin_up, progress=progress)
            test = generate(system, n_trajectories=self.n_test, duration=self.test_duration, dt=self.dt,
                            solver=solver, seed=self.seed + 100_003, noise=self.noise, spin_up=self.spin_up,
                            progress=progress)
            fit_set.save(fit_path)
            test.save(test_path)
        # The first run works on the arrays as read back from the cache, like every later run: the same
        # memory layout gives the same rounding, so runs with one seed repeat exactly.
        fit_set = load_trajectories(fit_path, expected_dim=system.dim)
        test = load_trajectories(test_path, expected_dim=system.dim)
        train, val = fit_set.split_by_trajectory([self.n_train, self.n_val])
        return DataSplits(train, val, test, str(cache))


# -- files ---------------------------------------------------------------------------

def pack_segments(segments: Sequence[Segment], dt: float, names, units, forcing_names, *,
                  length: int | None = None, meta: dict | None = None, what: str = "data") -> TrajectorySet:
    """Pack segments of different lengths into a dense set of equal pieces.

    Each segment of ``n`` samples becomes ``k = ⌈n / L⌉`` pieces of ``L`` samples
    whose starts are spread evenly over ``0 … n − L`` (the last piece ends at the
    segment's end), so no sample is left out and pieces overlap by less than ``L``.
    ``L`` is ``length`` or, when ``None``, the shortest segment's length. Every
    piece keeps its true start time (``start_times``); ``times`` run from 0.

    Raises:
        DataError: no segment is at least ``length`` samples long.
    """
    lengths = [s.length for s in segments]
    L = int(length) if length is not None else min(lengths)
    kept = [s for s in segments if s.length >= L]
    if not kept:
        raise DataError(what, f"has no segment of at least data.chunk_length = {L} samples (longest: {max(lengths)})",
                        "lower data.chunk_length, or set it to null (the shortest segment's length).")
    states, forcing, starts, origin = [], [], [], []
    for i, s in enumerate(kept):
        k = math.ceil(s.length / L)
        offsets = np.unique(np.rint(np.linspace(0, s.length - L, k)).astype(int)) if k > 1 else np.array([0])
        for o in offsets:
            states.append(s.states[o:o + L])
            if s.forcing is not None:
                forcing.append(s.forcing[o:o + L])
            starts.append(s.start_time + o * dt)
            origin.append([i, int(o)])
    meta = dict(meta or {})
    meta.update(dt=float(dt), segments=[s.describe() for s in kept], pieces=origin, piece_length=L,
                dropped_for_length=len(segments) - len(kept))
    return TrajectorySet(np.arange(L) * dt, np.stack(states, axis=1), names, units,
                         np.stack(forcing, axis=1) if forcing else None, forcing_names, None, meta,
                         np.asarray(starts))


def _fractions_to_counts(n: int, fractions: Sequence[float]) -> list[int]:
    f = np.asarray(fractions, dtype=np.float64)
    counts = np.floor(f / f.sum() * n).astype(int)
    counts[counts == 0] = 1
    while counts.sum() > n:          # take surplus from the largest split
        counts[np.argmax(counts)] -= 1
    while counts.sum() < n:          # leftovers go to training
        counts[0] += 1
    return [int(c) for c in counts]


class FileSource:
    """Observations read from the user's files.

    Args:
        path: one set of files (a file, a glob or a list), split into train,
            validation and test by ``split``.
        train, val, test: explicit sets (file, glob or list each); ``val`` may be
            left out (then carved from ``train`` like a single set).
        time_column, trajectory_column, state_columns, forcing_columns: column roles
            (:class:`~mnemode.loading.Columns`).
        column_names: header-less files: their columns in order.
        units: ``{column: unit}`` (else a ``# units:`` line or ``<stem>.units.json``).
        delimiter: field separator (``None``: comma).
        grid_tolerance: a time is on the grid within this fraction of Δt.
        min_segment_length: gap-free segments shorter than this (samples) are dropped.
        chunk_length: samples per packed piece (``None``: the shortest segment's length
            in each split).
        split: with one set: ``trajectory`` (whole trajectories, seeded shuffle) or
            ``time`` (consecutive time fractions of every segment).
        n_train, n_val, n_test: trajectory counts for ``split=trajectory`` (else ``fractions``).
        fractions: train/validation/test fractions.
        seed: the shuffle's seed.
        run_name: the run family name (read by the config only).
    """

    def __init__(self, path=None, train=None, val=None, test=None, time_column: str = "time",
                 trajectory_column: str | None = "trajectory", state_columns: Sequence[str] | None = None,
                 forcing_columns: Sequence[str] | None = None, forcing_units: Sequence[str] | None = None,
                 column_names: Sequence[str] | None = None, units: dict | None = None, delimiter: str | None = None, comment: str = "#",
                 grid_tolerance: float = 1e-3, min_segment_length: int = 20, chunk_length: int | None = None,
                 split: str = "trajectory", n_train: int | None = None, n_val: int | None = None,
                 n_test: int | None = None, fractions: Sequence[float] = (0.6, 0.2, 0.2), seed: int = 0,
                 run_name: str = "observations"):
        self.path, self.train, self.val, self.test = path, train, val, test
        if forcing_units and len(forcing_units) != len(forcing_columns or []):
            raise ConfigError("data.forcing_units", f"has {len(forcing_units)} unit(s) for "
                              f"{len(forcing_columns or [])} forcing column(s)",
                              "give one unit per forcing column, in the same order (or leave it empty).")
        self.forcing_units = [str(u) for u in (forcing_units or [])]  # read by the export's manifest
        self.columns = Columns(time=str(time_column), trajectory=None if trajectory_column in (None, "", "null")
                               else str(trajectory_column),
                               states=None if state_columns is None else [str(c) for c in state_columns],
                               forcing=[str(c) for c in (forcing_columns or [])],
                               names=None if column_names is None else [str(c) for c in column_names],
                               units=None if units is None else dict(units))
        self.delimiter, self.comment = delimiter, str(comment)
        self.grid_tolerance, self.min_segment_length = float(grid_tolerance), int(min_segment_length)
        self.chunk_length = None if chunk_length is None else int(chunk_length)
        if split not in ("trajectory", "time"):
            raise ConfigError("data.split", f"is {split!r}; expected 'trajectory' or 'time'",
                              "set data.split=trajectory or data.split=time.")
        self.split, self.counts = split, (n_train, n_val, n_test)
        self.fractions = [float(f) for f in fractions]
        if len(self.fractions) != 3 or any(f <= 0 for f in self.fractions):
            raise ConfigError("data.fractions", f"is {self.fractions}", "give three positive fractions, "
                              "e.g. [0.6, 0.2, 0.2].")
        self.seed, self.run_name = int(seed), str(run_name)

    # -- reading -----------------------------------------------------------------------
    def _read(self, spec, what: str):
        raws: list[RawTrajectory] = []
        header = None
        for path in expand_files(spec, what):
            got, names, units, fnames = read_file(path, self.columns, self.delimiter, self.comment)
            if header is None:
                header = (names, units, fnames, str(path))
            elif (names, fnames) != header[:1] + header[2:3]:
                raise DataError(str(path), f"has states {list(names)} and forcing {list(fnames)}, but "
                                f"{header[3]} has {list(header[0])} and {list(header[2])}",
                                "give every file the same columns, or select them with data.state_columns.")
            raws.extend(got)
        if header is None:
            raise DataError(what, "names no file", "set data.path (or data.train / data.test).")
        return raws, header

    def _segment(self, raws, header, what, dt=None) -> SegmentedData:
        names, units, fnames, _ = header
        return segment(raws, names=names, units=units, forcing_names=fnames, tol=self.grid_tolerance,
                       min_length=self.min_segment_length, dt=dt, what=what)

    def prepare(self, system: System, progress: bool = False, key: str = "") -> DataSplits:
        if system is not None:
            self.columns.preferred_states = list(system.state_names)
        explicit = {s: getattr(self, s) for s in _SPLITS if getattr(self, s) not in (None, "???")}
        if self.path not in (None, "???") and explicit:
            raise ConfigError("data.path", f"is set together with {sorted(explicit)}",
                              "give either data.path (one set, split automatically) or data.train/val/test.")
        if self.path in (None, "???") and not explicit:
            raise ConfigError("data.path", "is not set", "pass data.path=/path/to/observations.csv "
                              "(or data.train=... data.test=...).")
        if explicit and ("train" not in explicit or "test" not in explicit):
            raise ConfigError("data.train / data.test", f"only {sorted(explicit)} given",
                              "give both data.train and data.test (data.val is optional).")
        if not explicit:
            raws, header = self._read(self.path, "data.path")
            whole = self._segment(raws, header, str(self.path))
            parts = self._split(whole.segments, whole.dt, self.fractions, self.counts, "data.path")
            seg = {s: whole for s in _SPLITS}
            source = str(self.path)
        else:
            seg, parts = {}, {}
            raws, header = self._read(explicit["train"], "data.train")
            seg["train"] = self._segment(raws, header, "data.train")
            dt = seg["train"].dt
            if "val" in explicit:
                parts["train"] = seg["train"].segments
                r, h = self._read(explicit["val"], "data.val")
                seg["val"] = self._segment(r, h, "data.val", dt)
                parts["val"] = seg["val"].segments
            else:
                f = self.fractions
                split = self._split(seg["train"].segments, dt, [f[0], f[1], 1e-12], (None, None, 0), "data.train",
                                    two_way=True)
                tr, va = split["train"], split["val"]
                parts["train"], parts["val"], seg["val"] = tr, va, seg["train"]
            r, h = self._read(explicit["test"], "data.test")
            seg["test"] = self._segment(r, h, "data.test", dt)
            parts["test"] = seg["test"].segments
            source = ", ".join(str(explicit[s]) for s in _SPLITS if s in explicit)
        names, units, fnames = seg["train"].names, seg["train"].units, seg["train"].forcing_names
        if system is not None and len(names) != system.dim:
            raise DataError(source, f"has {len(names)} observed components {list(names)} but the chosen system "
                            f"observes {system.dim}", "choose the matching system, or select the right columns "
                            "with data.state_columns.")
        sets, layout = {}, {}
        for s in _SPLITS:
            sets[s] = pack_segments(parts[s], seg["train"].dt, names, units, fnames, length=self.chunk_length,
                                    meta={"source": source, "split": s}, what=f"{s} data")
            info = seg[s].summary()
            layout[s] = {"trajectories": len({(p.source, p.trajectory) for p in parts[s]}),
                         "segments": len(parts[s]), "pieces": sets[s].n_trajectories,
                         "piece_length": sets[s].n_times,
                         "samples": int(sum(p.length for p in parts[s]))}
            if s in explicit or not explicit:
                layout[s]["files"] = info["files"]
        totals = {}
        for sd in {id(v): v for v in seg.values()}.values():
            for k in ("gaps", "dropped_segments", "dropped_samples"):
                totals[k] = totals.get(k, 0) + sd.summary()[k]
        layout.update(dt=seg["train"].dt, **totals)
        self._log(layout)
        return DataSplits(sets["train"], sets["val"], sets["test"], source, layout)

    def _split(self, segments: list[Segment], dt: float, fractions, counts, what: str, two_way: bool = False):
        if self.split == "time":
            out = {s: [] for s in _SPLITS}
            f = np.cumsum([0.0, *fractions]) / sum(fractions)
            for sg in segments:
                edges = np.rint(f * sg.length).astype(int)
                for s, a, b in zip(_SPLITS, edges[:-1], edges[1:]):
                    if b - a >= self.min_segment_length:
                        out[s].append(Segment(sg.source, sg.trajectory, sg.first_line, sg.start_time + a * dt,
                                              sg.states[a:b], None if sg.forcing is None else sg.forcing[a:b]))
            return self._check_parts(out, what, two_way)
        units = list(dict.fromkeys((sg.source, sg.trajectory) for sg in segments))
        need = 2 if two_way else 3
        if len(units) < need:
            raise ConfigError("data.split", f"is 'trajectory' but {what} holds {len(units)} trajectory(ies)",
                              "use data.split=time, provide more trajectories, or give separate files with "
                              "data.train / data.val / data.test.")
        order = np.random.default_rng(self.seed).permutation(len(units))
        if all(c is not None for c in counts[:need]):
            n = [int(c) for c in counts[:need]]
            if sum(n) > len(units):
                raise ConfigError("data.n_train/n_val/n_test", f"ask for {sum(n)} trajectories but {what} holds "
                                  f"{len(units)}", "lower the counts or set them to null (fractions).")
        else:
            n = _fractions_to_counts(len(units), fractions[:need])
        groups, start = {}, 0
        for s, c in zip(_SPLITS, n):
            for j in order[start:start + c]:
                groups[units[j]] = s
            start += c
        out = {s: [sg for sg in segments if groups.get((sg.source, sg.trajectory)) == s] for s in _SPLITS}
        return self._check_parts(out, what, two_way)

    def _check_parts(self, out, what, two_way):
        for s in (_SPLITS[:2] if two_way else _SPLITS):
            if not out[s]:
                raise DataError(what, f"leaves no segment for the {s} split",
                                "provide more or longer trajectories, or adjust data.fractions.")
        return out

    @staticmethod
    def _log(layout: dict) -> None:
        for s in _SPLITS:
            d = layout[s]
            log.info("%s data: %d trajectories, %d segments, %d samples, packed into %d pieces of %d samples",
                     s, d["trajectories"], d["segments"], d["samples"], d["pieces"], d["piece_length"])
        log.info("sampling interval %.10g; %d gap(s); %d segment(s) shorter than the minimum dropped (%d samples)",
                 layout["dt"], layout["gaps"], layout["dropped_segments"], layout["dropped_samples"])


# -- the stage functions ---------------------------------------------------------------------

def _data_key(cfg: DictConfig) -> str:
    spec = {
        "system": OmegaConf.to_container(cfg.system, resolve=True),
        "data": {k: v for k, v in OmegaConf.to_container(cfg.data, resolve=True).items()
                 if k not in ("cache_dir", "run_name")},
        "version": 1,
    }
    return hashlib.sha256(json.dumps(spec, sort_keys=True).encode()).hexdigest()[:12]


def prepare_data(cfg: DictConfig, system: System, *, progress: bool = False,
                 check_sampling: bool = True) -> DataSplits:
    """Build the configured data source and prepare the splits (generate and cache, or load).

    With ``check_sampling``, a run that fits any model by derivative regression
    first has its sampling interval judged
    (:func:`~mnemode.fitting.sampling_diagnostic.sampling_advice`), and a log
    warning names the better targets when the interval is too coarse.
    """
    from hydra.utils import instantiate

    node = cfg.data
    if node.get("_target_") is None:
        raise ConfigError("data._target_", "is not set",
                          "choose a data source: data=generated or data=file (or give data._target_).")
    try:
        source = instantiate(node)
    except (ConfigError, DataError):
        raise
    except Exception as exc:  # Hydra wraps import and argument errors
        cause = exc.__cause__ or exc
        if isinstance(cause, (ConfigError, DataError)):
            raise cause from None
        raise ConfigError("data", f"could not be built from {OmegaConf.to_container(node)} ({cause})",
                          "check data._target_ and its arguments (data=generated or data=file).") from None
    if not hasattr(source, "prepare"):
        raise ConfigError("data._target_", f"built a {type(source).__name__}, which has no prepare(system)",
                          "point it at mnemode.sources.GeneratedSource or mnemode.sources.FileSource.")
    data = source.prepare(system, progress=progress, key=_data_key(cfg))
    if check_sampling:
        warn_on_coarse_derivative_fit(cfg, system, data)
    return data


def _derivative_fits(cfg: DictConfig) -> list[str]:
    """Names of the run's models fitted by derivative regression."""
    out = []
    model = cfg.get("model") or {}
    fit = cfg.get("fit") or {}
    if str(fit.get("_target_", "")).endswith("DerivativeFit"):
        out.append(str(model.get("name", "main model")))
    for name, spec in (cfg.get("compare") or {}).items():
        if str(((spec or {}).get("fit") or {}).get("_target_", "")).endswith("DerivativeFit"):
            out.append(str(name))
    return out


def warn_on_coarse_derivative_fit(cfg: DictConfig, system: System, data: DataSplits) -> dict | None:
    """Log a warning when a derivative fit is configured at a Δt the sampling check flags; the advice or None."""
    names = _derivative_fits(cfg)
    if not names or system is None:
        return None
    from .fitting.sampling_diagnostic import sampling_advice

    physics = system.nominal if (cfg.get("model") or {}).get("physics", True) else None
    scheme = str((cfg.get("fit") or {}).get("scheme", "central4"))
    try:
        advice = sampling_advice(data.train, physics, scheme=scheme)
    except DataError as exc:
        log.warning("sampling check skipped: %s", exc)
        return None
    if advice["targets"] != "derivative":
        log.warning("%s fitted by derivative regression at Δt = %.6g, but %s; the flow-map fit avoids it "
                    "(fit=flow_map model=discrete; `mnemode diagnose` gives the numbers)",
                    ", ".join(names), advice["dt"], advice["reason"])
    return advice


def save_run_data(run: RunDir, data: DataSplits) -> None:
    """Keep the run's own copy of its data splits, so the run directory alone suffices later."""
    for split in _SPLITS:
        path = run.path / "data" / f"{split}.npz"
        if not path.exists():
            getattr(data, split).save(path)
    if data.layout:
        run.update_metrics(data_layout=data.layout)


def run_data(run: RunDir, cfg: DictConfig, system: System) -> DataSplits:
    """The data a run was fitted on: its own copy if present, else rebuilt from the config."""
    paths = [run.path / "data" / f"{split}.npz" for split in _SPLITS]
    if all(p.exists() for p in paths):
        train, val, test = (load_trajectories(p, expected_dim=system.dim) for p in paths)
        return DataSplits(train, val, test, str(run.path / "data"), run.metrics().get("data_layout", {}))
    return prepare_data(cfg, system, progress=bool(cfg.progress))
