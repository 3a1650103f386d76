"""Reading observations as users have them: column roles, several files, own grids, gaps.

A file holds one or many trajectories. Each trajectory is read as raw rows
``(line, time, states, forcing)``, then put on its own regular grid:

    t_i = t_start + n_i Δt,      |t_i − t_start − n_i Δt| ≤ tol · Δt

with ``n_i`` integers and ``tol`` a fraction of Δt (times written by other tools
are never exactly equal). Every trajectory must share one Δt (within ``tol``,
relative). A jump ``n_{i+1} − n_i > 1`` (missing rows or a time jump) or a row
with a missing or non-finite value ends a *segment*; segments shorter than
``min_length`` samples are dropped and counted. Each kept segment keeps its true
start time.

Every problem is one :class:`~mnemode.errors.DataError` naming the file, the
trajectory and the line, what was expected, and the fix.
"""

from __future__ import annotations

import csv
import glob
import json
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import numpy as np

from .errors import DataError

__all__ = ["Columns", "RawTrajectory", "Segment", "SegmentedData", "read_file", "expand_files", "segment"]

_MISSING = {"", "na", "nan", "null", "none", "-nan"}


@dataclass
class Columns:
    """Which column plays which role.

    Attributes:
        time: the time column.
        trajectory: the column telling trajectories apart, or ``None`` (one
            trajectory per file). When it is left at its default name and the file
            has no such column, each file is one trajectory.
        states: the observed components (``None``: every other column).
        forcing: forcing inputs ``u(t)``.
        names: the column names of a header-less file, in order (``None``: the
            first non-comment line is the header).
        units: ``{column: unit}``; else a ``# units:`` line or a sidecar
            ``<stem>.units.json`` next to the file.
        preferred_states: when ``states`` is ``None`` and the file has every one of
            these columns, they are the states, in this order (the system's state
            names), whatever else the file holds.
    """

    time: str = "time"
    trajectory: str | None = "trajectory"
    states: Sequence[str] | None = None
    forcing: Sequence[str] = ()
    names: Sequence[str] | None = None
    units: dict | None = None
    preferred_states: Sequence[str] | None = None

    @property
    def trajectory_is_default(self) -> bool:
        return self.trajectory == "trajectory"


@dataclass
class RawTrajectory:
    """One trajectory's rows as read: ``(n,)`` lines and times, ``(n, D)`` states, ``(n, U)`` forcing."""

    source: str
    trajectory: str
    lines: np.ndarray
    times: np.ndarray
    states: np.ndarray
    forcing: np.ndarray | None

    @property
    def where(self) -> str:
        return f"{self.source}, trajectory {self.trajectory}"


@dataclass
class Segment:
    """A gap-free run of samples on the regular grid, with its true start time."""

    source: str
    trajectory: str
    first_line: int
    start_time: float
    states: np.ndarray
    forcing: np.ndarray | None

    @property
    def length(self) -> int:
        return int(self.states.shape[0])

    def describe(self) -> dict:
        return {"source": self.source, "trajectory": self.trajectory, "first_line": int(self.first_line),
                "start_time": float(self.start_time), "length": self.length}


@dataclass
class SegmentedData:
    """Kept segments and what was dropped on the way."""

    segments: list[Segment]
    dt: float
    names: tuple[str, ...]
    units: tuple[str, ...]
    forcing_names: tuple[str, ...]
    n_trajectories: int
    n_gaps: int = 0
    n_dropped: int = 0
    n_dropped_samples: int = 0
    files: list[str] = field(default_factory=list)

    def summary(self) -> dict:
        """Plain counts for the log and metrics.json."""
        return {"files": list(self.files), "trajectories": int(self.n_trajectories),
                "segments": len(self.segments), "gaps": int(self.n_gaps),
                "dropped_segments": int(self.n_dropped), "dropped_samples": int(self.n_dropped_samples),
                "samples": int(sum(s.length for s in self.segments))}


# -- files ------------------------------------------------------------------------

def expand_files(spec, what: str) -> list[Path]:
    """Paths from a file name, a glob or a list of them (sorted, duplicates removed)."""
    if spec is None:
        return []
    items = [spec] if isinstance(spec, (str, Path)) else list(spec)
    out: list[Path] = []
    for item in items:
        item = str(item)
        if any(c in item for c in "*?["):
            hits = sorted(glob.glob(str(Path(item).expanduser())))
            if not hits:
                raise DataError(f"{what} {item!r}", "matches no file",
                                "check the pattern (relative paths are taken from the directory you ran mnemode in).")
            out.extend(Path(h) for h in hits)
        else:
            path = Path(item).expanduser()
            if not path.exists():
                raise DataError(str(path), "file not found", "check the path (relative paths are taken from "
                                "the directory you ran mnemode in).")
            out.append(path)
    return list(dict.fromkeys(out))


def check_data_file(path) -> Path:
    """``path`` as a ``Path``, after checking it names a non-empty file.

    Raises:
        DataError: a missing or empty file.
    """
    path = Path(path)
    if not path.exists():
        raise DataError(str(path), "file not found", "check the path (relative paths are taken from "
                        "the directory you ran mnemode in).")
    if path.stat().st_size == 0:
        raise DataError(str(path), "file is empty", "regenerate or re-export the data.")
    return path


def read_file(path: Path, columns: Columns, delimiter: str | None = None,
              comment: str = "#") -> tuple[list[RawTrajectory], tuple[str, ...], tuple[str, ...], tuple[str, ...]]:
    """Read one ``.csv`` or ``.npz`` file.

    Returns:
        ``(trajectories, state names, state units, forcing names)``.

    Raises:
        DataError: unreadable, empty or malformed file; a missing column.
    """
    path = check_data_file(path)
    if path.suffix == ".npz":
        return _read_npz(path, columns)
    if path.suffix in (".csv", ".txt", ".tsv", ".dat"):
        return _read_csv(path, columns, delimiter, comment)
    raise DataError(str(path), f"unknown file type {path.suffix!r}; expected .csv or .npz",
                    "convert the data to .csv or .npz.")


def _sidecar_units(path: Path) -> dict:
    side = path.with_name(path.stem + ".units.json")
    if not side.exists():
        return {}
    try:
        units = json.loads(side.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise DataError(str(side), f"is not readable JSON ({exc})",
                        'write it as {"column": "unit", ...}.') from None
    if not isinstance(units, dict):
        raise DataError(str(side), "is not a JSON object", 'write it as {"column": "unit", ...}.')
    return {str(k): str(v) for k, v in units.items()}


def _read_csv(path: Path, columns: Columns, delimiter: str | None, comment: str):
    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError as exc:
        raise DataError(str(path), f"is not UTF-8 text ({exc.reason} at byte {exc.start})",
                        "save it as UTF-8 text (CSV).") from None
    lines = text.splitlines()
    line_units: tuple[str, ...] = ()
    body: list[tuple[int, str]] = []
    for i, line in enumerate(lines, start=1):
        stripped = line.strip()
        if not stripped:
            continue
        if comment and stripped.startswith(comment):
            if stripped.startswith(comment + " units:"):
                line_units = tuple(u.strip() for u in stripped[len(comment + " units:"):].split(","))
            continue
        body.append((i, line))
    delim = delimiter or ","
    if not body:
        raise DataError(str(path), "has no data rows (only comments or blank lines)",
                        "the file is empty or truncated.")
    parsed = [(n, [f.strip() for f in row]) for (n, _), row in
              zip(body, csv.reader([b for _, b in body], delimiter=delim))]
    first_line, first = parsed[0]
    if delimiter is None and len(first) == 1:
        for other, label in ((";", "';'"), ("\t", "tabs")):
            if other in first[0]:
                raise DataError(f"{path}, line {first_line}", f"is separated by {label}, not commas",
                                f"set data.delimiter={other!r} (e.g. data.delimiter=';').")
    if columns.names is not None:
        header = [str(c) for c in columns.names]
        rows = parsed
    else:
        header = first
        rows = parsed[1:]
        if any(_is_float(h) for h in header):
            raise DataError(f"{path}, line {first_line}", f"the first row {header} holds numbers, not only "
                            "column names",
                            "add a header row, or list the columns with data.column_names=[time,x,y,...].")
    if len(set(header)) != len(header):
        dup = sorted({h for h in header if header.count(h) > 1})
        raise DataError(str(path), f"has duplicate column names {dup}", "give every column its own name.")
    if not rows:
        raise DataError(str(path), "has a header but no data rows", "the file is empty or truncated.")
    idx = {h: i for i, h in enumerate(header)}
    fix_cols = (f"name the columns in the data config (data.time_column, data.trajectory_column, "
                f"data.state_columns, data.forcing_columns); this file has {header}.")
    if columns.time not in idx:
        raise DataError(str(path), f"has no time column {columns.time!r}", fix_cols)
    traj_col = columns.trajectory
    if traj_col is not None and traj_col not in idx:
        if not columns.trajectory_is_default:
            raise DataError(str(path), f"has no trajectory column {traj_col!r}", fix_cols)
        traj_col = None
    forcing = [str(c) for c in (columns.forcing or [])]
    roles = {columns.time, *( [traj_col] if traj_col else [] ), *forcing}
    if columns.states is not None:
        states = [str(c) for c in columns.states]
    elif columns.preferred_states and all(str(c) in idx for c in columns.preferred_states):
        states = [str(c) for c in columns.preferred_states]
    else:
        states = [h for h in header if h not in roles]
    for col in [*states, *forcing]:
        if col not in idx:
            raise DataError(str(path), f"has no column {col!r}", fix_cols)
    if not states:
        raise DataError(str(path), "has no state columns left after time, trajectory and forcing", fix_cols)
    wanted = [columns.time, *states, *forcing]
    take = [idx[c] for c in wanted]
    n_rows = len(rows)
    values = np.empty((n_rows, len(wanted)))
    line_no = np.empty(n_rows, dtype=np.int64)
    ids: list[str] = []
    for k, (n, r) in enumerate(rows):
        if len(r) != len(header):
            raise DataError(f"{path}, line {n}", f"has {len(r)} fields, expected {len(header)} ({header})",
                            "the file is truncated or a row is malformed; fix or remove the row.")
        for j, c in enumerate(take):
            s = r[c]
            if s.lower() in _MISSING:
                values[k, j] = np.nan
                continue
            try:
                values[k, j] = float(s)
            except ValueError:
                raise DataError(f"{path}, line {n}, column {wanted[j]!r}", f"value {s!r} is not a number",
                                "fix the value, leave it empty (a gap) or remove the row.") from None
        if not np.isfinite(values[k, 0]):
            raise DataError(f"{path}, line {n}", f"has no valid time ({r[take[0]]!r})",
                            "give every row its time, or remove the row.")
        line_no[k] = n
        ids.append(r[idx[traj_col]] if traj_col else "0")
    nd = len(states)
    units_by_col = dict(_sidecar_units(path))
    value_columns = [h for h in header if h not in (columns.time, traj_col)]
    if line_units and len(line_units) == len(value_columns):
        units_by_col = {**dict(zip(value_columns, line_units)), **units_by_col}
    if columns.units:
        units_by_col.update({str(k): str(v) for k, v in dict(columns.units).items()})
    units = tuple(units_by_col.get(c, "") for c in states)
    out = []
    id_arr = np.asarray(ids)
    for tid in dict.fromkeys(ids):
        sel = np.flatnonzero(id_arr == tid)
        out.append(RawTrajectory(str(path), tid, line_no[sel], values[sel, 0], values[sel, 1:1 + nd],
                                 values[sel, 1 + nd:] if forcing else None))
    stacked_check(out, traj_col, header)
    return out, tuple(states), units, tuple(forcing)


def _read_npz(path: Path, columns: Columns):
    try:
        with np.load(path, allow_pickle=False) as z:
            keys = set(z.files)
            if not {"times", "states"} <= keys:
                raise DataError(str(path), f"is missing the arrays {sorted({'times', 'states'} - keys)}",
                                "include 'times' (T,) or (T, B) and 'states' (T, B, D).")
            times, states = np.asarray(z["times"]), np.asarray(z["states"])
            names = tuple(str(s) for s in z["names"]) if "names" in keys else tuple(
                f"x{i + 1}" for i in range(states.shape[-1]))
            units = tuple(str(s) for s in z["units"]) if "units" in keys else ("",) * len(names)
            forcing = np.asarray(z["forcing"]) if "forcing" in keys else None
            fnames = tuple(str(s) for s in z["forcing_names"]) if "forcing_names" in keys else ()
            starts = np.asarray(z["start_times"]) if "start_times" in keys else None
    except DataError:
        raise
    except (zipfile.BadZipFile, EOFError, OSError, ValueError, KeyError) as exc:
        raise DataError(str(path), f"is not a readable .npz archive ({exc})",
                        "the file is probably truncated; regenerate or copy it again.") from None
    if states.ndim == 2:
        states = states[:, None, :]
    if forcing is not None and forcing.ndim == 2:
        forcing = forcing[:, None, :]
    if states.ndim != 3 or times.ndim not in (1, 2) or times.shape[0] != states.shape[0]:
        raise DataError(str(path), f"'states' has shape {states.shape} and 'times' {times.shape}; expected "
                        "(T, B, D) and (T,) or (T, B)", "reshape the arrays to the (time, batch, dim) layout.")
    T, B, _ = states.shape
    if times.ndim == 1:
        times = np.repeat(times[:, None], B, axis=1)
    if starts is not None:
        times = times + starts[None, :]
    if columns.states is not None:
        missing = [c for c in columns.states if c not in names]
        if missing:
            raise DataError(str(path), f"has no components {missing} (names: {list(names)})",
                            "fix data.state_columns or the 'names' array.")
        pick = [names.index(c) for c in columns.states]
        states, names, units = states[..., pick], tuple(names[i] for i in pick), tuple(units[i] for i in pick)
    if columns.units:
        units = tuple(str(dict(columns.units).get(n, u)) for n, u in zip(names, units))
    out = []
    for b in range(B):
        keep = np.isfinite(times[:, b])          # NaN-padded trajectories end early
        out.append(RawTrajectory(str(path), str(b), np.flatnonzero(keep), times[keep, b], states[keep, b],
                                 None if forcing is None else forcing[keep, b]))
    return out, names, units, fnames


def _is_float(s: str) -> bool:
    try:
        float(s)
        return True
    except ValueError:
        return False


# -- diagnosis of the time column ----------------------------------------------------

def stacked_check(raws: list[RawTrajectory], traj_col: str | None, header: Sequence[str]) -> None:
    """Times going backwards inside one trajectory: stacked runs, or unsorted rows.

    Raises:
        DataError: naming the line; when no trajectory column is in use and the
            time falls back more than once or to the file's first time, the file
            looks like several trajectories stacked, and the message names the
            setting for the trajectory column.
    """
    for raw in raws:
        d = np.diff(raw.times)
        back = np.flatnonzero(d <= 0)
        if back.size == 0:
            continue
        k = int(back[0]) + 1
        line, t, prev = int(raw.lines[k]), float(raw.times[k]), float(raw.times[k - 1])
        if traj_col is None:
            resets = int(np.sum(d < 0))
            if d[k - 1] < 0 and (resets > 1 or t <= raw.times[0] + 0.5 * abs(prev - raw.times[0])):
                others = [h for h in header if h != "time"]
                raise DataError(f"{raw.source}, line {line}",
                                f"time falls back from {prev!r} to {t!r} ({resets} time(s) in the file): the file "
                                "looks like several trajectories stacked one after another, and no trajectory "
                                "column is in use",
                                f"name the column that tells the trajectories apart with "
                                f"data.trajectory_column=<name> (columns: {others}), or write one trajectory "
                                "per file.")
        kind = "repeats" if d[k - 1] == 0 else "goes back to"
        raise DataError(f"{raw.where}, line {line}", f"time {kind} {t!r} after {prev!r}; times must increase "
                        "within a trajectory",
                        "sort the trajectory's rows by time and drop duplicates"
                        + ("" if traj_col is None else f", or check that data.trajectory_column={traj_col!r} "
                           "tells the runs apart") + ".")


# -- grids, gaps and segments ----------------------------------------------------------

def _own_dt(raw: RawTrajectory, tol: float) -> float | None:
    """The trajectory's Δt: the median step, refined over its whole span; ``None`` if < 2 samples."""
    t = raw.times
    if t.size < 2:
        return None
    d0 = float(np.median(np.diff(t)))
    n = np.rint((t - t[0]) / d0)
    dt = float((t[-1] - t[0]) / n[-1]) if n[-1] > 0 else d0
    off = np.abs(t - t[0] - np.rint((t - t[0]) / dt) * dt) / dt
    if off.max() > tol:
        k = int(np.argmax(off))
        raise DataError(f"{raw.where}, line {int(raw.lines[k])}",
                        f"time {float(t[k])!r} is off the regular grid of Δt = {dt:.10g} by {off[k]:.3g} Δt "
                        f"(tolerance {tol:g} Δt)",
                        "resample the trajectory onto a regular grid, or raise data.grid_tolerance if the "
                        "times are only written with few digits.")
    return dt


def segment(raws: list[RawTrajectory], *, names: tuple[str, ...], units: tuple[str, ...],
            forcing_names: tuple[str, ...], tol: float = 1e-3, min_length: int = 20,
            dt: float | None = None, what: str = "data") -> SegmentedData:
    """Put every trajectory on its grid, check the shared Δt, and cut it into segments at gaps.

    Args:
        raws: trajectories as read.
        tol: grid tolerance, a fraction of Δt (and the relative tolerance on Δt agreement).
        min_length: shortest segment kept (samples).
        dt: Δt every trajectory must have (e.g. the training set's), or ``None``
            (the longest trajectory's Δt is the reference).

    Raises:
        DataError: a time off the grid, trajectories with different Δt, or no
            segment left of at least ``min_length`` samples.
    """
    if min_length < 2:
        raise DataError("data.min_segment_length", f"is {min_length}", "use at least 2 samples.")
    own = [(_own_dt(r, tol), r) for r in raws]
    timed = [(d, r) for d, r in own if d is not None]
    if not timed:
        raise DataError(what, "has no trajectory with two or more samples", "provide longer trajectories.")
    ref_where = "the training data"
    if dt is None:
        ref_dt, ref = max(timed, key=lambda p: p[1].times.size)
        dt, ref_where = ref_dt, ref.where
    for d, r in timed:
        rel = abs(d - dt) / dt
        if rel > tol:
            raise DataError(r.where, f"is sampled every {d:.10g}, but {ref_where} every {dt:.10g} "
                            f"({100 * rel:.3g} % apart); all trajectories must share Δt",
                            f"resample it to Δt = {dt:.10g}, or leave it out of the data set.")
    segments, gaps, dropped, dropped_samples = [], 0, 0, 0
    for r in raws:
        t = r.times
        n = np.rint((t - t[0]) / dt).astype(np.int64)
        ok = np.isfinite(r.states).all(axis=1)
        if r.forcing is not None:
            ok &= np.isfinite(r.forcing).all(axis=1)
        # a segment breaks at a bad row or a jump of more than one grid step
        breaks = np.flatnonzero(np.diff(n) > 1) + 1
        gaps += int(breaks.size) + _runs(~ok)
        cut = np.zeros(t.size, dtype=bool)
        cut[breaks] = True
        start = None
        for i in range(t.size + 1):
            end_here = i == t.size or not ok[i] or cut[i]
            if start is not None and end_here:
                seg_len = i - start
                if seg_len >= min_length:
                    segments.append(Segment(r.source, r.trajectory, int(r.lines[start]),
                                            float(t[0] + n[start] * dt), r.states[start:i].copy(),
                                            None if r.forcing is None else r.forcing[start:i].copy()))
                else:
                    dropped += 1
                    dropped_samples += seg_len
                start = None
            if i < t.size and ok[i] and start is None:
                start = i
    if not segments:
        longest = max((r for r in raws), key=lambda r: r.times.size)
        raise DataError(what, f"has no gap-free segment of at least {min_length} samples ({dropped} shorter "
                        f"segment(s) dropped; the longest trajectory, {longest.where}, has {longest.times.size} rows)",
                        "fill the gaps, lower data.min_segment_length, or provide longer trajectories.")
    files = list(dict.fromkeys(r.source for r in raws))
    return SegmentedData(segments, float(dt), names, units, forcing_names, len(raws), gaps, dropped,
                         dropped_samples, files)


def _runs(mask: np.ndarray) -> int:
    """Number of runs of True in a boolean vector."""
    if mask.size == 0:
        return 0
    m = mask.astype(np.int8)
    return int(m[0] + np.sum(np.diff(m) == 1))
