"""Random-feature closure: kernel approximation, ridge readout, validation choice, state-dict contract."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from mnemode.closures import RandomFeatureClosure
from mnemode.errors import ConfigError, DataError
from mnemode.fitting import set_scaling

torch.set_num_threads(1)


def _data(n=400, seed=0):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 3)) * [2.0, 1.0, 0.5] + [1.0, 0.0, 10.0]
    y = np.stack([np.sin(x[:, 0]) * x[:, 1], np.tanh(x[:, 2] - 10.0) + 0.1 * x[:, 0] ** 2], -1) + 4.0
    return torch.as_tensor(x), torch.as_tensor(y)


def test_features_approximate_the_squared_exponential_kernel():
    # Reference: scikit-learn's rbf_kernel exp(−γ‖a − b‖²) with γ = 1/(2ℓ²) (Rahimi & Recht 2007, Claim 1:
    # the Monte-Carlo error of p features is O(1/sqrt(p))).
    from sklearn.metrics.pairwise import rbf_kernel

    p, ell = 20000, 1.5
    closure = RandomFeatureClosure(2, n_features=p, lengthscale=ell, seed=3).double()
    z = torch.as_tensor(np.random.default_rng(1).normal(size=(12, 2)))
    phi = closure.features(z)[:, :-1]                     # without the constant bias feature
    approx = (phi @ phi.T).numpy()
    exact = rbf_kernel(z.numpy(), gamma=1.0 / (2 * ell ** 2))
    assert np.max(np.abs(approx - exact)) < 6.0 / np.sqrt(p)
    assert torch.all(closure.features(z)[:, -1] == 1.0)


def test_readout_solves_the_ridge_normal_equations():
    x, y = _data()
    ridge = 1e-4
    closure = RandomFeatureClosure(2, forcing_dim=1, n_features=60, lengthscale=2.0, ridge=ridge).double()
    set_scaling(closure, x, y)
    closure.fit_regression(x, y)
    # Reference: numpy.linalg.solve of (ΦᵀΦ + ridge·N·diag(1,…,1,0)) A = ΦᵀỸ (bias row unpenalised).
    s = closure.scaling
    phi = closure.features((x - s.in_mean) / s.in_std).numpy()
    y_norm = ((y - s.out_offset) / s.out_scale).numpy()
    penalty = np.full(phi.shape[1], ridge * x.shape[0])
    penalty[-1] = 0.0
    expected = np.linalg.solve(phi.T @ phi + np.diag(penalty), phi.T @ y_norm)
    got = closure.readout.detach().numpy()
    assert np.linalg.norm(got - expected) <= 1e-8 * np.linalg.norm(expected)


def test_lengthscale_is_chosen_by_validation_error():
    x, y = _data(n=600)
    xv, yv = _data(n=300, seed=5)
    grid = [0.05, 1.0, 30.0]
    closure = RandomFeatureClosure(2, forcing_dim=1, n_features=200, lengthscale=grid, ridge=1e-8).double()
    set_scaling(closure, x, y)
    info = closure.fit_regression(x, y, val_inputs=xv, val_targets=yv)
    errors = []
    for ell in grid:  # the same fit by hand for each candidate
        single = RandomFeatureClosure(2, forcing_dim=1, n_features=200, lengthscale=ell, ridge=1e-8).double()
        set_scaling(single, x, y)
        single.fit_regression(x, y)
        with torch.no_grad():
            errors.append(float(((single.correction(xv) - yv) / single.scaling.out_scale).pow(2).sum()))
    assert info["lengthscale"] == grid[int(np.argmin(errors))] == 1.0  # too rough and too smooth both lose
    assert float(closure.lengthscale) == 1.0


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_state_dict_round_trip_through_weights_only_load(tmp_path, dtype):
    x, y = _data()
    kwargs = dict(forcing_dim=1, n_features=80, lengthscale=[1.0, 3.0], ridge=1e-6, seed=7)
    closure = RandomFeatureClosure(2, **kwargs).to(dtype)
    set_scaling(closure, x, y)
    closure.fit_regression(x, y)
    torch.save(closure.state_dict(), tmp_path / "rff.pt")
    rebuilt = RandomFeatureClosure(2, **kwargs).to(dtype)
    rebuilt.load_state_dict(torch.load(tmp_path / "rff.pt", weights_only=True))
    probe = x[:8].to(dtype).reshape(2, 4, 3)
    out = closure.correction(probe)
    assert out.shape == (2, 4, 2) and out.dtype == dtype
    assert torch.equal(rebuilt.correction(probe), out)
    if dtype == torch.float32:  # float32 agrees with the float64 fit to single precision
        ref = RandomFeatureClosure(2, **kwargs).double()
        set_scaling(ref, x, y)
        ref.fit_regression(x, y)
        torch.testing.assert_close(out.double(), ref.correction(probe.double()), rtol=1e-4, atol=1e-4)


def test_bad_input_raises_mnemode_errors():
    with pytest.raises(ConfigError, match="lengthscale"):
        RandomFeatureClosure(2, lengthscale=[1.0, -1.0])
    with pytest.raises(ConfigError, match="ridge"):
        RandomFeatureClosure(2, ridge=-1.0)
    with pytest.raises(DataError, match=r"\(N, 2\)"):
        RandomFeatureClosure(2).fit_regression(torch.zeros(5, 3), torch.zeros(5, 2))
