"""Polynomial closure: its monomials and ridge fit against numpy.polynomial and scikit-learn, and inside a ring."""

from __future__ import annotations

import functools

import numpy as np
import pytest
import torch

from mnemode.closures import PolynomialClosure, RingLocalClosure
from mnemode.errors import ConfigError
from mnemode.fitting import set_scaling

torch.set_num_threads(1)

sk_preprocessing = pytest.importorskip("sklearn.preprocessing")
sk_linear = pytest.importorskip("sklearn.linear_model")


def _fitted(closure, x, y):
    set_scaling(closure, x, y)
    closure.fit_regression(x, y)
    return closure


def test_monomials_of_two_inputs_worked_by_hand():
    # degree 2 in (a, b) = (2, 3): a, b, a², a·b, b², then the constant (worked by hand)
    closure = PolynomialClosure(1, degree=2, n_inputs=2).double()
    phi = closure.features(torch.tensor([[2.0, 3.0]], dtype=torch.float64))
    assert phi.tolist() == [[2.0, 3.0, 4.0, 6.0, 9.0, 1.0]]


def test_monomials_match_scikit_learn_polynomial_features():
    # scikit-learn's PolynomialFeatures orders monomials by degree, then lexicographically, bias first
    z = torch.randn(40, 3, generator=torch.Generator().manual_seed(0), dtype=torch.float64)
    closure = PolynomialClosure(1, degree=3, n_inputs=3).double()
    ours = closure.features(z).numpy()
    ref = sk_preprocessing.PolynomialFeatures(degree=3).fit_transform(z.numpy())
    np.testing.assert_allclose(ours, np.concatenate((ref[:, 1:], ref[:, :1]), axis=1), rtol=1e-14, atol=0)
    assert closure.n_features == ref.shape[1] == 20


def test_cubic_fit_of_one_input_equals_numpy_polyfit():
    # a least-squares cubic is unchanged by the affine scaling of inputs and outputs:
    # numpy.polynomial.polynomial.polyfit on the physical data is the reference
    g = torch.Generator().manual_seed(1)
    x = 4.0 * torch.randn(500, 1, generator=g, dtype=torch.float64) + 2.5
    y = 0.3 - 0.4 * x + 0.004 * x ** 2 + 0.0015 * x ** 3 + 0.2 * torch.randn(500, 1, generator=g, dtype=torch.float64)
    closure = _fitted(PolynomialClosure(1, degree=3, ridge=0.0).double(), x, y)
    coef = np.polynomial.polynomial.polyfit(x[:, 0].numpy(), y[:, 0].numpy(), 3)
    probe = torch.linspace(-8.0, 12.0, 41, dtype=torch.float64)[:, None]
    with torch.no_grad():
        ours = closure.correction(probe)[:, 0].numpy()
    np.testing.assert_allclose(ours, np.polynomial.polynomial.polyval(probe[:, 0].numpy(), coef),
                               rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("nested", [True, False], ids=["nested-contraction", "monomials"])
def test_ridge_fit_of_several_inputs_and_outputs_matches_scikit_learn(nested):
    # min ‖ΦA − Ỹ‖² + α N ‖A without the constant‖² on normalised data is scikit-learn's Ridge with
    # alpha = α·N on the same features (its intercept is not penalised); forcing inputs are appended to x.
    # Both ways of evaluating the fitted polynomial (large coefficient tensors use the second) are checked.
    g = torch.Generator().manual_seed(2)
    x = torch.randn(300, 2, generator=g, dtype=torch.float64)
    u = torch.randn(300, 1, generator=g, dtype=torch.float64)
    y = torch.stack((x[:, 0] * x[:, 1] - u[:, 0] ** 2, torch.sin(x[:, 0]) + x[:, 1] ** 3), dim=1)
    ridge = 1e-3
    closure = PolynomialClosure(2, degree=2, ridge=ridge, forcing_dim=1).double()
    assert closure.nested  # 4² coefficients per output
    closure.nested = nested
    inputs = torch.cat((x, u), dim=1)
    _fitted(closure, inputs, y)
    s = closure.scaling
    xt = ((inputs - s.in_mean) / s.in_std).numpy()
    yt = ((y - s.out_offset) / s.out_scale).numpy()
    feats = sk_preprocessing.PolynomialFeatures(degree=2, include_bias=False).fit_transform(xt)
    ref = sk_linear.Ridge(alpha=ridge * xt.shape[0], solver="cholesky").fit(feats, yt)
    probe_x, probe_u = x[:7] + 0.5, u[:7] - 0.25
    probe = ((torch.cat((probe_x, probe_u), 1) - s.in_mean) / s.in_std).numpy()
    expected = s.out_offset.numpy() + s.out_scale.numpy() * ref.predict(
        sk_preprocessing.PolynomialFeatures(degree=2, include_bias=False).fit_transform(probe))
    with torch.no_grad():
        ours = closure.correction(probe_x, None, probe_u).numpy()
    np.testing.assert_allclose(ours, expected, rtol=1e-8, atol=1e-10)


def test_inside_a_ring_the_cubic_in_each_site_is_numpy_polyfit_over_all_sites():
    # neighbours = 0: one cubic in the site's own value, shared by all sites (pooled over sites)
    g = torch.Generator().manual_seed(3)
    x = 3.0 * torch.randn(200, 8, generator=g, dtype=torch.float64) + 2.0
    y = -0.2 - 0.4 * x + 0.01 * x ** 3 + 0.1 * torch.randn(200, 8, generator=g, dtype=torch.float64)
    ring = RingLocalClosure(8, inner=functools.partial(PolynomialClosure, degree=3, ridge=0.0),
                            neighbours=0).double()
    _fitted(ring, x, y)
    coef = np.polynomial.polynomial.polyfit(x.numpy().ravel(), y.numpy().ravel(), 3)
    with torch.no_grad():
        ours = ring.correction(x[:5]).numpy()
    np.testing.assert_allclose(ours, np.polynomial.polynomial.polyval(x[:5].numpy(), coef), rtol=1e-9, atol=1e-9)
    for shift in (1, -3):  # the ring commutes with its rotations
        torch.testing.assert_close(ring.correction(torch.roll(x[:5], shift, -1)),
                                   torch.roll(ring.correction(x[:5]), shift, -1), rtol=1e-12, atol=1e-12)


def test_state_dict_round_trip_rebuilds_the_same_closure(tmp_path):
    x = torch.randn(50, 2, generator=torch.Generator().manual_seed(4), dtype=torch.float64)
    closure = _fitted(PolynomialClosure(2, degree=3).double(), x, x ** 2)
    torch.save(closure.state_dict(), tmp_path / "poly.pt")
    rebuilt = PolynomialClosure(2, degree=3).double()
    rebuilt.load_state_dict(torch.load(tmp_path / "poly.pt", weights_only=True))
    assert torch.equal(rebuilt.correction(x), closure.correction(x))


def test_bad_configurations_raise_config_errors():
    with pytest.raises(ConfigError, match="degree"):
        PolynomialClosure(1, degree=0)
    with pytest.raises(ConfigError, match="ridge"):
        PolynomialClosure(1, ridge=-1.0)
    with pytest.raises(ConfigError, match="monomials"):
        PolynomialClosure(1, degree=6, n_inputs=20)
    assert not PolynomialClosure(1, degree=4, n_inputs=8).nested  # 9⁴ > MAX_NESTED: monomials formed instead


def test_gradients_match_finite_differences():
    # torch.autograd.gradcheck (central finite differences, float64): trajectory fitting backpropagates
    # through the closure into its coefficients and through the state
    g = torch.Generator().manual_seed(5)
    ring = RingLocalClosure(7, inner=functools.partial(PolynomialClosure, degree=3), neighbours=1).double()
    x = torch.randn(40, 7, generator=g, dtype=torch.float64)
    _fitted(ring, x, torch.sin(x) * torch.roll(x, 1, -1))
    probe = torch.randn(3, 7, generator=g, dtype=torch.float64, requires_grad=True)
    assert torch.autograd.gradcheck(lambda z: ring.correction(z), (probe,))
    coef = ring.inner.readout.detach().clone().requires_grad_(True)
    assert torch.autograd.gradcheck(
        lambda c: torch.func.functional_call(ring, {"inner.readout": c}, (probe.detach(),)), (coef,))
