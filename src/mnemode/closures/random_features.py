"""Random Fourier features with a ridge readout as a memoryless closure ``m(x[, u])``.

On the closure's normalised inputs ``x̃ ∈ R^D``::

    φ(x̃) = [ sqrt(2/p) · cos(W x̃ / ℓ + b),  1 ]          W_ij ~ N(0, 1),  b_i ~ U(0, 2π)
    ỹ    = φ(x̃)ᵀ A                                          A ∈ R^{(p+1) × dim}

so that ``φ(a)ᵀφ(b)`` approximates the squared-exponential kernel
``exp(−‖a − b‖² / (2ℓ²))`` (Rahimi & Recht 2007) plus a constant. ``W`` and ``b`` are
drawn from ``seed`` (a fixed function of the hyper-parameters, so a closure rebuilt
from its config has the same features); the readout ``A`` solves the ridge problem

    min_A ‖Φ A − Ỹ‖² + ridge · N · ‖A_{1:p}‖²          (the bias row is not penalised)

in closed form by :func:`mnemode.linalg.ridge_solve`. The penalty grows with
the number of pairs ``N`` so that ``ridge`` means the same for any data size.
``lengthscale`` and ``ridge`` may each be a list: the pair with the smallest
validation error is chosen (on the given validation pairs, or on a random
``val_fraction`` of the training pairs held out for the choice), then the readout
is refitted on all training pairs.

Reference: A. Rahimi & B. Recht, "Random features for large-scale kernel machines",
NIPS 20 (2007).
"""

from __future__ import annotations

import math
import time
from typing import Sequence

import torch
from torch import nn

from ..errors import ConfigError, FitDiverged
from ..linalg import ridge_solve
from .base import Closure, RegressionFittable, Scaling

__all__ = ["RandomFeatureClosure"]


def _as_grid(name: str, value) -> list[float]:
    values = [float(v) for v in value] if isinstance(value, (Sequence, torch.Tensor)) and not isinstance(value, str) \
        else [float(value)]
    if not values:
        raise ConfigError(f"closure.{name}", "is an empty list", "give a number or a non-empty list.")
    return values


class RandomFeatureClosure(Closure, RegressionFittable):
    """Memoryless closure: random Fourier features of the normalised inputs, ridge readout.

    Args:
        dim: number of output components.
        in_dim: number of inputs (``dim`` plus forcing inputs, or a neighbourhood
            size inside a ring closure); ``dim`` when ``None``.
        n_features: number ``p`` of random features.
        lengthscale: kernel length-scale ℓ in normalised input units, or a list to choose from.
        ridge: ridge penalty per training pair, or a list to choose from.
        seed: draws ``W`` and ``b`` (and the held-out pairs for a choice).
        val_fraction: share of training pairs held out to choose among lists when no
            validation pairs are given.

    Raises:
        ConfigError: non-positive sizes, length-scales or negative penalties.
    """

    def __init__(self, dim: int, forcing_dim: int = 0, n_features: int = 300,
                 lengthscale: float | Sequence[float] = 2.0, ridge: float | Sequence[float] = 1e-8,
                 seed: int = 0, val_fraction: float = 0.2, n_inputs: int | None = None, dtype=None):
        super().__init__(dim, forcing_dim, n_inputs, dtype)
        if int(n_features) < 1:
            raise ConfigError("closure.n_features", f"is {n_features}; expected ≥ 1", "set a positive size.")
        self.n_features, self.seed = int(n_features), int(seed)
        self.lengthscale_grid = _as_grid("lengthscale", lengthscale)
        self.ridge_grid = _as_grid("ridge", ridge)
        if min(self.lengthscale_grid) <= 0:
            raise ConfigError("closure.lengthscale", f"is {lengthscale}; length-scales must be > 0",
                              "give positive values (≈ 1–5 on normalised inputs).")
        if min(self.ridge_grid) < 0:
            raise ConfigError("closure.ridge", f"is {ridge}; penalties must be ≥ 0", "give values ≥ 0.")
        if not 0 < float(val_fraction) < 1:
            raise ConfigError("closure.val_fraction", f"is {val_fraction}; expected a value in (0, 1)",
                              "e.g. 0.2.")
        self.val_fraction = float(val_fraction)
        self.scaling = Scaling(self.in_dim, self.dim, self.dtype)
        gen = torch.Generator().manual_seed(self.seed)
        self.register_buffer("weights", torch.randn(self.n_features, self.in_dim, generator=gen,
                                                    dtype=torch.float64).float())
        self.register_buffer("phases", (2 * math.pi * torch.rand(self.n_features, generator=gen,
                                                                 dtype=torch.float64)).float())
        self.register_buffer("lengthscale", torch.tensor(self.lengthscale_grid[0], dtype=self.dtype))
        self.readout = nn.Parameter(torch.zeros(self.n_features + 1, self.dim, dtype=self.dtype))

    def features(self, z: torch.Tensor, lengthscale: float | torch.Tensor | None = None) -> torch.Tensor:
        """Features ``φ(z̃)`` of *normalised* inputs ``(..., in_dim)`` → ``(..., n_features + 1)``."""
        ell = self.lengthscale if lengthscale is None else lengthscale
        w = self.weights.to(z.dtype)
        proj = z @ w.T / torch.as_tensor(ell, dtype=z.dtype) + self.phases.to(z.dtype)
        phi = math.sqrt(2.0 / self.n_features) * torch.cos(proj)
        return torch.cat((phi, torch.ones_like(phi[..., :1])), dim=-1)

    def correction(self, x: torch.Tensor, r: torch.Tensor | None = None,
                   u: torch.Tensor | None = None) -> torch.Tensor:
        """``m(x[, u]) = out_offset + out_scale · φ(x̃)ᵀ A``, ``(..., dim)``."""
        phi = self.features(self.scaling.inputs(self._join(x, u)))
        return self.scaling.outputs(phi @ self.readout.to(phi.dtype))

    def prepared_correction(self):
        """``m(x)`` with the scalings, length-scale and feature weight folded into two matrices, or ``None``.

        ``m = cos(x W₁ + b₁) W₂ + b₂`` evaluates the same correction as
        :meth:`correction` (to rounding) in three tensor operations; built from the
        readout (differentiable), valid until it changes. Closures that see
        forcing inputs return ``None`` (the plain correction is used).
        """
        if self.forcing_dim or self.in_dim != self.dim:
            return None
        sc, A = self.scaling, self.readout
        dtype = A.dtype
        W = self.weights.to(dtype) / torch.as_tensor(self.lengthscale, dtype=dtype)
        bias = self.phases.to(dtype)
        if sc.applied:
            W = W / sc.in_std
            bias = bias - W @ sc.in_mean
            o_scale, o_off = sc.out_scale, sc.out_offset
        else:
            o_scale, o_off = torch.ones_like(sc.out_scale), torch.zeros_like(sc.out_offset)
        W1, W2 = W.T.contiguous(), math.sqrt(2.0 / self.n_features) * A[:-1] * o_scale
        b2 = o_off + o_scale * A[-1]

        def correction(x):
            if x.dim() == 2:
                return torch.addmm(b2, torch.cos(torch.addmm(bias, x, W1)), W2)
            return torch.cos(x @ W1 + bias) @ W2 + b2

        return correction

    def _solve(self, xt, yt, ell, ridge):
        phi = self.features(xt, ell)
        return ridge_solve(phi, yt, ridge * xt.shape[0], penalise_last=False)

    def fit_regression(self, inputs: torch.Tensor, targets: torch.Tensor, generator: torch.Generator | None = None,
                       val_inputs: torch.Tensor | None = None, val_targets: torch.Tensor | None = None,
                       progress: bool = False, log=None) -> dict:
        """Fit the readout to ``inputs (N, in_dim) → targets (N, dim)`` (physical units).

        Inputs and targets are normalised through ``self.scaling`` (set it first; the
        regression fitters do). With lists of length-scales or penalties, the best
        pair on validation data is kept (see the module docstring).

        Returns:
            ``{'lengthscale', 'ridge', 'selection_error'}`` (plain floats;
            ``selection_error`` is the relative RMS validation error of the chosen
            pair, NaN when nothing was chosen).

        Raises:
            DataError: shapes that do not match ``in_dim``/``dim``.
            FitDiverged: the readout is not finite.
        """
        del progress
        xt, yt = self.normalised_regression_data(inputs, targets, "random-feature regression data")
        grid = [(ell, lam) for ell in self.lengthscale_grid for lam in self.ridge_grid]
        chosen, sel_err = grid[0], math.nan
        if len(grid) > 1:
            if val_inputs is not None and val_targets is not None:
                fit_x, fit_y = xt, yt
                vx, vy = self.normalised_regression_data(val_inputs, val_targets, "random-feature validation data")
            else:
                gen = generator if generator is not None else torch.Generator().manual_seed(self.seed)
                perm = torch.randperm(xt.shape[0], generator=gen)
                n_val = max(1, int(round(self.val_fraction * xt.shape[0])))
                vx, vy = xt[perm[:n_val]], yt[perm[:n_val]]
                fit_x, fit_y = xt[perm[n_val:]], yt[perm[n_val:]]
            scale = torch.sqrt(((vy - vy.mean(0)) ** 2).sum()).clamp_min(1e-300)
            best = math.inf
            for i, (ell, lam) in enumerate(grid):
                a = self._solve(fit_x, fit_y, ell, lam)
                err = float(torch.sqrt(((self.features(vx, ell) @ a - vy) ** 2).sum()) / scale)
                if log is not None:
                    log("random_features/selection_error", err, i)
                if err < best:
                    best, chosen = err, (ell, lam)
            sel_err = best
        start = time.perf_counter()
        readout = self._solve(xt, yt, *chosen)
        if not bool(torch.isfinite(readout).all()):
            raise FitDiverged("RandomFeatureClosure", "the ridge readout is not finite",
                              "raise ridge or check the data for extreme values.")
        with torch.no_grad():
            self.readout.copy_(readout.to(self.readout.dtype))
            self.lengthscale.fill_(chosen[0])
        return {"lengthscale": float(chosen[0]), "ridge": float(chosen[1]), "selection_error": float(sel_err),
                "solve_seconds": time.perf_counter() - start}

    def extra_repr(self) -> str:
        return f"dim={self.dim}, in_dim={self.in_dim}, n_features={self.n_features}"
