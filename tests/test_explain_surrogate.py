"""Sparse polynomial surrogates: libraries and sequentially thresholded least squares.

References: numpy.linalg.lstsq (ordinary least squares on the selected terms);
the number of monomials of total degree ≤ d in n variables is C(n + d, d)
(stars and bars; any combinatorics text); STLSQ as in S. L. Brunton, J. L. Proctor,
J. N. Kutz, PNAS 113 (2016) 3932.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from mnemode.explain.surrogate import PolynomialLibrary, fit_sparse, r_squared, stlsq


def _points(n=500, seed=0):
    rng = np.random.default_rng(seed)
    return rng.normal(size=(n, 3)) * np.array([2.0, 3.0, 1.5]) + np.array([0.0, 1.0, 5.0])


def test_library_size_and_values_match_direct_products():
    lib = PolynomialLibrary(["x", "y", "z"], degree=3)
    assert len(lib) == math.comb(3 + 3, 3)  # C(n + d, d) monomials (stars and bars)
    v = _points(7)
    theta = lib(v)
    names = lib.term_names
    x, y, z = v.T
    # products computed by hand, independent of the exponent table
    for term, direct in (("1", np.ones_like(x)), ("x", x), ("x·z", x * z), ("y^2", y ** 2),
                         ("x·y·z", x * y * z), ("z^3", z ** 3)):
        np.testing.assert_allclose(theta[:, names.index(term)], direct, rtol=1e-14)


def test_library_caps_the_power_of_hidden_states():
    lib = PolynomialLibrary(["x", "r1", "r2"], degree=2, linear_only=["r1", "r2"])
    names = set(lib.term_names)
    assert {"x^2", "x·r1", "r2"} <= names
    assert not names & {"r1^2", "r1·r2", "r2^2"}


def test_stlsq_matches_least_squares_on_selected_terms_and_drops_a_planted_small_term():
    v = _points()
    lib = PolynomialLibrary(["x", "y", "z"], degree=2)
    theta = lib(v)
    names = lib.term_names
    rng = np.random.default_rng(1)
    # 2·x − 0.5·y·z + 0.3, a planted term 1e-4·z² far below a 1 % threshold, and a little noise
    y = 2.0 * v[:, 0] - 0.5 * v[:, 1] * v[:, 2] + 0.3 + 1e-4 * v[:, 2] ** 2 + 1e-3 * rng.normal(size=len(v))
    size = np.sqrt(np.mean(theta ** 2, axis=0))
    planted = names.index("z^2")
    assert 1e-4 * size[planted] < 0.01 * np.sqrt(np.mean(y ** 2))  # it is below the threshold
    xi, active = stlsq(theta, y, threshold=0.01, scale=np.sqrt(np.mean(y ** 2)))
    assert not active[planted] and xi[planted] == 0.0
    assert {names[k] for k in np.nonzero(active)[0]} == {"x", "y·z", "1"}
    reference = np.linalg.lstsq(theta[:, active], y, rcond=None)[0]  # numpy's ordinary least squares
    np.testing.assert_allclose(xi[active], reference, rtol=0, atol=1e-10)
    assert np.all(xi[~active] == 0)


def test_zero_threshold_is_ordinary_least_squares():
    v = _points(200, seed=3)
    lib = PolynomialLibrary(["x", "y", "z"], degree=2)
    theta = lib(v)
    y = np.sin(v[:, 0]) + v[:, 1] * v[:, 2]
    xi, active = stlsq(theta, y, threshold=0.0)
    assert active.all()
    np.testing.assert_allclose(xi, np.linalg.lstsq(theta, y, rcond=None)[0], rtol=0, atol=1e-10)


def test_fit_sparse_recovers_exact_polynomial_and_prints_it():
    v = _points()
    lib = PolynomialLibrary(["x", "y", "z"], degree=2)
    m = np.stack([np.zeros(len(v)), 1.4 * v[:, 0], v[:, 0] * v[:, 1] - 2.5 * v[:, 2]], axis=1)
    fit = fit_sparse(lib, v, m, threshold=0.01, component_names=["x", "y", "z"], floor=[0.1, 0.1, 0.1])
    assert fit.coefficient("x", 1) == pytest.approx(1.4, abs=1e-10)
    assert fit.coefficient("x·y", 2) == pytest.approx(1.0, abs=1e-10)
    assert fit.coefficient("z", 2) == pytest.approx(-2.5, abs=1e-10)
    assert fit.terms(0) == [] and fit.negligible == [True, False, False]
    eqs = fit.equations()
    assert eqs[1].startswith("m_y = 1.4·x") and "R² = 1.0000" in eqs[1]
    assert "−2.5·z" in eqs[2]


def test_r_squared_matches_its_definition():
    rng = np.random.default_rng(2)
    y = rng.normal(size=100)
    p = y + 0.1 * rng.normal(size=100)
    # R² = 1 − SS_res / SS_tot (textbook definition, computed here directly)
    expected = 1 - np.sum((p - y) ** 2) / np.sum((y - y.mean()) ** 2)
    assert r_squared(p, y) == pytest.approx(expected, rel=1e-14)
    assert math.isnan(r_squared(p, np.ones(100)))


def test_library_jacobian_matches_autograd():
    import torch

    lib = PolynomialLibrary(["x", "y", "z"], degree=3)
    v = torch.as_tensor(_points(2), dtype=torch.float64)
    jac = lib.jacobian(v)
    # reference: torch.autograd.functional.jacobian of the library row by row
    for n in range(v.shape[0]):
        ref = torch.autograd.functional.jacobian(lambda w: lib(w), v[n])
        torch.testing.assert_close(jac[n], ref, rtol=1e-12, atol=1e-12)
