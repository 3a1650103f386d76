"""A polynomial of low total degree as a memoryless closure ``m(x[, u])``, fitted by ridge regression.

On the closure's normalised inputs ``x̃ ∈ R^D``::

    φ(x̃) = [ x̃^α for every exponent α with 1 ≤ |α| ≤ degree,  1 ]      (graded, lexicographic)
    ỹ    = φ(x̃)ᵀ A                                                      A ∈ R^{p × dim}

``p = C(D + degree, degree)`` monomials, the constant last; ``A`` solves

    min_A ‖Φ A − Ỹ‖² + ridge · N · ‖A_{1:p−1}‖²        (the constant is not penalised)

in closed form (:func:`mnemode.linalg.ridge_solve`); ``ridge`` is per training pair.

Evaluation, for all ``N`` states at once (every site and batch member of a ring), with
no Python loop over states and no per-element gather (which a compiled step turns into
slow scalar code): with ``w = [x̃, 1]`` (``W = D + 1`` entries) the coefficients are
placed in a dense tensor ``C[f_1, …, f_degree]`` (one entry per monomial, its factors in
order, the rest zero) and

    ỹ = Σ_{f_1} w_{f_1} ( Σ_{f_2} w_{f_2} ( … Σ_{f_degree} w_{f_degree} C[f_1, …, f_degree] ) )

is contracted one factor at a time — Horner's rule in several variables: one matrix
product, then ``degree − 1`` products and sums over ever smaller tensors, laid out one
row per input ``(W, N)`` so every sum adds whole contiguous rows. Where ``C`` would be
large (``W^degree · dim > MAX_NESTED``) the ``p`` monomials are formed instead (a
selection of whole rows and a product) and multiplied by ``A``.

Meant for a smooth missing term of few inputs — a site's own and neighbouring
variables inside :class:`~mnemode.closures.RingLocalClosure`, where a cubic in the
site's own slow variable is the classic deterministic parametrisation of the fast
scale of two-scale Lorenz-96 (Wilks 2005). Being a handful of numbers it is cheap to
evaluate, which is what a corrected simulator that must beat the truth's cost needs.

Config (Hydra)::

    closure:
      _target_: mnemode.closures.PolynomialClosure
      degree: 3
      ridge: 1.0e-8

References: D. S. Wilks, "Effects of stochastic parametrizations in the Lorenz '96
system", Q. J. R. Meteorol. Soc. 131 (2005) 389–407; A. E. Hoerl & R. W. Kennard,
Technometrics 12 (1970) 55–67 (ridge).
"""

from __future__ import annotations

import itertools
import math
import time

import torch
import torch.nn.functional as F
from torch import nn

from ..errors import ConfigError, FitDiverged
from ..linalg import ridge_solve
from .base import Closure, RegressionFittable, Scaling

__all__ = ["PolynomialClosure", "monomial_exponents"]

#: more monomials than this is no longer a "small" polynomial (and the normal equations grow as p²)
MAX_FEATURES = 5000
#: largest dense coefficient tensor ((in_dim + 1)^degree · dim entries) evaluated by nested contraction
MAX_NESTED = 4096


def monomial_exponents(n_inputs: int, degree: int) -> list[tuple[int, ...]]:
    """Monomials of total degree 1..``degree`` in ``n_inputs`` variables, graded then lexicographic.

    Each is the sorted tuple of the input indices it multiplies (``(0, 0, 2)`` is
    ``x₀² x₂``); the constant (the empty tuple) is not listed — the closure appends it last.
    """
    return [e for k in range(1, int(degree) + 1)
            for e in itertools.combinations_with_replacement(range(int(n_inputs)), k)]


def _flat(contract, in_dim: int, dim: int):
    """``x (..., in_dim) ↦ (..., dim)`` from a contraction over rows ``(N, in_dim) ↦ (N, dim)``."""
    def correction(x: torch.Tensor) -> torch.Tensor:
        return contract(x.reshape(-1, in_dim)).reshape(*x.shape[:-1], dim)
    return correction


class PolynomialClosure(Closure, RegressionFittable):
    """Memoryless closure: a polynomial of total degree ≤ ``degree`` in the normalised inputs.

    Args:
        dim: number of output components.
        degree: the largest total degree (≥ 1).
        ridge: ridge penalty per training pair (≥ 0) on every coefficient but the constant.
        forcing_dim: forcing inputs seen beside ``x``.
        n_inputs: number of inputs when not ``dim + forcing_dim`` (a neighbourhood inside a ring closure).

    Raises:
        ConfigError: a degree below 1, a negative penalty, or more than ``MAX_FEATURES`` monomials.
    """

    def __init__(self, dim: int, degree: int = 3, ridge: float = 1e-8, forcing_dim: int = 0,
                 n_inputs: int | None = None, dtype=None):
        super().__init__(dim, forcing_dim, n_inputs, dtype)
        if int(degree) < 1:
            raise ConfigError("closure.degree", f"is {degree}; expected an integer ≥ 1", "e.g. degree: 3.")
        if not float(ridge) >= 0:
            raise ConfigError("closure.ridge", f"is {ridge}; expected a penalty ≥ 0", "e.g. ridge: 1.0e-8.")
        self.degree, self.ridge = int(degree), float(ridge)
        n_features = math.comb(self.in_dim + self.degree, self.degree)
        if n_features > MAX_FEATURES:
            raise ConfigError("closure.degree", f"is {degree} on {self.in_dim} inputs: {n_features} monomials, "
                              f"more than {MAX_FEATURES}", "lower the degree or give the closure fewer inputs.")
        self.n_features = n_features
        # factors of each monomial as indices into [x̃, 1]: padded with the index of the 1 up to `degree`
        one = self.in_dim
        rows = [list(e) + [one] * (self.degree - len(e)) for e in monomial_exponents(self.in_dim, self.degree)]
        rows.append([one] * self.degree)
        factors = torch.tensor(rows, dtype=torch.long)
        self.register_buffer("factors", factors, persistent=False)
        # where each coefficient sits in the dense tensor C[f_1, …, f_degree] over [x̃, 1]^degree (row-major)
        width = self.in_dim + 1
        place = torch.zeros(len(rows), dtype=torch.long)
        for f in range(self.degree):
            place = place * width + factors[:, f]
        self.register_buffer("dense_index", place, persistent=False)
        #: evaluate by nested contraction of C (small C), else by forming the monomials
        self.nested = width ** self.degree * self.dim <= MAX_NESTED
        self.scaling = Scaling(self.in_dim, self.dim, self.dtype)
        self.readout = nn.Parameter(torch.zeros(self.n_features, self.dim, dtype=self.dtype))

    def _monomial_rows(self, z: torch.Tensor) -> torch.Tensor:
        """``(N, in_dim)`` normalised inputs → monomials ``(n_features, N)``, one row per monomial."""
        rows = F.pad(z.T, (0, 0, 0, 1), value=1.0)                           # (in_dim + 1, N), last row 1
        picked = rows.index_select(0, self.factors.reshape(-1))               # whole rows: contiguous copies
        return picked.view(self.n_features, self.degree, z.shape[0]).prod(1)

    def features(self, z: torch.Tensor) -> torch.Tensor:
        """Monomials ``φ(z)`` of *normalised* inputs ``(..., in_dim)`` → ``(..., n_features)``, constant last."""
        return self._monomial_rows(z.reshape(-1, self.in_dim)).T.reshape(*z.shape[:-1], self.n_features)

    def correction(self, x: torch.Tensor, r: torch.Tensor | None = None,
                   u: torch.Tensor | None = None) -> torch.Tensor:
        """``m(x[, u]) = out_offset + out_scale · φ(x̃)ᵀ A``, ``(..., dim)``."""
        z = self.scaling.inputs(self._join(x, u))
        flat = z.reshape(-1, self.in_dim)
        coef = self.readout.to(z.dtype)
        if self.nested:
            y = self._nested(flat, coef)
        else:
            y = self._monomial_rows(flat).T @ coef                               # (N, dim)
        return self.scaling.outputs(y.reshape(*z.shape[:-1], self.dim))

    def prepared_correction(self):
        """The correction with its coefficient tensor built once and the output scaling folded in, or ``None``.

        For the nested evaluation (small coefficient tensors) without forcing inputs;
        equal to :meth:`correction` to rounding, built from the coefficients
        (differentiable), valid until they change.
        """
        if not self.nested or self.forcing_dim or self.in_dim != self.dim:
            return None
        sc = self.scaling
        if not sc.applied:
            return _flat(self.folded_nested(None, None), self.in_dim, self.dim)
        contract = self.folded_nested(sc.out_scale, sc.out_offset)
        mean, std = sc.in_mean, sc.in_std
        return _flat(lambda z: contract((z - mean) / std), self.in_dim, self.dim)

    def folded_nested(self, out_scale: torch.Tensor | None, out_offset: torch.Tensor | None):
        """``z (N, in_dim) ↦ out_offset + out_scale · y (N, dim)`` by the nested contraction, coefficients prepared once.

        The output scaling is folded into the coefficient tensor (``out_offset`` into the
        constant monomial's coefficient, the last of the dense tensor); ``None`` leaves
        the output unscaled. Used by :meth:`prepared_correction` and by a ring closure
        that shares this polynomial along its sites.
        """
        width, degree = self.in_dim + 1, self.degree
        coef = self.readout
        dense = coef.new_zeros((width ** degree, self.dim)).index_copy(0, self.dense_index, coef)
        if out_scale is not None:
            dense = dense * out_scale
        if out_offset is not None:
            dense = torch.cat((dense[:-1], dense[-1:] + out_offset))  # the constant monomial sits last
        first = dense.view(width, -1).T.contiguous()                             # (width^(d−1)·dim, width)

        def contract(z: torch.Tensor) -> torch.Tensor:
            n = z.shape[0]
            w = torch.cat((z.T, z.new_ones((1, n))), dim=0)                       # (width, N)
            acc = first @ w
            for _ in range(degree - 1):
                acc = (w.unsqueeze(1) * acc.view(width, -1, n)).sum(0)
            return acc.T

        return contract

    def _nested(self, z: torch.Tensor, coef: torch.Tensor) -> torch.Tensor:
        """``Σ_f C[f_1..f_d] Π_j w_{f_j}`` with ``w = [z, 1]``, one factor at a time (Horner's rule in several
        variables): a matrix product, then ``degree − 1`` products and sums over ever smaller tensors. Laid
        out one row per input, ``(width, N)``, so each sum adds whole contiguous rows."""
        width, n = self.in_dim + 1, z.shape[0]
        dense = coef.new_zeros((width ** self.degree, self.dim)).index_copy(0, self.dense_index, coef)
        w = torch.cat((z.T, z.new_ones((1, n))), dim=0)                           # (width, N)
        acc = dense.view(width, -1).T @ w                                         # (width^(d−1)·dim, N)
        for _ in range(self.degree - 1):
            acc = (w.unsqueeze(1) * acc.view(width, -1, n)).sum(0)
        return acc.T                                                              # (N, dim)

    def fit_regression(self, inputs: torch.Tensor, targets: torch.Tensor, generator: torch.Generator | None = None,
                       val_inputs: torch.Tensor | None = None, val_targets: torch.Tensor | None = None,
                       progress: bool = False, log=None) -> dict:
        """Set the coefficients from ``inputs (N, in_dim) → targets (N, dim)`` (physical units).

        Inputs and targets are normalised through ``self.scaling`` (set it first; the
        regression fitters do). Closed form, so ``generator``, the validation pairs and
        ``progress`` are not needed (the fitters score the validation pairs themselves).

        Returns:
            ``{'n_features', 'solve_seconds'}`` (plain floats).

        Raises:
            DataError: shapes that do not match ``in_dim``/``dim``.
            FitDiverged: coefficients that are not finite.
        """
        del generator, val_inputs, val_targets, progress, log
        xt, yt = self.normalised_regression_data(inputs, targets, "polynomial regression data")
        start = time.perf_counter()
        coef = ridge_solve(self.features(xt), yt, self.ridge * xt.shape[0], penalise_last=False)
        if not bool(torch.isfinite(coef).all()):
            raise FitDiverged("PolynomialClosure", "the ridge coefficients are not finite",
                              "raise ridge, lower the degree, or check the data for extreme values.")
        with torch.no_grad():
            self.readout.copy_(coef.to(self.readout.dtype))
        return {"n_features": float(self.n_features), "solve_seconds": time.perf_counter() - start}

    def extra_repr(self) -> str:
        return f"dim={self.dim}, in_dim={self.in_dim}, degree={self.degree}"
