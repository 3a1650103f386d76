"""Reservoir closure: a fixed hidden field driven by the observations, a ridge-fitted readout.

The hidden field has no trained weights (they are buffers); only the readout is
learned, in closed form, by :class:`mnemode.fitting.ReadoutRidgeFit` (seconds, no
backpropagation). Two kinds:

* ``'filter_bank'`` — a bank of leaky integrators, one per input and time
  constant ``τ_k`` (log-spaced over ``time_constants``)::

      dr_{k,j}/dt = (x̃_j − r_{k,j}) / τ_k

  Each state is an exponentially weighted average of one input's past over the
  last ~τ_k: a fixed, interpretable memory basis.
* ``'random'`` — a continuous-time echo-state network::

      dr/dt = (−r + tanh(W r + U x̃ + b)) / τ

  ``W`` random Gaussian rescaled to the given spectral radius, ``U`` random
  Gaussian times ``input_scale``, ``b`` Gaussian times ``bias_scale``, ``τ_i``
  log-spaced over ``time_constants``.

:class:`ReservoirFlowClosure` (with ``interval``, the observation interval Δt) is the
*discrete* variant, for the flow-map form ``x_{n+1} = Ψ0(x_n) + Δt·m(x_n, r_n)``
at coarse sampling: the hidden state is advanced over one interval by the exact
solution of the same field with the input held at ``x̃_n`` (zero-order hold)::

    r_{n+1} = r_n + (target_n − r_n)(1 − e^{−Δt/τ}),
    target_n = x̃_n (filter bank)  or  tanh(W r_n + U x̃_n + b) (random)

Readout, linear in the features ``φ = [x̃, r, (products of [x̃, r]), 1]``::

    m = out_offset + out_scale ⊙ (φ W_out)

References:
    H. Jaeger, GMD Report 148 (2001) (echo-state networks); M. Lukoševičius,
    *A practical guide to applying echo state networks* (2012).
"""

from __future__ import annotations

import torch
from torch import nn

from ..errors import ConfigError
from .base import DiscreteRecurrent, LinearReadout, Recurrent, Scaling, Memory
from .recurrent import _check_choice, _init_bounds, log_spaced

__all__ = ["ReservoirClosure"]

_KINDS = ("filter_bank", "random")
_DEFAULT_RANDOM_SIZE = 100
_DEFAULT_FILTERS = 6


class _Reservoir(Memory, LinearReadout):
    """Closure with a fixed recurrent hidden field and a linear readout (module docstring).

    Args:
        dim: observed components corrected.
        hidden_size: hidden state size; ``None`` gives 6 integrators per input
            (``filter_bank``) or 100 (``random``). For ``filter_bank`` it must be
            a multiple of the number of inputs.
        kind: ``'filter_bank'`` or ``'random'``.
        time_constants: ``(τ_min, τ_max)`` of the integrators / leak rates.
        spectral_radius: ``random`` only: largest |eigenvalue| of ``W``.
        input_scale: ``random`` only: scale of the input weights ``U``.
        bias_scale: ``random`` only: scale of the bias ``b``.
        quadratic: add the pairwise products of ``[x̃, r]`` to the readout features.
        ridge: ridge penalty α per sample used by :class:`~mnemode.fitting.ReadoutRidgeFit`,
            or a list of them from which the fit picks the best on validation data.
        forcing_dim: forcing inputs the closure sees (0: ignores ``u``).
        seed: seeds the random weights.
        interval: ``None`` for a continuous hidden field (``dr/dt``); the observation
            interval Δt for a discrete closure on the flow map (``r_{n+1}``).
    """

    def __init__(self, dim: int, hidden_size: int | None = None, kind: str = "filter_bank",
                 time_constants=(0.1, 10.0), spectral_radius: float = 0.9, input_scale: float = 1.0,
                 bias_scale: float = 0.0, quadratic: bool = False, ridge=(1e-8, 1e-6, 1e-4),
                 forcing_dim: int = 0, seed: int = 0, interval: float | None = None, dtype=None):
        super().__init__(dim, forcing_dim, None, dtype)
        _check_choice("kind", kind, _KINDS)
        if self.discrete and (interval is None or not float(interval) > 0):
            raise ConfigError("interval", f"is {interval}; a reservoir on the flow map needs the observation "
                              "interval Δt > 0", "set interval: ${data.dt}.")
        if not self.discrete and interval is not None:
            raise ConfigError("interval", f"is {interval} for a continuous hidden field",
                              "use mnemode.closures.ReservoirFlowClosure for the flow-map form, or drop interval.")
        self.interval = None if interval is None else float(interval)
        self.kind, self.seed = kind, int(seed)
        self.time_constants = _init_bounds("time_constants", time_constants)
        self.spectral_radius, self.input_scale = float(spectral_radius), float(input_scale)
        self.bias_scale, self.quadratic = float(bias_scale), bool(quadratic)
        self.ridge = [float(a) for a in ridge] if hasattr(ridge, "__len__") else float(ridge)
        n_in = self.in_dim
        if hidden_size is None:
            hidden_size = _DEFAULT_FILTERS * n_in if kind == "filter_bank" else _DEFAULT_RANDOM_SIZE
        H = int(hidden_size)
        if H < 1:
            raise ConfigError("hidden_size", f"is {hidden_size}; a reservoir needs at least 1 hidden state",
                              "use a memoryless closure for hidden_size 0.")
        if kind == "filter_bank" and H % n_in:
            raise ConfigError("hidden_size", f"is {H}, not a multiple of the {n_in} inputs (a filter bank has one "
                              "integrator per input and time constant)", f"use e.g. hidden_size={6 * n_in}.")
        if min(self.ridge if isinstance(self.ridge, list) else [self.ridge], default=-1.0) < 0:
            raise ConfigError("ridge", f"is {ridge}; expected a penalty ≥ 0 or a non-empty list of them",
                              "use e.g. ridge: 1e-6 or ridge: [1e-8, 1e-6, 1e-4].")
        self.hidden_size = H
        self.scaling = Scaling(n_in, self.dim, self.dtype)
        dtype = self.dtype
        gen = torch.Generator().manual_seed(self.seed)
        if kind == "filter_bank":
            taus = log_spaced(self.time_constants, H // n_in).repeat_interleave(n_in)
            self.register_buffer("input_index", torch.arange(H) % n_in)
        else:
            taus = log_spaced(self.time_constants, H)
            W = torch.randn((H, H), generator=gen, dtype=torch.float64)
            radius = torch.linalg.eigvals(W).abs().max().real
            self.register_buffer("W", (W * (self.spectral_radius / radius)).to(dtype))
            U = torch.randn((H, n_in), generator=gen, dtype=torch.float64) * self.input_scale
            self.register_buffer("U", U.to(dtype))
            self.register_buffer("bias", (torch.randn(H, generator=gen, dtype=torch.float64)
                                          * self.bias_scale).to(dtype))
        taus = taus.to(torch.float64)  # derived rates in float64, then stored in the module's dtype
        self.register_buffer("inv_tau", (1.0 / taus).to(dtype))
        if self.discrete:
            # fraction of the way to the held target covered in one interval: 1 − e^{−Δt/τ}
            self.register_buffer("blend", (-torch.expm1(-self.interval / taus)).to(dtype))
        self.n_features = self._feature_count()
        self.readout_weight = nn.Parameter(torch.zeros(self.n_features, self.dim, dtype=dtype))

    def _feature_count(self) -> int:
        n = self.in_dim + self.hidden_size
        return n + (n * (n + 1) // 2 if self.quadratic else 0) + 1

    def hidden_field(self, x, r, u=None):
        """``dr/dt`` of the fixed reservoir, or ``r_{n+1}`` when discrete (module docstring)."""
        z = self.normalised_inputs(x, u)
        if self.kind == "filter_bank":
            target = z[..., self.input_index]
        else:
            target = torch.tanh(r @ self.W.T + z @ self.U.T + self.bias)
        if self.discrete:
            return r + (target - r) * self.blend
        return (target - r) * self.inv_tau

    # -- readout ----------------------------------------------------------------
    def readout_features(self, x, r, u=None) -> torch.Tensor:
        """Features ``φ = [x̃(, u), r, (pairwise products), 1]``."""
        z = self.normalised_inputs(x, u)
        base = torch.cat((z, r.expand(*z.shape[:-1], r.shape[-1])), dim=-1)
        parts = [base]
        if self.quadratic:
            i, j = torch.triu_indices(base.shape[-1], base.shape[-1], device=base.device)
            parts.append(base[..., i] * base[..., j])
        parts.append(torch.ones((*base.shape[:-1], 1), dtype=base.dtype, device=base.device))
        return torch.cat(parts, dim=-1)

    def prepared_rates(self):
        """``[x, r] ↦ [m, dr/dt]`` with the scalings, rates and readout folded once (continuous, unforced), else ``None``.

        The scaled inputs and the hidden state ``[x̃, r]`` are one elementwise affine map
        of the state; the filter bank's field is then one matrix product, the random
        reservoir's one matrix product and a tanh, and the readout (pairwise products
        included) two matrix products with the output scaling folded into them.
        """
        if self.discrete or self.forcing_dim or not self.scaling.applied:
            return None
        sc, n_in, H = self.scaling, self.in_dim, self.hidden_size
        dtype = self.readout_weight.dtype
        ones = torch.ones(H, dtype=dtype, device=sc.in_std.device)
        gain = torch.cat((1.0 / sc.in_std, ones))                        # [x̃, r] = s ⊙ gain + shift
        shift = torch.cat((-sc.in_mean / sc.in_std, torch.zeros_like(ones)))
        inv_tau = self.inv_tau.to(dtype)
        if self.kind == "filter_bank":
            # dr = ([x̃, r] P) with P picking input k mod n_in for state k, minus r, all times 1/τ
            P = torch.zeros(n_in + H, H, dtype=dtype, device=gain.device)
            P[self.input_index, torch.arange(H)] = inv_tau
            P[n_in + torch.arange(H), torch.arange(H)] = -inv_tau
            drive = None
        else:
            P = torch.cat((self.U.T, self.W.T)).to(dtype)
            drive = self.bias.to(dtype)
        W = self.readout_weight * sc.out_scale                            # readout with the output scale folded
        n = n_in + H
        # own tensors, not views of W: an exported program stores each as a constant of its own
        w_base, w_last = W[:n].clone(), sc.out_offset + W[-1]
        w_quad = W[n:-1].clone() if self.quadratic else None
        i, j = (t.clone() for t in torch.triu_indices(n, n, device=gain.device)) if self.quadratic else (None, None)

        def rates(state: torch.Tensor) -> torch.Tensor:
            base = torch.addcmul(shift, state, gain)                     # [x̃, r]
            if drive is None:
                dr = base @ P
            else:
                dr = (torch.tanh(base @ P + drive) - base[..., n_in:]) * inv_tau
            m = base @ w_base + w_last
            if w_quad is not None:
                m = m + (base[..., i] * base[..., j]) @ w_quad
            return torch.cat((m, dr), dim=-1)

        return rates

    def set_readout(self, weight: torch.Tensor) -> None:
        """Set the readout from ridge weights ``(n_features, dim)`` (normalised output units)."""
        with torch.no_grad():
            self.readout_weight.copy_(weight.to(self.readout_weight.dtype))

    def correction(self, x, r=None, u=None):
        if r is None:
            raise ConfigError(type(self).__name__, "needs its hidden state r, got None",
                              "simulate it inside a HybridField, which carries r.")
        return self.scaling.outputs(self.readout_features(x, r, u) @ self.readout_weight)

    def extra_repr(self) -> str:
        return (f"dim={self.dim}, hidden_size={self.hidden_size}, kind={self.kind!r}, "
                f"time_constants={self.time_constants}, quadratic={self.quadratic}")



class ReservoirClosure(_Reservoir, Recurrent):
    """Reservoir with a continuous hidden field ``dr/dt`` (module docstring); ``interval`` must be ``None``."""


class ReservoirFlowClosure(_Reservoir, DiscreteRecurrent):
    """Reservoir on the flow map: ``r_{n+1}`` by the exact step over ``interval`` = Δt (module docstring)."""
