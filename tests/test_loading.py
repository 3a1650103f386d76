"""Reading observations as users have them: column roles, several files, own grids and start
times, gaps, splits, and one clear message per bad input.

Expected values are worked out by hand from the files each test writes (the grid
arithmetic t = t_start + n·Δt, segment lengths by counting rows) or compared with
numpy directly.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from mnemode.errors import ConfigError, DataError
from mnemode.loading import Columns, read_file, segment
from mnemode.sources import FileSource, pack_segments


def _write(path, header, rows, fmt="{:.10g}", sep=","):
    lines = [] if header is None else [sep.join(header)]
    for r in rows:
        lines.append(sep.join(v if isinstance(v, str) else fmt.format(v) for v in r))
    path.write_text("\n".join(lines) + "\n")
    return path


def _traj(tid, t0, n, dt=0.1, skip=()):
    """Rows (time, id, a, b) on t0 + i·dt, leaving out the indices in ``skip``."""
    return [[t0 + i * dt, tid, np.sin(0.3 * (t0 + i * dt)), np.cos(0.2 * (t0 + i * dt))]
            for i in range(n) if i not in skip]


def _source(**kw):
    base = dict(time_column="t", trajectory_column="run", min_segment_length=5)
    base.update(kw)
    return FileSource(**base)


# -- column roles, headers, delimiters, units -------------------------------------------------

def test_own_column_names_and_roles(tmp_path):
    rows = [[r[0], r[1], r[2], r[3], 0.5 * r[2]] for r in _traj("A", 1.0, 30) + _traj("B", 2.0, 40)]
    path = _write(tmp_path / "obs.csv", ["t", "run", "level", "temp", "valve"], rows)
    raws, names, units, fnames = read_file(path, Columns(time="t", trajectory="run", forcing=["valve"]))
    assert names == ("level", "temp") and fnames == ("valve",)
    assert [r.trajectory for r in raws] == ["A", "B"] and [r.times.size for r in raws] == [30, 40]
    # the forcing column is read as forcing, not as a state
    np.testing.assert_allclose(raws[0].forcing[:, 0], 0.5 * raws[0].states[:, 0], rtol=1e-9)


def test_headerless_file_with_comments_and_units(tmp_path):
    rows = _traj("A", 0.0, 25)
    text = "# logger export 2026-12-01\n# more notes\n" + "\n".join(
        f"{r[0]:.10g},{r[1]},{r[2]:.10g},{r[3]:.10g}" for r in rows) + "\n"
    path = tmp_path / "logger.csv"
    path.write_text(text)
    (tmp_path / "logger.units.json").write_text(json.dumps({"a": "m", "b": "K"}))
    cols = Columns(time="t", trajectory="run", names=["t", "run", "a", "b"])
    raws, names, units, _ = read_file(path, cols)
    assert names == ("a", "b") and units == ("m", "K") and raws[0].times.size == 25
    # units given in config win over the sidecar
    cols.units = {"b": "degC"}
    assert read_file(path, cols)[2] == ("m", "degC")
    # without the column list the first row is numbers, and the message says how to name them
    with pytest.raises(DataError, match="column_names"):
        read_file(path, Columns(time="t", trajectory="run"))


def test_semicolon_file_is_named_and_readable_with_the_option(tmp_path):
    path = _write(tmp_path / "semi.csv", ["t", "run", "a", "b"], _traj("A", 0.0, 10), sep=";")
    with pytest.raises(DataError) as info:
        read_file(path, Columns(time="t", trajectory="run"))
    msg = str(info.value)
    assert "';'" in msg and "data.delimiter" in msg and str(path) in msg and "line 1" in msg
    raws, names, _, _ = read_file(path, Columns(time="t", trajectory="run"), delimiter=";")
    assert names == ("a", "b") and raws[0].times.size == 10


def test_missing_column_names_the_column_and_the_setting(tmp_path):
    path = _write(tmp_path / "obs.csv", ["t", "run", "a", "b"], _traj("A", 0.0, 10))
    with pytest.raises(DataError) as info:
        read_file(path, Columns(time="t", trajectory="run", forcing=["heater"]))
    msg = str(info.value)
    assert "'heater'" in msg and "data.forcing_columns" in msg and "['t', 'run', 'a', 'b']" in msg
    with pytest.raises(DataError, match="no time column 'time'"):
        read_file(path, Columns())
    with pytest.raises(DataError, match="no trajectory column 'batch'"):
        read_file(path, Columns(time="t", trajectory="batch"))


# -- grids, start times, Δt ----------------------------------------------------------------------

def test_own_lengths_and_start_times_on_ten_digit_grids(tmp_path):
    # Δt = 0.1 written with 10 significant digits: times like 1234.567 carry rounding of 1e-7,
    # i.e. 1e-6 Δt, which the grid tolerance (1e-3 Δt) accepts
    rows = _traj("A", 1234.567, 50) + _traj("B", 0.05, 80) + _traj("C", 77.7, 35)
    path = _write(tmp_path / "obs.csv", ["t", "run", "a", "b"], rows)
    src = _source(path=str(path), split="trajectory", fractions=[1, 1, 1], chunk_length=None)
    raws, header = src._read(src.path, "data.path")
    seg = src._segment(raws, header, "obs")
    assert seg.dt == pytest.approx(0.1, rel=1e-9)
    assert sorted((s.trajectory, s.length) for s in seg.segments) == [("A", 50), ("B", 80), ("C", 35)]
    starts = {s.trajectory: s.start_time for s in seg.segments}
    assert starts == pytest.approx({"A": 1234.567, "B": 0.05, "C": 77.7}, abs=1e-9)


def test_time_off_the_grid_names_the_line(tmp_path):
    rows = _traj("A", 0.0, 20)
    rows[7][0] += 0.01                      # 0.1 Δt off its grid point, far above 1e-3 Δt
    path = _write(tmp_path / "obs.csv", ["t", "run", "a", "b"], rows)
    raws, names, units, fn = read_file(path, Columns(time="t", trajectory="run"))
    with pytest.raises(DataError) as info:
        segment(raws, names=names, units=units, forcing_names=fn, min_length=5)
    msg = str(info.value)
    assert "line 9" in msg and "off the regular grid" in msg and "data.grid_tolerance" in msg


def test_mismatched_sampling_interval_names_the_trajectory_and_the_difference(tmp_path):
    rows = _traj("A", 0.0, 60) + _traj("B", 0.0, 40, dt=0.101)
    path = _write(tmp_path / "obs.csv", ["t", "run", "a", "b"], rows)
    raws, names, units, fn = read_file(path, Columns(time="t", trajectory="run"))
    with pytest.raises(DataError) as info:
        segment(raws, names=names, units=units, forcing_names=fn, min_length=5)
    msg = str(info.value)
    # 0.101 against 0.1: (0.101 − 0.1)/0.1 = 1 %
    assert "trajectory B" in msg and "0.101" in msg and "1 % apart" in msg and "trajectory A" in msg


# -- time going backwards ---------------------------------------------------------------------------

def test_stacked_trajectories_without_a_trajectory_column_are_recognised(tmp_path):
    rows = [[r[0], r[2], r[3]] for r in _traj("A", 0.0, 20) + _traj("B", 0.0, 20)]
    path = _write(tmp_path / "stacked.csv", ["t", "x", "y"], rows)
    with pytest.raises(DataError) as info:
        read_file(path, Columns(time="t"))
    msg = str(info.value)
    assert "stacked" in msg and "data.trajectory_column" in msg and "line 22" in msg
    # advice to sort the samples would interleave the runs: it is not given
    assert "sort" not in msg


def test_backwards_time_inside_a_trajectory_names_trajectory_and_line(tmp_path):
    rows = _traj("A", 0.0, 20)
    rows[10], rows[11] = rows[11], rows[10]
    path = _write(tmp_path / "obs.csv", ["t", "run", "a", "b"], rows)
    with pytest.raises(DataError) as info:
        read_file(path, Columns(time="t", trajectory="run"))
    msg = str(info.value)
    assert "trajectory A" in msg and "line 13" in msg and "goes back" in msg and "data.trajectory_column" in msg


# -- gaps and segments ------------------------------------------------------------------------------

def test_gaps_split_into_segments_and_short_ones_are_counted(tmp_path):
    # A: rows 20..22 missing -> segments of 20 and 27 samples
    # B: a NaN row at index 10 -> 10 and 29; a time jump after row 33 -> 29 becomes 23 and ...
    rows = _traj("A", 0.0, 50, skip=range(20, 23))
    b = _traj("B", 5.0, 40)
    b[10][2] = "nan"
    b += [[r[0] + 10.0, "B", r[2], r[3]] for r in _traj("B", 9.0, 3)]   # 3 samples after a jump: too short
    path = _write(tmp_path / "obs.csv", ["t", "run", "a", "b"], rows + b)
    raws, names, units, fn = read_file(path, Columns(time="t", trajectory="run"))
    seg = segment(raws, names=names, units=units, forcing_names=fn, min_length=5)
    got = sorted((s.trajectory, s.length, round(s.start_time, 6)) for s in seg.segments)
    assert got == [("A", 20, 0.0), ("A", 27, 2.3), ("B", 10, 5.0), ("B", 29, 6.1)]
    assert seg.n_dropped == 1 and seg.n_dropped_samples == 3
    assert seg.n_gaps == 3                       # missing rows in A, the NaN row and the jump in B
    summary = seg.summary()
    assert summary["segments"] == 4 and summary["dropped_segments"] == 1 and summary["trajectories"] == 2


def test_gap_leaving_no_segment_long_enough_is_one_clear_error(tmp_path):
    rows = _traj("A", 0.0, 30, skip=range(10, 12))
    path = _write(tmp_path / "obs.csv", ["t", "run", "a", "b"], rows)
    raws, names, units, fn = read_file(path, Columns(time="t", trajectory="run"))
    with pytest.raises(DataError) as info:
        segment(raws, names=names, units=units, forcing_names=fn, min_length=20, what=str(path))
    msg = str(info.value)
    assert str(path) in msg and "at least 20 samples" in msg and "min_segment_length" in msg


# -- several files, npz, splits -----------------------------------------------------------------------

def test_explicit_files_globs_and_npz(tmp_path):
    for k in range(3):
        _write(tmp_path / f"train_{k}.csv", ["t", "run", "a", "b"], _traj(f"r{k}", 3.0 * k, 30 + 5 * k))
    test_states = np.stack([np.sin(np.arange(40) * 0.1 + p) for p in (0.0, 1.0)], axis=1)[..., None]
    test_states = np.concatenate([test_states, test_states], axis=-1)           # (40, 2, 2)
    test_states[30:, 1] = np.nan                                                 # second one is 30 long
    np.savez(tmp_path / "test.npz", times=np.arange(40) * 0.1, states=test_states,
             names=np.array(["a", "b"]), start_times=np.array([100.0, 200.0]))
    src = _source(train=str(tmp_path / "train_*.csv"), test=str(tmp_path / "test.npz"),
                  fractions=[0.7, 0.3, 0.1], seed=3)
    data = src.prepare(None)
    assert data.layout["train"]["trajectories"] + data.layout["val"]["trajectories"] == 3
    assert data.layout["test"]["segments"] == 2 and data.layout["test"]["samples"] == 70
    # the npz's start times come through: the first piece of each test trajectory starts there
    assert set(np.round(data.test.start_times, 9)) >= {100.0, 200.0}
    assert data.dt == pytest.approx(0.1)


def test_single_set_split_by_trajectory_is_a_seeded_shuffle(tmp_path):
    rows = []
    for k in range(10):
        rows += _traj(f"r{k}", float(k), 20)
    path = _write(tmp_path / "obs.csv", ["t", "run", "a", "b"], rows)

    def assignment(seed):
        data = _source(path=str(path), seed=seed, fractions=[0.6, 0.2, 0.2]).prepare(None)
        return [sorted({s["trajectory"] for s in getattr(data, part).meta["segments"]})
                for part in ("train", "val", "test")]

    a = assignment(0)
    assert [len(p) for p in a] == [6, 2, 2]
    assert sorted(sum(a, [])) == sorted(f"r{k}" for k in range(10))      # disjoint and complete
    assert assignment(0) == a                                           # reproducible
    assert any(assignment(s) != a for s in (1, 2, 3))                   # the seed matters
    with pytest.raises(ConfigError, match="data.split=time"):
        _write(tmp_path / "two.csv", ["t", "run", "a", "b"], _traj("A", 0, 20) + _traj("B", 0, 20))
        _source(path=str(tmp_path / "two.csv")).prepare(None)


def test_packing_covers_every_sample_and_keeps_true_start_times(tmp_path):
    rows = _traj("A", 10.0, 23) + _traj("B", 50.0, 10)
    path = _write(tmp_path / "obs.csv", ["t", "run", "a", "b"], rows)
    raws, names, units, fn = read_file(path, Columns(time="t", trajectory="run"))
    seg = segment(raws, names=names, units=units, forcing_names=fn, min_length=5)
    ts = pack_segments(seg.segments, seg.dt, names, units, fn)
    # L = 10 (shortest); A (23) -> ceil(23/10) = 3 pieces at offsets 0, 6.5->6 (rint, half to even), 13
    assert ts.n_times == 10 and ts.n_trajectories == 4
    np.testing.assert_allclose(ts.start_times, [10.0, 10.6, 11.3, 50.0], atol=1e-9)
    absolute = ts.absolute_times()
    for b in range(ts.n_trajectories):
        # each piece holds exactly the rows at its absolute times (numpy's sin/cos of the written times)
        np.testing.assert_allclose(ts.states[:, b, 0], np.sin(0.3 * absolute[:, b]), atol=1e-9)
    covered = {round(t, 6) for t in absolute[:, :3].ravel()}
    assert covered == {round(10.0 + 0.1 * i, 6) for i in range(23)}


def test_system_state_names_pick_and_order_the_state_columns(tmp_path):
    rows = [[r[0], r[1], r[3], r[2], "ok"] for r in _traj("A", 0.0, 10)]
    path = _write(tmp_path / "obs.csv", ["t", "run", "b", "a", "note"], rows)
    cols = Columns(time="t", trajectory="run", preferred_states=["a", "b"])
    raws, names, _, _ = read_file(path, cols)
    assert names == ("a", "b")
    np.testing.assert_allclose(raws[0].states[:, 0], np.sin(0.3 * raws[0].times), atol=1e-9)
