"""Built-in systems against their published equations, exact identities and published statistics.

Every vector field is compared with an independent numpy implementation written here
from the published equations, index by index, and long runs are checked against
published climatologies or identities that hold exactly for time averages.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch

from mnemode.errors import ConfigError
from mnemode.solvers import RK4
from mnemode.systems import (HeatStoringWallLoopField, IdealWallLoopField, Lorenz63Field, Lorenz96Field,
                             Lorenz96TwoScaleField, custom_system, lorenz63, lorenz96, lorenz96_two_scale,
                             thermosyphon)


def _rng_states(shape, seed=0, scale=1.0, mean=0.0):
    return mean + scale * np.random.default_rng(seed).standard_normal(shape)


# -- Lorenz-63 ----------------------------------------------------------------------

def test_lorenz63_field_matches_published_equations():
    # Lorenz, J. Atmos. Sci. 20 (1963): x' = σ(y − x), y' = x(ρ − z) − y, z' = xy − βz.
    sigma, rho, beta = 10.0, 28.0, 8.0 / 3.0
    u = _rng_states((5, 3), scale=10.0)
    want = np.stack([sigma * (u[:, 1] - u[:, 0]), u[:, 0] * (rho - u[:, 2]) - u[:, 1],
                     u[:, 0] * u[:, 1] - beta * u[:, 2]], axis=1)
    got = Lorenz63Field(sigma, rho, beta)(0.0, torch.tensor(u)).numpy()
    np.testing.assert_allclose(got, want, rtol=1e-14, atol=1e-12)
    system = lorenz63(nominal_rho=26.6)
    # The nominal model differs from the truth only by (ρ − ρ_nominal)·x in the y equation.
    diff = (system.truth(0.0, torch.tensor(u)) - system.nominal(0.0, torch.tensor(u))).numpy()
    np.testing.assert_allclose(diff, np.stack([0 * u[:, 0], 1.4 * u[:, 0], 0 * u[:, 0]], axis=1), atol=1e-12)


def test_lorenz63_time_average_identity():
    # Exact identity for long-time averages on a bounded trajectory (the average of a
    # time derivative of a bounded quantity vanishes):
    #   d(x²/2)/dt = σ(xy − x²)  ⇒  ⟨xy⟩ = ⟨x²⟩,
    #   dz/dt      = xy − βz      ⇒  ⟨xy⟩ = β⟨z⟩,
    # hence ⟨x²⟩ = β⟨z⟩ (derived from Lorenz 1963's equations).
    beta = 8.0 / 3.0
    gen = torch.Generator().manual_seed(3)
    z = torch.tensor([0.0, 0.0, 25.0], dtype=torch.float64) + 8 * torch.randn(32, 3, generator=gen,
                                                                                dtype=torch.float64)
    f, solver = Lorenz63Field(), RK4(0.01)
    z = solver.advance(f, 0.0, z, 10.0)
    traj = solver.unroll(f, z, 0.0, 0.01, 4000)
    x, y, zz = traj.unbind(-1)
    x2, xy, bz = (x * x).mean().item(), (x * y).mean().item(), beta * zz.mean().item()
    assert abs(x2 / bz - 1) < 0.02
    assert abs(xy / bz - 1) < 0.02
    # Sanity: a wrong β in the field would break the identity by its own error.
    assert abs(x2 / (0.9 * bz) - 1) > 0.05


# -- Lorenz-96 single scale -------------------------------------------------------------

def _lorenz96_loop(x, forcing):
    # Lorenz (1996): dX_k/dt = (X_{k+1} − X_{k−2}) X_{k−1} − X_k + F, indices mod K.
    K = x.shape[-1]
    out = np.empty_like(x)
    for k in range(K):
        out[..., k] = (x[..., (k + 1) % K] - x[..., (k - 2) % K]) * x[..., (k - 1) % K] - x[..., k] + forcing
    return out


@pytest.mark.parametrize("k", [4, 5, 40])
def test_lorenz96_field_matches_loop(k):
    x = _rng_states((3, k), seed=k, scale=3.0, mean=2.0)
    np.testing.assert_allclose(Lorenz96Field(k, 8.0)(0.0, torch.tensor(x)).numpy(), _lorenz96_loop(x, 8.0),
                               rtol=1e-13, atol=1e-12)
    # The advection term conserves energy Σ X_k² / 2 (Lorenz 1996; Lorenz & Emanuel 1998).
    advection = Lorenz96Field(k, 0.0)(0.0, torch.tensor(x)).numpy() + x
    np.testing.assert_allclose((x * advection).sum(-1), 0.0, atol=1e-10)
    with pytest.raises(ValueError):
        Lorenz96Field(3)


def test_lorenz96_climatology():
    # K = 40, F = 8: mean of X ≈ 2.3, standard deviation ≈ 3.6
    # (Lorenz & Emanuel, J. Atmos. Sci. 55 (1998); recalled from memory).
    system = lorenz96(40, 8.0)
    gen = torch.Generator().manual_seed(0)
    z = system.random_truth_states(32, gen)
    f, solver = system.truth, RK4(0.05)
    z = solver.advance(f, 0.0, z, system.spin_up)
    traj = solver.unroll(f, z, 0.0, 0.05, 1000)
    assert abs(traj.mean().item() - 2.3) < 0.15
    assert abs(traj.std().item() - 3.6) < 0.15


# -- Lorenz-96 two scale -------------------------------------------------------------

def _two_scale_loop(X, Y, F, h, b, c):
    """Lorenz (1996), eqs. for the two-scale system, index by (j, k) explicitly.

    dX_k/dt     = −X_{k−1}(X_{k−2} − X_{k+1}) − X_k + F − (hc/b) Σ_j Y_{j,k}
    dY_{j,k}/dt = −cb Y_{j+1,k}(Y_{j+2,k} − Y_{j−1,k}) − c Y_{j,k} + (hc/b) X_k
    with the fast variables one ring of K·J: Y_{J+1,k} = Y_{1,k+1}, Y_{0,k} = Y_{J,k−1}.
    Y is given as Y[j, k] (0-based j = 0..J−1).
    """
    J, K = Y.shape
    dX = np.empty(K)
    dY = np.empty((J, K))

    def y(j, k):  # fast variable with ring wrap-around across sectors
        k = (k + j // J) % K
        return Y[j % J, k]

    for k in range(K):
        coupling = sum(Y[j, k] for j in range(J))
        dX[k] = (-X[(k - 1) % K] * (X[(k - 2) % K] - X[(k + 1) % K]) - X[k] + F - h * c / b * coupling)
        for j in range(J):
            dY[j, k] = (-c * b * y(j + 1, k) * (y(j + 2, k) - y(j - 1, k)) - c * Y[j, k] + h * c / b * X[k])
    return dX, dY


def test_two_scale_field_matches_published_equations():
    K, J, F, h, b, c = 6, 4, 10.0, 1.0, 10.0, 10.0
    X = _rng_states(K, seed=1, scale=3.0)
    Y = _rng_states((J, K), seed=2, scale=0.5)
    # mnemode's state is [X (K), Y (K·J)] with Y_{j,k} at position K + k·J + j.
    state = np.concatenate([X, Y.T.reshape(-1)])
    got = Lorenz96TwoScaleField(K, J, F, h, b, c)(0.0, torch.tensor(state)).numpy()
    dX, dY = _two_scale_loop(X, Y, F, h, b, c)
    np.testing.assert_allclose(got[:K], dX, rtol=1e-13, atol=1e-12)
    np.testing.assert_allclose(got[K:], dY.T.reshape(-1), rtol=1e-13, atol=1e-12)


def test_two_scale_system_nominal_and_bounded_truth_run():
    system = lorenz96_two_scale()  # published set K=36, J=10, F=10, h=1, b=c=10 (Lorenz 1996)
    assert (system.truth.k, system.truth.j, system.truth.F) == (36, 10, 10.0)
    assert (system.truth.h, system.truth.b, system.truth.c) == (1.0, 10.0, 10.0)
    assert system.dim == 36 and system.truth_dim == 396 and len(system.hidden_names) == 360
    X = _rng_states(36, seed=4, scale=3.0)
    # Nominal = the slow equations without the coupling term (the loop with Y = 0).
    dX, _ = _two_scale_loop(X, np.zeros((10, 36)), 10.0, 1.0, 10.0, 10.0)
    np.testing.assert_allclose(system.nominal(0.0, torch.tensor(X)).numpy(), dX, rtol=1e-13, atol=1e-12)
    # Truth run: RK4 at step 0.005 (the fast scale has time scale 1/c = 0.1).
    gen = torch.Generator().manual_seed(5)
    z = system.random_truth_states(2, gen)
    traj = RK4(0.005).unroll(system.truth, z, 0.0, 0.05, 100)
    assert torch.isfinite(traj).all()
    # Bounded: the slow variables of this set stay within about ±20 and the fast ones
    # within a few units (Lorenz 1996; recalled from memory); a blow-up would exceed this.
    assert traj[..., :36].abs().max() < 25.0
    assert traj[..., 36:].abs().max() < 5.0
    np.testing.assert_array_equal(system.observe(traj).numpy(), traj[..., :36].numpy())


# -- thermosyphon demo ------------------------------------------------------------------

def _thermosyphon_loop(u, sigma, r, beta, tau):
    # The equations in mnemode/systems/thermosyphon.py's docstring, written out:
    #   X' = σ(Y − X), Y' = rX − XZ − Y + P, Z' = XY − Z + Q,
    #   P' = (Y/(1+β) − P)/τ, Q' = (Z/(1+β) − Q)/τ.
    X, Y, Z, P, Q = u
    return np.array([sigma * (Y - X), r * X - X * Z - Y + P, X * Y - Z + Q,
                     (Y / (1 + beta) - P) / tau, (Z / (1 + beta) - Q) / tau])


def test_thermosyphon_truth_matches_docstring_equations():
    params = dict(prandtl=5.0, rayleigh=40.0, conductance_ratio=0.5, wall_response_time=0.3)
    u = _rng_states((4, 5), seed=6, scale=10.0)
    got = HeatStoringWallLoopField(**params)(0.0, torch.tensor(u)).numpy()
    want = np.stack([_thermosyphon_loop(row, 5.0, 40.0, 0.5, 0.3) for row in u])
    np.testing.assert_allclose(got, want, rtol=1e-13, atol=1e-12)
    # float32 gives the same field to single precision.
    got32 = HeatStoringWallLoopField(**params)(0.0, torch.tensor(u, dtype=torch.float32)).numpy()
    np.testing.assert_allclose(got32, want, rtol=1e-5, atol=1e-3)
    with pytest.raises(ValueError):
        HeatStoringWallLoopField(wall_response_time=0.0)


def test_thermosyphon_nominal_is_truth_with_cold_wall():
    system = thermosyphon()
    x = _rng_states((7, 3), seed=7, scale=10.0)
    z = np.concatenate([x, np.zeros((7, 2))], axis=1)  # P = Q = 0
    truth = system.truth(0.0, torch.tensor(z)).numpy()
    nominal = system.nominal(0.0, torch.tensor(x)).numpy()
    np.testing.assert_allclose(nominal, truth[:, :3], rtol=1e-14, atol=1e-12)
    assert isinstance(system.nominal, IdealWallLoopField)
    assert system.observed_index == (0, 1, 2)


def test_thermosyphon_fast_wall_tracks_fluid():
    # τ → 0 limit: P → Y/(1+β), Q → Z/(1+β). By singular-perturbation theory (Tikhonov;
    # e.g. Kevorkian & Cole, *Multiple Scale and Singular Perturbation Methods*), the slow
    # manifold is P = g·(Y − τ Ẏ) + O(τ²) with g = 1/(1+β), so at τ = 0.01 the plain limit
    # holds to a few per cent and the first-order manifold an order of magnitude better.
    tau, beta = 0.01, 1.0
    system = thermosyphon(conductance_ratio=beta, wall_response_time=tau)
    gen = torch.Generator().manual_seed(8)
    z = system.random_truth_states(8, gen)
    solver = RK4(0.005)
    z = solver.advance(system.truth, 0.0, z, 10.0)
    traj = solver.unroll(system.truth, z, 0.0, 0.01, 400)
    X, Y, Z, P, Q = traj.unbind(-1)
    g = 1.0 / (1.0 + beta)

    def rel(err, ref):
        return (err.pow(2).mean() / ref.pow(2).mean()).sqrt().item()

    zero_p, zero_q = rel(P - g * Y, g * Y), rel(Q - g * Z, g * (Z - Z.mean()))
    assert zero_p < 0.1 and zero_q < 0.1
    d = system.truth(0.0, traj)
    first_p = rel(P - g * (Y - tau * d[..., 1]), g * Y)
    first_q = rel(Q - g * (Z - tau * d[..., 2]), g * (Z - Z.mean()))
    assert first_p < 0.3 * zero_p and first_q < 0.3 * zero_q


# -- system metadata ---------------------------------------------------------------------

@pytest.mark.parametrize("make", [lorenz63, lorenz96, lorenz96_two_scale, thermosyphon])
def test_system_shapes_and_dtypes(make):
    system = make()
    gen = torch.Generator().manual_seed(0)
    for dtype in (torch.float32, torch.float64):
        z = system.random_truth_states(3, gen, dtype)
        assert z.shape == (3, system.truth_dim) and z.dtype == dtype
        dz = system.truth(0.0, z)
        assert dz.shape == z.shape and dz.dtype == dtype
        x = system.observe(z)
        assert x.shape == (3, system.dim)
        assert system.nominal(0.0, x).shape == x.shape
    assert len(system.state_units) == system.dim


def test_custom_system_needs_a_module():
    class Decay(torch.nn.Module):
        def forward(self, t, x, u=None):
            return -x

    system = custom_system(Decay(), ["a", "b"], ["m", "s"])
    assert system.dim == 2 and system.truth is None and system.nominal.dim == 2
    with pytest.raises(ConfigError) as info:
        custom_system(lambda t, x: -x, ["a"])
    assert "Fix:" in str(info.value)
