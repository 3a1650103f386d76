"""Exact Gaussian-process regression as a memoryless closure ``m(x[, u])``.

One independent GP per output component ``d`` (its own hyper-parameters), on the
closure's normalised inputs ``x̃`` and normalised targets ``ỹ_d``::

    ỹ_d ~ GP(μ_d, k_d) + ε,     k_d(a, b) = s_d² exp(−½ Σ_i (a_i − b_i)² / ℓ_{d,i}²),
    ε ~ N(0, σ_d²)                                   (ARD squared exponential + white noise)

The constant prior mean ``μ_d`` is the mean of the training targets: with the
fitters' scaling (output offset = target mean) it is ≈ 0 in normalised units and
the offset carries the missing term's mean. With ``K_d = k_d(X, X) + σ_d² I = L_d L_dᵀ``
and ``α_d = K_d⁻¹ (ỹ_d − μ_d)``:

    predictive mean      μ_d + k_d(x̃, X) α_d
    predictive variance  s_d² − ‖L_d⁻¹ k_d(X, x̃)‖²          (latent function, noise excluded)
    log marginal lik.    −½ (ỹ_d − μ_d)ᵀ α_d − Σ_i log L_d,ii − (M/2) log 2π

Hyper-parameters ``(ℓ, s², σ²)`` maximise the log marginal likelihood (ML-II) by
L-BFGS on their logarithms with torch autograd, from the initial values and
``n_restarts`` random starts; the best optimum wins. Fitting and optimisation
run in float64, and the GP's own tensors stay float64 whatever the module's dtype
(a near-interpolating GP has large weights ``α`` whose float32 rounding would cost
percent-level errors): a float32 closure normalises its inputs in float32,
predicts in float64 and returns float32. With more training
pairs than ``max_points`` a random subset of ``max_points`` is used (subset of data).

Reference: C. E. Rasmussen & C. K. I. Williams, *Gaussian Processes for Machine
Learning*, MIT Press (2006), Algorithm 2.1 and §5.4.
"""

from __future__ import annotations

import math
import time
from typing import Sequence

import numpy as np
import torch

from ..errors import ConfigError, DataError, FitDiverged
from .base import Closure, RegressionFittable, Scaling

__all__ = ["GaussianProcessClosure"]

# Buffers whose first dimension is the number of training points (resized on load).
_SIZED_BUFFERS = ("train_x", "train_y", "alpha")
# Buffers kept in float64 whatever the module's dtype (see the module docstring).
_FLOAT64_BUFFERS = ("log_lengthscale", "log_amplitude", "log_noise", "target_mean") + _SIZED_BUFFERS


class GaussianProcessClosure(Closure, RegressionFittable):
    """Memoryless closure given by exact GP regression (ARD squared exponential + white noise).

    Args:
        dim: number of output components (one GP each).
        in_dim: number of inputs (``dim`` plus forcing inputs, or a neighbourhood
            size inside a ring closure); ``dim`` when ``None``.
        max_points: largest training set used; a random subset is drawn beyond it
            (exact GP costs O(M³) per likelihood evaluation).
        optimise: maximise the log marginal likelihood over the hyper-parameters;
            when ``False`` the initial values below are used as they are.
        n_restarts: extra random starts of the optimiser (log-uniform draws around
            the initial values); 0 starts from the initial values only.
        lengthscale_init: initial ARD length-scales in normalised input units: a
            number, ``in_dim`` numbers, or ``dim × in_dim`` numbers.
        amplitude_init: initial signal variance ``s²`` (normalised output units).
        noise_init: initial noise variance ``σ²`` (normalised output units).
        noise_floor: smallest noise variance the optimiser may reach (keeps
            ``K`` well conditioned on clean data).
        max_iter: L-BFGS iterations per start.
        seed: seeds the subset and the restarts when ``fit_regression`` gets no generator.

    Raises:
        ConfigError: non-positive sizes or variances, or a length-scale list of the wrong size.
    """

    def __init__(self, dim: int, forcing_dim: int = 0, max_points: int = 500, optimise: bool = True,
                 n_restarts: int = 1, lengthscale_init: float | Sequence = 1.0, amplitude_init: float = 1.0,
                 noise_init: float = 1e-2, noise_floor: float = 1e-6, max_iter: int = 200, seed: int = 0,
                 n_inputs: int | None = None, dtype=None):
        super().__init__(dim, forcing_dim, n_inputs, dtype)
        if int(max_points) < 2:
            raise ConfigError("closure.max_points", f"is {max_points}; a GP needs at least 2 points",
                              "use a few hundred to a few thousand.")
        for name, v in (("amplitude_init", amplitude_init), ("noise_init", noise_init),
                        ("noise_floor", noise_floor)):
            if not float(v) > 0:
                raise ConfigError(f"closure.{name}", f"is {v}; variances must be > 0", "give a positive value.")
        self.max_points, self.optimise, self.n_restarts = int(max_points), bool(optimise), int(n_restarts)
        self.amplitude_init, self.noise_init = float(amplitude_init), float(noise_init)
        self.noise_floor, self.max_iter, self.seed = float(noise_floor), int(max_iter), int(seed)
        ell = self._lengthscale_matrix(lengthscale_init)
        self.lengthscale_init = ell.tolist()
        self.scaling = Scaling(self.in_dim, self.dim, self.dtype)
        f64 = torch.float64
        self.register_buffer("log_lengthscale", torch.log(torch.as_tensor(ell, dtype=f64)))
        self.register_buffer("log_amplitude", torch.full((self.dim,), math.log(self.amplitude_init), dtype=f64))
        self.register_buffer("log_noise", torch.full((self.dim,), math.log(max(self.noise_init, self.noise_floor)),
                                                     dtype=f64))
        self.register_buffer("target_mean", torch.zeros(self.dim, dtype=f64))
        self.register_buffer("train_x", torch.zeros(0, self.in_dim, dtype=f64))
        self.register_buffer("train_y", torch.zeros(0, self.dim, dtype=f64))
        self.register_buffer("alpha", torch.zeros(0, self.dim, dtype=f64))

    def _lengthscale_matrix(self, value) -> np.ndarray:
        arr = np.asarray(value, dtype=np.float64)
        if arr.ndim == 0:
            arr = np.full((self.dim, self.in_dim), float(arr))
        elif arr.shape == (self.in_dim,):
            arr = np.tile(arr, (self.dim, 1))
        elif arr.shape != (self.dim, self.in_dim):
            raise ConfigError("closure.lengthscale_init", f"has shape {arr.shape}; expected a number, "
                              f"({self.in_dim},) or ({self.dim}, {self.in_dim})", "give one value per input.")
        if not np.all(arr > 0):
            raise ConfigError("closure.lengthscale_init", "has non-positive entries", "give positive length-scales.")
        return arr

    # -- dtype and state dict ---------------------------------------------------
    def _apply(self, fn, recurse=True):
        # .float()/.to(dtype) move the GP's tensors to the new device but keep them float64.
        saved = {name: self._buffers[name] for name in _FLOAT64_BUFFERS}
        super()._apply(fn, recurse)
        for name, old in saved.items():
            self._buffers[name] = old.to(device=self._buffers[name].device, dtype=torch.float64)
        return self

    def _load_from_state_dict(self, state_dict, prefix, local_metadata, strict, missing_keys,
                              unexpected_keys, error_msgs):
        # The training set's size is learned: take the incoming size so a closure
        # rebuilt from its constructor arguments accepts a fitted state dict.
        for name in _SIZED_BUFFERS:
            key = prefix + name
            if key in state_dict:
                incoming = state_dict[key]
                own = getattr(self, name)
                if incoming.ndim == 2 and incoming.shape[1] == own.shape[1] and incoming.shape != own.shape:
                    self._buffers[name] = torch.zeros(incoming.shape, dtype=own.dtype, device=own.device)
        super()._load_from_state_dict(state_dict, prefix, local_metadata, strict, missing_keys,
                                      unexpected_keys, error_msgs)

    # -- kernel algebra (works in the dtype of the given tensors) ------------
    @staticmethod
    def _kernel(a: torch.Tensor, b: torch.Tensor, log_ell: torch.Tensor, log_amp: torch.Tensor) -> torch.Tensor:
        """``k_d(a, b)`` for every output ``d``: ``a (..., D)``, ``b (M, D)`` → ``(..., dim, M)``."""
        ell = torch.exp(log_ell)                                   # (dim, D)
        sa = a.unsqueeze(-2) / ell                                 # (..., dim, D)
        sb = b.unsqueeze(0) / ell.unsqueeze(1)                     # (dim, M, D)
        sq = ((sa * sa).sum(-1).unsqueeze(-1) + (sb * sb).sum(-1)
              - 2.0 * torch.einsum("...dk,dmk->...dm", sa, sb))
        return torch.exp(log_amp).unsqueeze(-1) * torch.exp(-0.5 * sq.clamp_min(0.0))

    def _gram(self, x: torch.Tensor, log_ell, log_amp, log_noise) -> torch.Tensor:
        """``K_d = k_d(X, X) + σ_d² I`` for every output, ``(dim, M, M)``."""
        ell = torch.exp(log_ell)
        s = x.unsqueeze(0) / ell.unsqueeze(1)                       # (dim, M, D)
        sq = (s.unsqueeze(2) - s.unsqueeze(1)).pow(2).sum(-1)       # exact differences on the diagonal
        k = torch.exp(log_amp)[:, None, None] * torch.exp(-0.5 * sq)
        eye = torch.eye(x.shape[0], dtype=x.dtype, device=x.device)
        return k + torch.exp(log_noise)[:, None, None] * eye

    def _lml_terms(self, x, y, log_ell, log_amp, log_noise):
        """Per-output log marginal likelihood ``(dim,)``, the Cholesky factors and ``α``."""
        gram = self._gram(x, log_ell, log_amp, log_noise)
        chol, info = torch.linalg.cholesky_ex(gram)
        if bool((info > 0).any()):
            return None, None, None
        yt = y.T.unsqueeze(-1)                                        # (dim, M, 1)
        alpha = torch.cholesky_solve(yt, chol)
        m = x.shape[0]
        lml = (-0.5 * (yt * alpha).sum((-1, -2))
               - torch.log(torch.diagonal(chol, dim1=-2, dim2=-1)).sum(-1)
               - 0.5 * m * math.log(2 * math.pi))
        return lml, chol, alpha.squeeze(-1).T

    # -- fitting --------------------------------------------------------------
    def fit_regression(self, inputs: torch.Tensor, targets: torch.Tensor, generator: torch.Generator | None = None,
                       val_inputs: torch.Tensor | None = None, val_targets: torch.Tensor | None = None,
                       progress: bool = False, log=None) -> dict:
        """Fit the GP to ``inputs (N, in_dim) → targets (N, dim)`` (physical units).

        Inputs and targets are normalised through ``self.scaling`` (set it first; the
        regression fitters do). Validation data are not used by the GP (ML-II needs
        none); they are accepted for a common interface.

        Returns:
            ``{'log_marginal_likelihood', 'n_points', 'optimiser_seconds'}`` (plain floats).

        Raises:
            DataError: shapes that do not match ``in_dim``/``dim``, or fewer than 2 pairs.
            FitDiverged: the kernel matrix could not be factorised at any start.
        """
        del val_inputs, val_targets, progress
        x, y = self._check_data(inputs, targets)
        gen = generator if generator is not None else torch.Generator().manual_seed(self.seed)
        if x.shape[0] > self.max_points:
            keep = torch.randperm(x.shape[0], generator=gen)[: self.max_points]
            x, y = x[keep], y[keep]
        with torch.no_grad():
            xt = (x - self.scaling.in_mean.double()) / self.scaling.in_std.double()
            yt = (y - self.scaling.out_offset.double()) / self.scaling.out_scale.double()
        mean = yt.mean(0)
        yc = yt - mean
        start = time.perf_counter()
        log_ell = torch.log(torch.as_tensor(self.lengthscale_init, dtype=torch.float64))
        log_amp = torch.full((self.dim,), math.log(self.amplitude_init), dtype=torch.float64)
        log_noise = torch.full((self.dim,), math.log(max(self.noise_init, self.noise_floor)), dtype=torch.float64)
        if self.optimise:
            log_ell, log_amp, log_noise = self._optimise(xt, yc, log_ell, log_amp, log_noise, gen, log)
        with torch.no_grad():
            lml, _, alpha = self._lml_terms(xt, yc, log_ell, log_amp, log_noise)
        if lml is None or not bool(torch.isfinite(lml).all()):
            raise FitDiverged("GaussianProcessClosure", "the kernel matrix is not positive definite at the "
                              "fitted hyper-parameters", "raise noise_floor or reduce max_points.")
        self._store(xt, yc, mean, alpha, log_ell, log_amp, log_noise)
        return {"log_marginal_likelihood": float(lml.sum()), "n_points": float(xt.shape[0]),
                "optimiser_seconds": time.perf_counter() - start}

    def _check_data(self, inputs, targets):
        x = torch.as_tensor(inputs).to(torch.float64)
        y = torch.as_tensor(targets).to(torch.float64)
        if x.ndim != 2 or x.shape[1] != self.in_dim or y.ndim != 2 or y.shape[1] != self.dim \
                or x.shape[0] != y.shape[0]:
            raise DataError("GP regression data", f"inputs {tuple(x.shape)} and targets {tuple(y.shape)}; expected "
                            f"(N, {self.in_dim}) and (N, {self.dim})", "check the closure's dim and in_dim.")
        if x.shape[0] < 2:
            raise DataError("GP regression data", f"holds {x.shape[0]} pair(s)", "provide at least 2 pairs.")
        if not (torch.isfinite(x).all() and torch.isfinite(y).all()):
            raise DataError("GP regression data", "contains non-finite values", "clean the trajectories first.")
        return x, y

    def _optimise(self, x, y, log_ell0, log_amp0, log_noise0, gen, log):
        floor = self.noise_floor

        def to_free(log_noise):  # noise = floor + exp(θ): the optimiser cannot go below the floor
            excess = torch.clamp(torch.exp(log_noise) - floor, min=floor * 1e-3)
            return torch.log(excess)

        starts = [(log_ell0, log_amp0, to_free(log_noise0))]
        for _ in range(self.n_restarts):
            u = torch.rand((3,) + tuple(log_ell0.shape), generator=gen, dtype=torch.float64)
            ell = log_ell0 + math.log(10.0) * (2 * u[0] - 1)                 # ℓ within ×/÷ 10
            amp = log_amp0 + math.log(10.0) * (2 * u[1, :, 0] - 1)           # s² within ×/÷ 10
            noise = math.log(1e-4) + math.log(1e3) * u[2, :, 0]               # σ² in [1e-4, 1e-1]
            starts.append((ell, amp, noise))
        best, best_val = None, math.inf
        m = x.shape[0]
        for i, (e0, a0, n0) in enumerate(starts):
            params = [p.clone().requires_grad_(True) for p in (e0, a0, n0)]
            opt = torch.optim.LBFGS(params, lr=1.0, max_iter=self.max_iter, tolerance_grad=1e-9,
                                    tolerance_change=1e-12, history_size=20, line_search_fn="strong_wolfe")

            def objective():
                opt.zero_grad()
                ln = torch.log(floor + torch.exp(params[2]))
                lml, _, _ = self._lml_terms(x, y, params[0], params[1], ln)
                if lml is None:  # not positive definite: a large value steers the line search back
                    loss = (params[0].sum() + params[1].sum() + params[2].sum()) * 0 + 1e10
                else:
                    loss = -lml.sum() / m
                loss.backward()
                return loss

            try:
                opt.step(objective)
            except RuntimeError:  # pragma: no cover - factorisation failure inside the line search
                continue
            with torch.no_grad():
                ln = torch.log(floor + torch.exp(params[2]))
                lml, _, _ = self._lml_terms(x, y, params[0], params[1], ln)
            if lml is None or not bool(torch.isfinite(lml).all()):
                continue
            value = float(-lml.sum())
            if log is not None:
                log("gp/log_marginal_likelihood", -value, i)
            if value < best_val:
                best_val, best = value, (params[0].detach(), params[1].detach(), ln.detach())
        if best is None:
            raise FitDiverged("GaussianProcessClosure", "the hyper-parameter optimisation failed at every start",
                              "raise noise_floor, rescale the data, or set optimise: false with sensible values.")
        return best

    def _store(self, x, y, mean, alpha, log_ell, log_amp, log_noise):
        device = self.target_mean.device
        with torch.no_grad():
            for name, value in (("train_x", x), ("train_y", y), ("alpha", alpha)):
                self._buffers[name] = value.to(dtype=torch.float64, device=device).contiguous()
            self.target_mean.copy_(mean)
            self.log_lengthscale.copy_(log_ell)
            self.log_amplitude.copy_(log_amp)
            self.log_noise.copy_(log_noise)

    # -- evaluation -------------------------------------------------------------
    def correction(self, x: torch.Tensor, r: torch.Tensor | None = None,
                   u: torch.Tensor | None = None) -> torch.Tensor:
        """Predictive mean ``m(x[, u])``, ``(..., dim)`` in physical units (the input's dtype)."""
        return self.scaling.outputs(self._normalised_mean(self._normalised_inputs(x, u)).to(x.dtype))

    def _normalised_inputs(self, x, u):
        return self.scaling.inputs(self._join(x, u)).to(torch.float64)

    def _normalised_mean(self, z: torch.Tensor) -> torch.Tensor:
        k = self._kernel(z, self.train_x, self.log_lengthscale, self.log_amplitude)   # (..., dim, M)
        return self.target_mean + torch.einsum("...dm,md->...d", k, self.alpha)

    def predict(self, x: torch.Tensor, u: torch.Tensor | None = None, return_var: bool = True):
        """Predictive mean and, if asked, the latent function's variance (physical units).

        Args:
            x: states ``(..., dim)``.
            u: forcing inputs ``(..., in_dim − dim)`` or ``None``.
            return_var: also return the variance.

        Returns:
            ``mean`` or ``(mean, var)``, both ``(..., dim)``. The variance excludes the
            white-noise term (it is the uncertainty of ``m``, not of a noisy target).
        """
        mean = self.correction(x, u=u)
        if not return_var:
            return mean
        z = self._normalised_inputs(x, u)
        batch = z.shape[:-1]
        zf = z.reshape(-1, self.in_dim)
        amp = torch.exp(self.log_amplitude)
        if self.train_x.shape[0] == 0:
            var = amp.expand(zf.shape[0], self.dim)
        else:
            gram = self._gram(self.train_x, self.log_lengthscale, self.log_amplitude, self.log_noise)
            chol = torch.linalg.cholesky(gram)                                         # (dim, M, M)
            k = self._kernel(zf, self.train_x, self.log_lengthscale, self.log_amplitude)  # (B, dim, M)
            v = torch.linalg.solve_triangular(chol, k.permute(1, 2, 0), upper=False)   # (dim, M, B)
            var = (amp.unsqueeze(-1) - v.pow(2).sum(-2)).clamp_min(0.0).T               # (B, dim)
        var = var.reshape(*batch, self.dim).to(x.dtype) * self.scaling.out_scale ** 2
        return mean, var

    def log_marginal_likelihood(self, per_output: bool = False):
        """Log marginal likelihood of the stored (normalised) training targets at the stored hyper-parameters.

        Returns:
            a float (sum over outputs), or a ``(dim,)`` float64 tensor with ``per_output=True``.

        Raises:
            ConfigError: the closure has not been fitted.
        """
        if self.train_x.shape[0] == 0:
            raise ConfigError("GaussianProcessClosure", "has no training data yet",
                              "fit it (fit_regression or a regression fitter) first.")
        with torch.no_grad():
            lml, _, _ = self._lml_terms(self.train_x, self.train_y, self.log_lengthscale,
                                        self.log_amplitude, self.log_noise)
        if lml is None:
            raise FitDiverged("GaussianProcessClosure", "the stored kernel matrix is not positive definite",
                              "raise noise_floor and refit.")
        return lml if per_output else float(lml.sum())

    def hyperparameters(self) -> dict:
        """Effective hyper-parameters in normalised units (float64).

        Returns:
            ``{'lengthscale': (dim, in_dim), 'amplitude': (dim,), 'noise': (dim,)}``
            (``s²`` and ``σ²`` are variances).
        """
        return {"lengthscale": torch.exp(self.log_lengthscale),
                "amplitude": torch.exp(self.log_amplitude),
                "noise": torch.exp(self.log_noise)}

    def extra_repr(self) -> str:
        return (f"dim={self.dim}, in_dim={self.in_dim}, max_points={self.max_points}, "
                f"n_points={self.train_x.shape[0]}")
