"""Trajectory data: files, generation, splits, finite differences, normalisation, windows, validation.

Outside references: numpy (mean/std, exact float round trips through repr), textbook
finite-difference stencils and their orders (Fornberg, Math. Comp. 51 (1988)), the
exact derivative of sin t, and standard Gaussian-noise statistics.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch

from mnemode.data import (Normalisation, TrajectorySet, finite_difference, generate, load_trajectories,
                          take_windows, validate, window_starts)
from mnemode.errors import DataError
from mnemode.solvers import RK4
from mnemode.systems import lorenz63, thermosyphon


def _sample_set(n_times=12, n_traj=3, forcing=True, seed=0):
    rng = np.random.default_rng(seed)
    times = 0.1 * np.arange(n_times) + 1.0 / 3.0  # non-terminating binary fractions
    states = rng.standard_normal((n_times, n_traj, 2)) * np.array([1.0, 1e-7]) + np.pi
    f = rng.standard_normal((n_times, n_traj, 1)) / 7.0 if forcing else None
    return TrajectorySet(times, states, ("speed", "temp"), ("m/s", "K"), f, ("heater",) if forcing else (),
                         meta={"note": "test", "seed": seed})


# -- files ----------------------------------------------------------------------------

@pytest.mark.parametrize("suffix", [".npz", ".csv"])
def test_save_load_round_trip(tmp_path, suffix):
    ts = _sample_set()
    path = ts.save(tmp_path / f"set{suffix}")
    back = load_trajectories(path, forcing_columns=["heater"] if suffix == ".csv" else None)
    # Exact: .npz stores the float64 bits; .csv writes repr(float), which round-trips
    # every float64 exactly (Python's shortest-repr guarantee, float.__repr__).
    np.testing.assert_array_equal(back.times, ts.times)
    np.testing.assert_array_equal(back.states, ts.states)
    np.testing.assert_array_equal(back.forcing, ts.forcing)
    assert back.names == ("speed", "temp") and back.units == ("m/s", "K")
    assert back.forcing_names == ("heater",)
    if suffix == ".npz":
        assert back.meta == ts.meta


def test_npz_keeps_hidden_and_csv_without_forcing(tmp_path):
    ts = generate(thermosyphon(wall_response_time=0.01), n_trajectories=2, duration=1.0, dt=0.1,
                  spin_up=1.0, seed=4)
    assert ts.hidden.shape == (11, 2, 2)
    back = load_trajectories(ts.save(tmp_path / "t.npz"), expected_dim=3)
    np.testing.assert_array_equal(back.hidden, ts.hidden)
    back = load_trajectories(ts.save(tmp_path / "t.csv"), expected_dim=3)
    np.testing.assert_array_equal(back.states, ts.states)
    assert back.units == ts.units and back.forcing is None


def test_csv_written_by_hand(tmp_path):
    # A CSV a user might write: no trajectory column, blank line, selected state columns.
    path = tmp_path / "hand.csv"
    path.write_text("# units: s,m,K\ntime,a,b,c\n0.0,1,2,3\n\n0.5,4,5,6\n1.0,7,8,9\n")
    ts = load_trajectories(path, state_columns=["c", "a"])
    assert ts.states.shape == (3, 1, 2) and ts.names == ("c", "a") and ts.units == ("K", "s")
    np.testing.assert_array_equal(ts.states[:, 0], [[3, 1], [6, 4], [9, 7]])


# -- generation and splits --------------------------------------------------------------

def test_generate_noise_level():
    # Noise is Gaussian with std = noise × the clean per-component std. The noisy and
    # clean sets share the seed (same trajectories), so their difference is the noise;
    # its sample std from ≈ 6000 draws is within ≈ 2 % of the true std (standard error
    # of a standard deviation ≈ 1/√(2n)).
    system = lorenz63()
    kw = dict(n_trajectories=6, duration=10.0, dt=0.01, spin_up=5.0, seed=3)
    clean = generate(system, noise=0.0, **kw)
    noisy = generate(system, noise=0.05, **kw)
    clean_std = clean.states.reshape(-1, 3).std(axis=0)
    np.testing.assert_allclose(noisy.meta["clean_std"], clean_std, rtol=1e-12)
    noise = (noisy.states - clean.states).reshape(-1, 3)
    np.testing.assert_allclose(noise.std(axis=0), 0.05 * clean_std, rtol=0.06)
    np.testing.assert_allclose(noise.mean(axis=0), 0.0, atol=0.05 * clean_std.max() * 0.1)
    assert clean.states.shape == (1001, 6, 3) and clean.dt == pytest.approx(0.01)


def test_generate_matches_direct_integration():
    # The recorded samples are the solver's trajectory from the spun-up states.
    system = lorenz63()
    ts = generate(system, n_trajectories=2, duration=0.5, dt=0.05, spin_up=0.0, seed=9,
                  solver=RK4(0.005))
    gen = torch.Generator().manual_seed(9)
    z0 = system.random_truth_states(2, gen, torch.float64)
    direct = RK4(0.005).unroll(system.truth, z0, 0.0, 0.05, 10).numpy()
    np.testing.assert_allclose(ts.states, direct, rtol=1e-13, atol=1e-12)


def test_split_by_trajectory_and_time():
    ts = _sample_set(n_times=20, n_traj=5)
    a, b = ts.split_by_trajectory([3, 2])
    np.testing.assert_array_equal(a.states, ts.states[:, :3])
    np.testing.assert_array_equal(b.forcing, ts.forcing[:, 3:])
    with pytest.raises(DataError):
        ts.split_by_trajectory([4, 2])
    parts = ts.split_by_time([0.5, 0.25, 0.25])
    assert [p.n_times for p in parts] == [10, 5, 5]
    np.testing.assert_array_equal(np.concatenate([p.times for p in parts]), ts.times)
    np.testing.assert_array_equal(np.concatenate([p.states for p in parts]), ts.states)
    with pytest.raises(DataError):
        ts.split_by_time([0.5, 0.4])


# -- finite differences ------------------------------------------------------------------

@pytest.mark.parametrize("scheme, order", [("forward", 1), ("central", 2), ("central4", 4)])
def test_finite_difference_orders(scheme, order):
    # x(t) = sin t, exact derivative cos t. Textbook stencils have orders 1, 2, 4
    # (Fornberg, Math. Comp. 51 (1988), Table 1): the log-error slope against dt.
    dts = [0.1, 0.05, 0.025, 0.0125]
    errors = []
    for dt in dts:
        t = np.arange(0.0, 3.0 + dt / 2, dt)
        index, d = finite_difference(np.sin(t), dt, scheme)
        errors.append(np.abs(d - np.cos(t[index])).max())
    slope = np.polyfit(np.log(dts), np.log(errors), 1)[0]
    assert abs(slope - order) < 0.3, (slope, errors)


def test_finite_difference_layout_and_torch():
    t = np.arange(0.0, 1.0, 0.01)
    x = np.stack([np.sin(t), np.cos(t)], axis=1)[:, None, :].repeat(2, axis=1)  # (T, B, D)
    index, d = finite_difference(x, 0.01, "central4")
    np.testing.assert_array_equal(index, np.arange(2, len(t) - 2))
    assert d.shape == (len(t) - 4, 2, 2)
    ti, dt_ = finite_difference(torch.tensor(x), 0.01, "central4")
    np.testing.assert_allclose(dt_.numpy(), d, rtol=1e-14)
    np.testing.assert_allclose(d[:, 0, 0], np.cos(t[index]), atol=1e-8)
    with pytest.raises(DataError):
        finite_difference(x[:4], 0.01, "central4")


# -- normalisation and windows ---------------------------------------------------------

def test_normalisation_matches_numpy():
    rng = np.random.default_rng(1)
    v = rng.standard_normal((50, 4, 3)) * [1.0, 10.0, 0.1] + [0.0, 5.0, -2.0]
    norm = Normalisation.fit(v)
    flat = v.reshape(-1, 3)
    np.testing.assert_allclose(norm.mean, np.mean(flat, axis=0), rtol=1e-12)
    np.testing.assert_allclose(norm.std, np.std(flat, axis=0), rtol=1e-12)
    pooled = Normalisation.fit(v, pooled=True)
    np.testing.assert_allclose(pooled.mean, [np.mean(v)] * 3, rtol=1e-12)
    np.testing.assert_allclose(pooled.std, [np.std(v)] * 3, rtol=1e-12)
    scaled = norm.apply(v)
    np.testing.assert_allclose(scaled.reshape(-1, 3).mean(0), 0.0, atol=1e-12)
    np.testing.assert_allclose(scaled.reshape(-1, 3).std(0), 1.0, rtol=1e-12)
    np.testing.assert_allclose(norm.invert(scaled), v, rtol=1e-12)
    torch_scaled = norm.apply(torch.tensor(v, dtype=torch.float32))
    assert torch_scaled.dtype == torch.float32
    np.testing.assert_allclose(torch_scaled.numpy(), scaled, rtol=1e-5, atol=1e-5)
    again = Normalisation.from_dict(norm.to_dict())
    np.testing.assert_array_equal(again.mean, norm.mean)
    np.testing.assert_array_equal(again.std, norm.std)
    # A constant component gets the floor instead of a zero std.
    assert Normalisation.fit(np.ones((5, 2))).std.min() > 0


def test_windows():
    np.testing.assert_array_equal(window_starts(10, 4), np.arange(7))
    np.testing.assert_array_equal(window_starts(10, 4, stride=3), [0, 3, 6])
    np.testing.assert_array_equal(window_starts(4, 4), [0])
    with pytest.raises(DataError):
        window_starts(3, 4)
    states = torch.arange(10 * 3 * 2, dtype=torch.float64).reshape(10, 3, 2)
    traj, start = [2, 0, 2], [0, 5, 6]
    w = take_windows(states, traj, start, 4)
    assert w.shape == (4, 3, 2)
    for i, (b, s) in enumerate(zip(traj, start)):
        torch.testing.assert_close(w[:, i], states[s:s + 4, b])


# -- validation errors --------------------------------------------------------------------

def _raises_data_error(path, *parts, **kwargs):
    with pytest.raises(DataError) as info:
        load_trajectories(path, **kwargs)
    message = str(info.value)
    assert str(path) in message and "Fix:" in message, message
    for part in parts:
        assert part in message, message
    return message


def _write_npz(path, times, states):
    np.savez(path, times=times, states=states, names=np.array(["a", "b", "c"][:states.shape[-1]]))
    return path


def test_non_finite_value(tmp_path):
    states = np.zeros((6, 2, 3))
    states[4, 1, 2] = np.nan
    path = _write_npz(tmp_path / "nan.npz", np.arange(6.0), states)
    _raises_data_error(path, "trajectory 1", "sample 4", "'c'")
    csv = tmp_path / "inf.csv"
    csv.write_text("trajectory,time,a\n0,0.0,1\n0,0.1,inf\n0,0.2,3\n")
    _raises_data_error(csv, "sample 1")


@pytest.mark.parametrize("times, kind, sample", [
    ([0.0, 0.1, 0.3, 0.2, 0.4], "decreasing", "sample 3"),
    ([0.0, 0.1, 0.1, 0.2, 0.4], "duplicate", "sample 2"),
])
def test_bad_times(tmp_path, times, kind, sample):
    path = _write_npz(tmp_path / "times.npz", np.array(times), np.zeros((5, 1, 2)))
    _raises_data_error(path, kind, sample)
    csv = tmp_path / "times.csv"
    csv.write_text("time,a\n" + "".join(f"{t},{i}\n" for i, t in enumerate(times)))
    _raises_data_error(csv, kind, sample)


def test_dimension_mismatch(tmp_path):
    path = _sample_set(forcing=False).save(tmp_path / "dim.npz")
    _raises_data_error(path, "2 observed components", "3", expected_dim=3)
    assert load_trajectories(path, expected_dim=2).dim == 2


@pytest.mark.parametrize("suffix", [".npz", ".csv"])
def test_empty_file(tmp_path, suffix):
    path = tmp_path / f"empty{suffix}"
    path.write_bytes(b"")
    _raises_data_error(path, "empty")


def test_truncated_npz(tmp_path):
    path = _sample_set().save(tmp_path / "cut.npz")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    _raises_data_error(path, "truncated")


def test_truncated_csv_row(tmp_path):
    path = _sample_set(n_times=4, n_traj=2, forcing=False).save(tmp_path / "cut.csv")
    text = path.read_text()
    lines = text.splitlines()
    # Cut the file inside its last row, after the second field.
    cut = text[: text.rindex(lines[-1]) + lines[-1].index(",", lines[-1].index(",") + 1)]
    path.write_text(cut)
    _raises_data_error(path, f"line {len(lines)}", "fields")


def test_non_number_in_csv(tmp_path):
    path = tmp_path / "word.csv"
    # The blank line counts: the message points at the line a text editor shows.
    path.write_text("# units: m,K\ntrajectory,time,a,b\n0,0.0,1,2\n\n0,0.1,1.5,warm\n0,0.2,2,3\n")
    _raises_data_error(path, "line 5", "'b'", "'warm'")


def test_missing_file_and_unknown_suffix(tmp_path):
    _raises_data_error(tmp_path / "nowhere.npz", "not found")
    odd = tmp_path / "data.txt"
    odd.write_text("time,a\n0,1\n1,2\n")
    _raises_data_error(odd, ".txt")


def test_npz_with_non_numeric_states(tmp_path):
    path = tmp_path / "text.npz"
    np.savez(path, times=np.arange(3.0), states=np.array([[["a"]], [["b"]], [["c"]]]))
    _raises_data_error(path, "'states'")


def test_validate_in_memory():
    ts = _sample_set()
    validate(ts, expected_dim=2)
    ts.states[2, 0, 1] = np.inf
    with pytest.raises(DataError, match="trajectory 0, sample 2"):
        validate(ts, "my set")
