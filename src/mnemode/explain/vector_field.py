"""What a discrete (flow-map) correction is, and the vector-field term equivalent to it.

A flow-map model steps ``x_{n+1} = Ψ0(x_n) + Δt·m_d(x_n)``. Its correction ``m_d``
is the *interval-averaged correction of the flow map*, not a term of dx/dt: to
first order in the missing term ``m``::

    Δt·m_d(x) ≈ ∫_0^Δt Φ0(Δt, s) m(x0(s)) ds

(``Φ0`` the tangent propagator of the physics along its own trajectory ``x0(s)``
from ``x``). Reading ``m_d`` as ``m`` gives wrong coefficients at coarse sampling.

The equivalent vector-field term is the ``m_c(x) = Θ(x) Ξ`` (sparse, polynomial)
whose flow reproduces the learned step::

    Ψ_{f0 + Θ Ξ}(x_n) ≈ Ψ0(x_n) + Δt·m_d(x_n)        at the test states x_n

It is fitted by Gauss–Newton with sequentially thresholded least squares in each
step: around the current ``Ξ_k`` the flow is linear in ``Ξ`` through the
sensitivities ``S = ∂Ψ/∂Ξ``, integrated beside the state::

    dz/ds = f0(z) + Θ(z) Ξ_k,     dS/ds = J(z) S + E(z),     z(0) = x_n, S(0) = 0

with ``J = ∂(f0 + Θ Ξ_k)/∂z`` and ``E[i, (p, i)] = θ_p(z)``, and
``S vec(Ξ) ≈ Δt·m_d + Ψ0(x_n) − z(Δt) + S vec(Ξ_k)`` is solved for the next ``Ξ``.
Where the learned step is a flow of a polynomial field this is exact; the
difference ``m_d − m_c`` is the discrete-versus-vector-field difference reported.

Beside it, the continuous (midpoint) form of the flow-map targets of
:mod:`mnemode.fitting.targets` (second order in Δt) is fitted by a plain sparse
surrogate, for comparison.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import torch
from torch import nn

from ..data import TrajectorySet
from ..fitting.targets import flow_map_targets
from ..solvers import RK4
from .surrogate import PolynomialLibrary, SparseFit, fit_sparse, r_squared, stlsq

__all__ = ["DISCRETE_STATEMENT", "VectorFieldEquivalent", "equivalent_vector_field", "midpoint_surrogate"]

DISCRETE_STATEMENT = (
    "This correction acts on the flow map: x_{n+1} = Ψ0(x_n) + Δt·m(x_n). It is the correction of one "
    "whole interval Δt divided by Δt (the interval-averaged correction of the flow map, carried along by "
    "the physics during the interval), not a term of dx/dt. Read as dx/dt its coefficients are biased by "
    "an amount that grows with Δt; the vector-field term equivalent to it is given below where the "
    "physics allows.")


class _Augmented(nn.Module):
    """``[z, S] ↦ [F(z), J(z) S + E(z)]`` with ``F = f0 + Θ Ξ`` (module docstring)."""

    def __init__(self, physics, library: PolynomialLibrary, coef: torch.Tensor, dim: int):
        super().__init__()
        self.physics, self.library, self.coef, self.dim = physics, library, coef, dim
        self.P = len(library)

    def field(self, z):
        return self.physics(0.0, z) + self.library(z) @ self.coef

    def forward(self, t, state):
        N, D, P = state.shape[0], self.dim, self.P
        z, S = state[:, :D], state[:, D:].reshape(N, D, P * D)
        with torch.enable_grad():  # Jacobian of the physics, row by row (the field acts on each state alone)
            zz = z.detach().requires_grad_(True)
            f0 = self.physics(0.0, zz)
            J = torch.stack([torch.autograd.grad(f0[:, i].sum(), zz, retain_graph=i + 1 < D)[0]
                             for i in range(D)], dim=1)         # (N, D, D)
        theta = self.library(z)                                 # (N, P)
        # the polynomial part's Jacobian in closed form: Σ_p Ξ[p, i] ∂θ_p/∂z_j
        J = J.detach() + torch.einsum("npj,pi->nij", self.library.jacobian(z), self.coef)
        E = torch.zeros(N, D, P, D, dtype=z.dtype)
        for i in range(D):
            E[:, i, :, i] = theta
        dS = J @ S + E.reshape(N, D, P * D)
        return torch.cat((f0.detach() + theta @ self.coef, dS.reshape(N, -1)), dim=-1)


@dataclass
class VectorFieldEquivalent:
    """The vector-field term equivalent to a learned flow-map correction.

    Attributes:
        fit: sparse surrogate ``m_c = Θ Ξ`` (its ``r2``: how well the flow of
            ``f0 + m_c`` reproduces the learned step, per component).
        difference: per component, ``rms(m_d,i − m_c,i) / rms‖m_c‖`` at the test states
            (relative to the size of the whole vector-field term, so finite where ``m_c,i = 0``).
        overall_difference: the same over all components together.
        iterations: Gauss–Newton steps taken.
    """

    fit: SparseFit
    difference: list[float]
    overall_difference: float
    iterations: int

    def to_dict(self) -> dict:
        return {"surrogate": self.fit.to_dict(), "relative_difference": dict(zip(self.fit.component_names,
                                                                                 self.difference)),
                "overall_relative_difference": self.overall_difference, "iterations": self.iterations}


def _rms(a: np.ndarray, axis=0):
    return np.sqrt(np.mean(np.asarray(a) ** 2, axis=axis))


def equivalent_vector_field(model, x: torch.Tensor, library: PolynomialLibrary, *, threshold: float = 0.01,
                            floor=None, component_names=None, n_iter: int = 4,
                            step: float | None = None) -> VectorFieldEquivalent:
    """Fit the vector-field term whose flow reproduces ``model``'s learned step (module docstring).

    Args:
        model: a :class:`~mnemode.hybrid.HybridFlowMap` with physics and a memoryless closure.
        x: ``(N, D)`` states where the step is matched (test data).
        library: candidate terms in the observed variables.
        threshold: STLSQ relative threshold.
        floor: per component noise floors (see :func:`~mnemode.explain.surrogate.fit_sparse`).
        component_names: names of the components.
        n_iter: Gauss–Newton steps.
        step: RK4 step of the integration (default: the model's Ψ0 step, at most Δt/10).

    Raises:
        ValueError: a model without physics or with a hidden state.
    """
    if model.flow_map is None or model.hidden_size:
        raise ValueError("the equivalent vector field needs a flow-map model with physics and no hidden state")
    dt = float(model.dt)
    D = int(model.dim)
    x = x.detach().to(torch.float64)
    physics = model.flow_map.field
    own_step = getattr(model.flow_map.solver, "step", dt / 10)
    solver = RK4(float(step) if step is not None else min(float(own_step), dt / 10))
    with torch.no_grad():
        base = model.flow_map.solver.advance(physics, 0.0, x.to(_dtype(model)), dt).to(torch.float64)
        m_d = model.closure.correction(x.to(_dtype(model))).to(torch.float64)
    goal = base + dt * m_d                                       # the learned step Ψ0 + Δt·m_d
    theta_x = library(x).numpy()
    size = _rms(theta_x)
    P = len(library)
    md = m_d.numpy()
    floor = np.zeros(D) if floor is None else np.broadcast_to(np.asarray(floor, dtype=np.float64), (D,))
    scale = np.maximum(_rms(md), floor)
    scale = np.where(scale > 0, scale, 1.0)
    # column (p, i): term p in component i; its contribution per unit coefficient, relative to component i
    column_size = (size[:, None] / scale[None, :]).reshape(-1)
    coef = np.zeros((P, D))
    N = x.shape[0]
    iterations = 0
    for iterations in range(1, int(n_iter) + 1):
        aug = _Augmented(physics, library, torch.as_tensor(coef), D)
        state0 = torch.cat((x, torch.zeros(N, D * P * D, dtype=torch.float64)), dim=-1)
        with torch.no_grad():
            end = solver.advance(aug, 0.0, state0, dt)
        z, S = end[:, :D], end[:, D:].reshape(N, D, P * D)
        A = S.reshape(N * D, P * D).numpy()
        b = ((goal - z).reshape(-1)).numpy() + A @ coef.reshape(-1)
        xi, _ = stlsq(A, b, threshold, column_size=column_size, scale=1.0)
        new = xi.reshape(P, D)
        change = np.max(np.abs(new - coef) * size[:, None] / scale[None, :])
        coef = new
        if change < 1e-10:
            break
    # quality: the step of f0 + Θ Ξ against the learned step, as corrections per Δt
    aug = _Augmented(physics, library, torch.as_tensor(coef), D)
    with torch.no_grad():
        z = solver.advance(lambda t, s: aug.field(s), 0.0, x, dt)
    fitted_step = ((z - base) / dt).numpy()
    r2 = [r_squared(fitted_step[:, i], md[:, i]) for i in range(D)]
    names = list(component_names) if component_names is not None else [str(i) for i in range(D)]
    negligible = [bool(_rms(md[:, i]) < floor[i]) for i in range(D)]
    fit = SparseFit(library, coef, names, r2, list(scale), np.abs(coef) * size[:, None], float(threshold),
                    negligible)
    m_c = theta_x @ coef
    diff = md - m_c
    size_c = float(np.sqrt(np.mean(np.sum(m_c ** 2, axis=1))))     # rms of the vector ‖m_c‖
    rel = [float(_rms(diff[:, i]) / size_c) if size_c > 0 else math.nan for i in range(D)]
    total = float(np.sqrt(np.sum(diff ** 2) / np.sum(m_c ** 2))) if size_c > 0 else math.nan
    return VectorFieldEquivalent(fit, rel, total, iterations)


def _dtype(model) -> torch.dtype:
    from .trace import model_dtype

    return model_dtype(model)


def midpoint_surrogate(model, x: torch.Tensor, library: PolynomialLibrary, *, threshold: float = 0.01,
                       floor=None, component_names=None) -> SparseFit:
    """Sparse surrogate of the continuous-form flow-map targets of the learned step.

    The pairs ``(x_n, Ψ0(x_n) + Δt·m_d(x_n))`` go through
    :func:`mnemode.fitting.targets.flow_map_targets` with ``continuous=True``
    (midpoint inputs, propagator-corrected targets; second order in Δt).
    """
    dtype = _dtype(model)
    with torch.no_grad():
        step = model(x.to(dtype)).to(torch.float64)
    D = int(model.dim)
    names = list(component_names) if component_names is not None else [str(i) for i in range(D)]
    pairs = TrajectorySet(times=np.array([0.0, float(model.dt)]),
                          states=np.stack([x.detach().to(torch.float64).numpy(), step[..., :D].numpy()]),
                          names=tuple(names))
    inputs, targets = flow_map_targets(pairs, model.flow_map, continuous=True)
    return fit_sparse(library, inputs[:, :D].numpy(), targets.numpy(), threshold=threshold,
                      component_names=names, floor=floor)
