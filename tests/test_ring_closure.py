"""Ring closure: equivariance, size independence, Hydra construction, and learning on two-scale Lorenz-96."""

from __future__ import annotations

import functools

import numpy as np
import pytest
import torch

from mnemode.closures import GaussianProcessClosure, MLPClosure, RandomFeatureClosure, RingLocalClosure
from mnemode.data import generate
from mnemode.errors import ConfigError
from mnemode.fitting import DerivativeFit, FitContext, set_scaling
from mnemode.hybrid import HybridField
from mnemode.systems import lorenz96_two_scale

torch.set_num_threads(1)

K, J = 8, 8


def _random_fit(closure, k, seed=0):
    g = torch.Generator().manual_seed(seed)
    x = 3.0 * torch.randn(300, k, generator=g, dtype=torch.float64) + 2.0
    y = torch.sin(x) + 0.3 * torch.roll(x, 1, -1) - 0.1 * x ** 2
    set_scaling(closure, x, y)
    closure.fit_regression(x, y)
    return x


@pytest.mark.parametrize("inner", [
    functools.partial(RandomFeatureClosure, n_features=50),
    functools.partial(MLPClosure, width=8, epochs=3),
    functools.partial(GaussianProcessClosure, max_points=60, n_restarts=0, max_iter=20),
])
def test_rolling_the_input_rolls_the_output(inner):
    ring = RingLocalClosure(K, inner=inner, neighbours=2).double()
    x = _random_fit(ring, K)
    probe = x[:5]
    out = ring.correction(probe)
    for shift in (1, 3, -2):  # m(roll(x)) = roll(m(x)): the closure commutes with rotations of the ring
        torch.testing.assert_close(ring.correction(torch.roll(probe, shift, -1)), torch.roll(out, shift, -1),
                                   rtol=1e-12, atol=1e-12)


def test_parameter_count_does_not_grow_with_the_ring():
    counts = []
    for k in (8, 16, 40):
        ring = RingLocalClosure(k, inner=functools.partial(MLPClosure, width=8), neighbours=2)
        counts.append(sum(p.numel() for p in ring.parameters()))
    # one MLP 5 → 8 → 8 → 1: (5·8 + 8) + (8·8 + 8) + (8 + 1) weights and biases, counted by hand
    assert counts == [48 + 72 + 9] * 3


def test_neighbourhoods_index_the_ring_modulo_k():
    ring = RingLocalClosure(5, neighbours=1)
    z = torch.arange(5.0)
    hood = ring.neighbourhoods(z)
    assert hood.tolist() == [[4, 0, 1], [0, 1, 2], [1, 2, 3], [2, 3, 4], [3, 4, 0]]


def test_built_from_a_hydra_config_with_a_partial_inner_closure(tmp_path):
    from hydra.utils import instantiate
    from omegaconf import OmegaConf

    cfg = OmegaConf.create({
        "_target_": "mnemode.closures.RingLocalClosure", "dim": K, "neighbours": 1,
        "inner": {"_target_": "mnemode.closures.MLPClosure", "_partial_": True, "width": 6, "epochs": 2},
    })
    ring = instantiate(cfg).double()
    assert isinstance(ring.inner, MLPClosure) and ring.inner.in_dim == 3 and ring.inner.dim == 1
    x = _random_fit(ring, K)
    torch.save(ring.state_dict(), tmp_path / "ring.pt")
    rebuilt = instantiate(cfg).double()
    rebuilt.load_state_dict(torch.load(tmp_path / "ring.pt", weights_only=True))
    assert torch.equal(rebuilt.correction(x[:4]), ring.correction(x[:4]))


def test_bad_configurations_raise_config_errors():
    with pytest.raises(ConfigError, match="neighbours"):
        RingLocalClosure(4, neighbours=2)
    with pytest.raises(ConfigError, match="in_dim"):
        RingLocalClosure(8, inner=RandomFeatureClosure(1, n_inputs=3), neighbours=2)
    with pytest.raises(ConfigError, match="forcing"):
        RingLocalClosure(8, forcing_dim=1)


@pytest.fixture(scope="module")
def two_scale_data():
    system = lorenz96_two_scale(k=K, j=J)
    train = generate(system, n_trajectories=4, duration=20.0, dt=0.01, seed=0)
    test = generate(system, n_trajectories=2, duration=10.0, dt=0.01, seed=1)
    return system, train, test


def _coupling(ts):
    """The missing term −(h c / b) Σ_j Y_{j,k} (Lorenz 1996, eq. 3.1; h = 1, b = c = 10) from the hidden Y."""
    t, b, _ = ts.states.shape
    return -ts.hidden.reshape(t, b, K, J).sum(-1)


@pytest.mark.slow
def test_ring_closure_learns_the_two_scale_coupling(two_scale_data):
    system, train, test = two_scale_data
    ring = RingLocalClosure(K, inner=functools.partial(RandomFeatureClosure, n_features=200,
                                                       lengthscale=[1.0, 2.0, 4.0], ridge=1e-6),
                            neighbours=2).double()
    info = DerivativeFit(max_samples=5000).fit(HybridField(system.nominal, ring, K), train, None,
                                                      FitContext(seed=0))
    x = torch.as_tensor(test.states.reshape(-1, K))
    truth = _coupling(test).reshape(-1, K)
    with torch.no_grad():
        learned = ring.correction(x).numpy()
    rms_learned = float(np.sqrt(((learned - truth) ** 2).mean()))
    rms_none = float(np.sqrt((truth ** 2).mean()))
    # Reference: the classic deterministic parametrisation, a cubic polynomial in X_k (common practice),
    # fitted with numpy.polynomial to the *true* coupling term (an oracle fit on the hidden variables).
    coef = np.polynomial.polynomial.polyfit(train.states.reshape(-1), _coupling(train).reshape(-1), 3)
    rms_cubic = float(np.sqrt(((np.polynomial.polynomial.polyval(x.numpy(), coef) - truth) ** 2).mean()))
    print(f"coupling RMS error: no correction {rms_none:.3f}, ring closure {rms_learned:.3f}, "
          f"cubic oracle {rms_cubic:.3f}; fit {info['fit_seconds']:.1f} s")
    assert rms_learned < 0.5 * rms_none
    assert rms_learned < 1.05 * rms_cubic
