"""What every closure is: a learnable correction ``m(x[, r][, u])`` with optional memory.

A closure is an ``nn.Module`` with

* ``dim`` – number of observed components it corrects;
* ``hidden_size`` – size ``d_r`` of its hidden memory state (0 = memoryless);
* :meth:`correction` – the term added to the observed dynamics, ``(..., dim)``;
* :meth:`hidden_field` – ``dr/dt`` (continuous closures) or the next hidden state
  (discrete closures, ``discrete = True``), only when ``hidden_size > 0``;
* :meth:`initial_hidden` – the hidden state to start from before any warm-up.

Constructors store hyper-parameters only; learned state appears when fitted.
Inputs and outputs pass through a :class:`Scaling` set from training data, so the
inner network sees normalised inputs and produces O(1) outputs; the output offset
carries the missing term's mean (essential on the demo, where it is large).
"""

from __future__ import annotations

import numpy as np
import torch
from torch import nn

__all__ = ["Closure", "Scaling"]


class Scaling(nn.Module):
    """Affine maps at a closure's boundary: ``x̃ = (x − in_mean)/in_std``, ``m = out_offset + out_scale·y``.

    All four are buffers (saved in checkpoints, not trained).
    """

    def __init__(self, in_dim: int, out_dim: int):
        super().__init__()
        self.register_buffer("in_mean", torch.zeros(in_dim))
        self.register_buffer("in_std", torch.ones(in_dim))
        self.register_buffer("out_offset", torch.zeros(out_dim))
        self.register_buffer("out_scale", torch.ones(out_dim))

    def set(self, in_mean=None, in_std=None, out_offset=None, out_scale=None) -> "Scaling":
        for name, value in (("in_mean", in_mean), ("in_std", in_std),
                            ("out_offset", out_offset), ("out_scale", out_scale)):
            if value is not None:
                buf = getattr(self, name)
                buf.copy_(torch.as_tensor(np.asarray(value), dtype=buf.dtype).reshape(buf.shape))
        return self

    def inputs(self, x: torch.Tensor) -> torch.Tensor:
        return (x - self.in_mean) / self.in_std

    def outputs(self, y: torch.Tensor) -> torch.Tensor:
        return self.out_offset + self.out_scale * y

    def outputs_inverse(self, m: torch.Tensor) -> torch.Tensor:
        return (m - self.out_offset) / self.out_scale


class Closure(nn.Module):
    """Base class of learnable corrections; see the module docstring for the contract."""

    hidden_size: int = 0
    discrete: bool = False
    forcing_dim: int = 0  # forcing inputs u the closure sees beside x (0: it ignores u)

    def __init__(self, dim: int):
        super().__init__()
        self.dim = int(dim)

    def normalised_inputs(self, x: torch.Tensor, u: torch.Tensor | None = None) -> torch.Tensor:
        """``x̃``: the scaled closure inputs, of ``[x, u]`` when the closure sees forcing."""
        if self.forcing_dim == 0:
            return self.scaling.inputs(x)
        if u is None:
            from ..errors import ConfigError

            raise ConfigError(f"{type(self).__name__}(forcing_dim={self.forcing_dim})",
                              "was called without forcing inputs u", "set the model's forcing or forcing_dim=0.")
        return self.scaling.inputs(torch.cat((x, u.expand(*x.shape[:-1], u.shape[-1]).to(x.dtype)), dim=-1))

    @staticmethod
    def _join(x: torch.Tensor, u: torch.Tensor | None) -> torch.Tensor:
        """``[x, u]`` when forcing is given (memoryless closures take ``in_dim = dim + U`` inputs)."""
        return x if u is None else torch.cat((x, u.to(x.dtype)), dim=-1)

    def normalised_regression_data(self, inputs, targets, what: str):
        """Check regression data ``(N, in_dim)``/``(N, dim)`` and scale it: float64 ``(x̃, ỹ)``.

        Raises:
            DataError: shapes that do not match the closure.
        """
        from ..errors import DataError

        x = torch.as_tensor(inputs).to(torch.float64)
        y = torch.as_tensor(targets).to(torch.float64)
        in_dim = getattr(self, "in_dim", self.dim)
        if x.ndim != 2 or x.shape[1] != in_dim or y.ndim != 2 or y.shape[1] != self.dim \
                or x.shape[0] != y.shape[0] or x.shape[0] == 0:
            raise DataError(what, f"inputs {tuple(x.shape)} and targets {tuple(y.shape)}; expected "
                            f"(N, {in_dim}) and (N, {self.dim}) with N ≥ 1", "check the closure's dim and in_dim.")
        s = self.scaling
        return (x - s.in_mean.double()) / s.in_std.double(), (y - s.out_offset.double()) / s.out_scale.double()

    def correction(self, x: torch.Tensor, r: torch.Tensor | None = None,
                   u: torch.Tensor | None = None) -> torch.Tensor:
        raise NotImplementedError

    def hidden_field(self, x: torch.Tensor, r: torch.Tensor, u: torch.Tensor | None = None) -> torch.Tensor:
        raise NotImplementedError(f"{type(self).__name__} has no hidden state")

    def initial_hidden(self, batch_shape, dtype=torch.float32) -> torch.Tensor:
        """Hidden state before warm-up: zeros unless a subclass learns one."""
        ref = next(iter(self.buffers()), None)
        device = ref.device if ref is not None else None
        return torch.zeros((*batch_shape, self.hidden_size), dtype=dtype, device=device)

    def forward(self, x: torch.Tensor, r: torch.Tensor | None = None, u: torch.Tensor | None = None):
        return self.correction(x, r, u)
