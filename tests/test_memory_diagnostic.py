""""Does it need memory?" on the demo: memoryless regime (τ = 0.01) and memory regime (τ = 1).

Outside references: scipy.signal.lfilter (the history filters); the regime of each
wall response time is known from the truth equations (thermosyphon docstring: for
τ → 0 the wall temperatures are a function of x, for τ = 1 they lag it).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.signal import lfilter

from mnemode.data import generate
from mnemode.errors import DataError
from mnemode.fitting.memory_diagnostic import leaky_averages, memory_need
from mnemode.solvers import RK4
from mnemode.systems import thermosyphon

torch.set_num_threads(1)


def test_leaky_averages_match_lfilter():
    rng = np.random.default_rng(0)
    x = rng.standard_normal((200, 2, 3)).cumsum(axis=0)
    dt, taus = 0.05, (0.1, 1.0, 4.0)
    h = leaky_averages(x, dt, taus)
    assert h.shape == (200, 2, 9)
    for k, tau in enumerate(taus):
        a = np.exp(-dt / tau)
        # reference: scipy.signal.lfilter of y_n = a y_{n−1} + (1 − a) x_n with y_0 = x_0
        ref = lfilter([1 - a], [1, -a], x, axis=0, zi=a * x[:1])[0]
        np.testing.assert_allclose(h[..., 3 * k:3 * k + 3], ref, rtol=1e-12, atol=1e-12)


def _demo(tau: float, step: float):
    system = thermosyphon(wall_response_time=tau)
    data = generate(system, n_trajectories=3, duration=30.0, dt=0.02, solver=RK4(step), seed=1, spin_up=10.0)
    train, val = data.split_by_trajectory([2, 1])
    return system, train, val


def test_memoryless_regime_and_memory_regime_are_told_apart():
    # τ = 0.01: the wall follows the fluid (P ≈ Y/2, Q ≈ Z/2), a function of x; RK4 step ≤ τ keeps
    # the fast wall mode accurate
    system, train, val = _demo(0.01, 0.01)
    fast = memory_need(train, val, system.nominal)
    assert fast["recommendation"] == "memoryless", fast
    assert fast["memoryless_explained"] > 0.999
    assert fast["remaining_explained"] < 0.5
    assert memory_need(train, val, None)["recommendation"] == "memoryless"

    # τ = 1: the wall lags by about one time unit; the present state explains only part of it
    system, train, val = _demo(1.0, 0.02)
    slow = memory_need(train, val, system.nominal)
    assert slow["recommendation"] == "memory", slow
    assert slow["memoryless_explained"] < 0.97
    assert slow["history_explained"] > 0.99
    assert slow["additional_explained"] > 0.03
    # without physics the residual is all of ẋ, yet the past still removes most of what is left
    assert memory_need(train, val, None)["recommendation"] == "memory"
    for result in (fast, slow):
        assert 0.0 <= result["memoryless_explained"] <= 1.0 and result["n_val"] > 0


def test_short_trajectories_are_refused():
    system = thermosyphon()
    data = generate(system, n_trajectories=2, duration=2.0, dt=0.02, solver=RK4(0.02), seed=0, spin_up=5.0)
    train, val = data.split_by_trajectory([1, 1])
    with pytest.raises(DataError, match="transient"):
        memory_need(train, val, system.nominal, time_constants=(0.1, 5.0))
