"""Discrete (flow-map) reservoir: the hidden update is the exact solution over one interval."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.integrate import solve_ivp

from mnemode.closures import DiscreteRecurrent, Recurrent, ReservoirClosure, ReservoirFlowClosure
from mnemode.errors import ConfigError


@pytest.mark.parametrize("kind", ["filter_bank", "random"])
def test_discrete_update_equals_the_continuous_field_solved_with_the_input_held(kind):
    # Reference: scipy's DOP853 on the closure's own continuous field dr/dt with x held
    # fixed over the interval (zero-order hold), to rtol 1e-12.
    dt = 0.2
    # built in float64 directly, not float32 upcast
    cont = ReservoirClosure(2, kind=kind, hidden_size=12, seed=3, dtype=torch.float64)
    disc = ReservoirFlowClosure(2, kind=kind, hidden_size=12, seed=3, interval=dt, dtype="float64")
    assert isinstance(disc, DiscreteRecurrent) and isinstance(cont, Recurrent)
    assert disc.discrete and not cont.discrete
    x = torch.tensor([0.7, -1.3], dtype=torch.float64)
    r0 = torch.linspace(-0.5, 0.5, 12, dtype=torch.float64)
    sol = solve_ivp(lambda t, r: cont.hidden_field(x, torch.as_tensor(r)).numpy(), (0.0, dt), r0.numpy(),
                    method="DOP853", rtol=1e-12, atol=1e-14)
    got = disc.hidden_field(x, r0).numpy()
    if kind == "filter_bank":  # linear: the held-input solution is exact
        np.testing.assert_allclose(got, sol.y[:, -1], rtol=1e-10, atol=1e-12)
    else:  # the tanh target moves with r inside the interval; zero-order hold is first order in Δt
        assert np.max(np.abs(got - sol.y[:, -1])) < 0.05


def test_interval_must_be_positive():
    with pytest.raises(ConfigError, match="interval"):
        ReservoirFlowClosure(3, interval=0.0)
    with pytest.raises(ConfigError, match="ReservoirFlowClosure"):
        ReservoirClosure(3, interval=0.1)
