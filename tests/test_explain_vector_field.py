"""The vector-field term equivalent to a flow-map correction, on a linear system in closed form.

For dx/dt = A x (physics) + B x (missing term) the flow maps are matrix
exponentials, so the exact flow-map correction is

    m_d(x) = (expm((A + B)Δt) − expm(A Δt)) x / Δt

(scipy.linalg.expm is the reference). A flow-map model carrying exactly this
correction must be read back as the vector-field term B x, and the stated
discrete-versus-vector-field difference must equal the closed-form one.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.linalg import expm

from mnemode.closures.base import Closure, Scaling
from mnemode.explain.surrogate import PolynomialLibrary
from mnemode.explain.vector_field import equivalent_vector_field
from mnemode.hybrid import HybridFlowMap
from mnemode.solvers import RK4, FlowMap
from mnemode.systems.base import VectorField

A = np.array([[-0.2, 1.0, 0.0], [-1.0, -0.2, 0.0], [0.0, 0.0, -0.5]])
B = np.zeros((3, 3))
B[1, 0] = 0.4          # the missing term: 0.4·x0 in the equation of x1
B[2, 2] = -0.3         # and −0.3·x2 in the equation of x2


class _Linear(VectorField):
    dim = 3

    def __init__(self, matrix):
        super().__init__()
        self.register_buffer("matrix", torch.as_tensor(matrix, dtype=torch.float64))

    def forward(self, t, x, u=None):
        return x @ self.matrix.T


class _FixedMap(Closure):
    """m(x) = M x with a fixed matrix (a test double for a fitted memoryless closure)."""

    def __init__(self, matrix):
        super().__init__(3)
        self.scaling = Scaling(3, 3).double()
        self.register_buffer("matrix", torch.as_tensor(matrix, dtype=torch.float64))

    def correction(self, x, r=None, u=None):
        return x @ self.matrix.T


@pytest.mark.parametrize("dt", [0.05, 0.5])
def test_linear_flow_map_correction_is_read_back_as_its_vector_field_term(dt):
    M = (expm((A + B) * dt) - expm(A * dt)) / dt        # exact flow-map correction (scipy)
    model = HybridFlowMap(FlowMap(_Linear(A), dt, RK4(dt / 20)), _FixedMap(M), 3, dt)
    x = torch.as_tensor(np.random.default_rng(0).normal(size=(100, 3)) * 2.0)
    library = PolynomialLibrary(["x0", "x1", "x2"], degree=2)
    eq = equivalent_vector_field(model, x, library, threshold=0.01, component_names=["x0", "x1", "x2"])
    assert eq.fit.coefficient("x0", 1) == pytest.approx(0.4, rel=1e-6)
    assert eq.fit.coefficient("x2", 2) == pytest.approx(-0.3, rel=1e-6)
    kept = {(t, i) for i in range(3) for t, _, _ in eq.fit.terms(i)}
    assert kept == {("x0", 1), ("x2", 2)}
    # stated difference against the closed form ‖(M − B) x‖ / ‖B x‖
    xn = x.numpy()
    expected = np.sqrt(np.sum((xn @ (M - B).T) ** 2) / np.sum((xn @ B.T) ** 2))
    assert eq.overall_difference == pytest.approx(expected, rel=1e-5)
    assert min(eq.fit.r2[1:]) > 1 - 1e-9
