"""What every closure is: a learnable correction ``m(x[, r][, u])`` with optional memory.

A closure is an ``nn.Module`` with

* ``dim`` – number of observed components it corrects;
* ``forcing_dim`` – number of forcing inputs ``u`` it sees beside ``x`` (0: it ignores ``u``);
* ``in_dim`` – number of inputs it sees, ``dim + forcing_dim`` (a closure used inside a
  neighbourhood closure such as :class:`~mnemode.closures.RingLocalClosure` may see more);
* ``hidden_size`` – size ``d_r`` of its hidden memory state (0 = memoryless);
* :meth:`correction` – the term added to the observed dynamics, ``(..., dim)``.

What else a closure can do is declared by the types it derives from, so that fitters
and the pipeline ask ``isinstance`` rather than probing attributes:

* :class:`RegressionFittable` – fitted from input/target pairs (:meth:`fit_regression`);
* :class:`LinearReadout` – its output is linear in features (:meth:`readout_features`,
  :meth:`set_readout`), so a ridge regression can set the readout;
* :class:`Recurrent` – a continuous hidden field ``dr/dt = g(x, r, u)`` (:meth:`hidden_field`);
* :class:`DiscreteRecurrent` – a recurrent cell on the flow map, ``r_{n+1} = cell(x_n, r_n)``.

Constructors store hyper-parameters only and build their tensors in the ``dtype`` they are
given (``None``: torch's default dtype); learned state appears when fitted. Inputs and
outputs pass through a :class:`Scaling` set from training data, so the inner network sees
normalised inputs and produces O(1) outputs; the output offset carries the missing term's
mean (essential on the demo, where it is large).
"""

from __future__ import annotations

from abc import ABCMeta, abstractmethod

import numpy as np
import torch
from torch import nn

from ..errors import ConfigError, DataError

__all__ = ["Closure", "Scaling", "RegressionFittable", "LinearReadout", "Memory", "Recurrent",
           "DiscreteRecurrent", "resolve_dtype"]

_DTYPES = {"float32": torch.float32, "float64": torch.float64}


def resolve_dtype(dtype) -> torch.dtype:
    """A torch dtype from ``None`` (torch's default), a ``torch.dtype`` or its name (``'float64'``)."""
    if dtype is None:
        return torch.get_default_dtype()
    if isinstance(dtype, torch.dtype):
        return dtype
    name = str(dtype).replace("torch.", "")
    if name not in _DTYPES:
        raise ConfigError("dtype", f"is {dtype!r}; expected one of {sorted(_DTYPES)}", "set dtype=float64 or float32.")
    return _DTYPES[name]


class Scaling(nn.Module):
    """Affine maps at a closure's boundary: ``x̃ = (x − in_mean)/in_std``, ``m = out_offset + out_scale·y``.

    All four are buffers (saved in checkpoints, not trained). With ``applied = False``
    both maps are the identity whatever the buffers hold: a closure inside a
    :class:`~mnemode.closures.RingLocalClosure` sees inputs the ring has already
    normalised and returns normalised outputs, and skipping four tensor operations per
    call is a tenth of a small corrected simulator's step (the buffers stay, so its
    checkpoints keep their keys).
    """

    #: whether :meth:`inputs` and :meth:`outputs` apply the buffers (see the class docstring)
    applied: bool = True

    def __init__(self, in_dim: int, out_dim: int, dtype=None):
        super().__init__()
        dtype = resolve_dtype(dtype)
        self.register_buffer("in_mean", torch.zeros(in_dim, dtype=dtype))
        self.register_buffer("in_std", torch.ones(in_dim, dtype=dtype))
        self.register_buffer("out_offset", torch.zeros(out_dim, dtype=dtype))
        self.register_buffer("out_scale", torch.ones(out_dim, dtype=dtype))

    def set(self, in_mean=None, in_std=None, out_offset=None, out_scale=None) -> "Scaling":
        for name, value in (("in_mean", in_mean), ("in_std", in_std),
                            ("out_offset", out_offset), ("out_scale", out_scale)):
            if value is not None:
                buf = getattr(self, name)
                buf.copy_(torch.as_tensor(np.asarray(value), dtype=buf.dtype).reshape(buf.shape))
        return self

    def inputs(self, x: torch.Tensor) -> torch.Tensor:
        return (x - self.in_mean) / self.in_std if self.applied else x

    def outputs(self, y: torch.Tensor) -> torch.Tensor:
        return self.out_offset + self.out_scale * y if self.applied else y

    def outputs_inverse(self, m: torch.Tensor) -> torch.Tensor:
        return (m - self.out_offset) / self.out_scale if self.applied else m


class Closure(nn.Module, metaclass=ABCMeta):
    """Base class of learnable corrections; see the module docstring for the contract.

    Args:
        dim: observed components corrected.
        forcing_dim: forcing inputs ``u`` seen beside ``x``.
        n_inputs: inputs seen, when not ``dim + forcing_dim`` (neighbourhood closures only).
        dtype: dtype of the tensors built at construction.
    """

    hidden_size: int = 0
    pooled_scaling: bool = False  # one input/output mean and std shared by all components (identical sites)

    def __init__(self, dim: int, forcing_dim: int = 0, n_inputs: int | None = None, dtype=None):
        super().__init__()
        self.dim, self.forcing_dim = int(dim), int(forcing_dim)
        self.in_dim = self.dim + self.forcing_dim if n_inputs is None else int(n_inputs)
        self.dtype = resolve_dtype(dtype)
        if self.dim < 1 or self.forcing_dim < 0 or self.in_dim < 1:
            raise ConfigError(f"{type(self).__name__}", f"got dim={dim}, forcing_dim={forcing_dim}, "
                              f"n_inputs={n_inputs}; expected dim ≥ 1, forcing_dim ≥ 0",
                              "fix the closure's sizes (the run supplies dim and forcing_dim).")

    @property
    def discrete(self) -> bool:
        """True for closures that step on the flow map (:class:`DiscreteRecurrent`)."""
        return isinstance(self, DiscreteRecurrent)

    def normalised_inputs(self, x: torch.Tensor, u: torch.Tensor | None = None) -> torch.Tensor:
        """``x̃``: the scaled closure inputs, of ``[x, u]`` when the closure sees forcing."""
        if self.forcing_dim == 0:
            return self.scaling.inputs(x)
        if u is None:
            raise ConfigError(f"{type(self).__name__}(forcing_dim={self.forcing_dim})",
                              "was called without forcing inputs u",
                              "pass the forcing to simulate/warm_up, or build the closure with forcing_dim=0.")
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
        x = torch.as_tensor(inputs).to(torch.float64)
        y = torch.as_tensor(targets).to(torch.float64)
        if x.ndim != 2 or x.shape[1] != self.in_dim or y.ndim != 2 or y.shape[1] != self.dim \
                or x.shape[0] != y.shape[0] or x.shape[0] == 0:
            raise DataError(what, f"inputs {tuple(x.shape)} and targets {tuple(y.shape)}; expected "
                            f"(N, {self.in_dim}) and (N, {self.dim}) with N ≥ 1",
                            "check the closure's dim and forcing_dim.")
        s = self.scaling
        return (x - s.in_mean.double()) / s.in_std.double(), (y - s.out_offset.double()) / s.out_scale.double()

    @abstractmethod
    def correction(self, x: torch.Tensor, r: torch.Tensor | None = None,
                   u: torch.Tensor | None = None) -> torch.Tensor:
        """The correction ``m(x[, r][, u])``, ``(..., dim)``."""

    def affine_rates(self):
        """``(M, v)`` with ``[m, dr/dt] = [x, r] @ M + v`` when the closure is affine in the state, else ``None``.

        A closure that returns them is evaluated by one matrix product per solver
        stage (:meth:`mnemode.hybrid.HybridField.prepared`); they must be built from
        the parameters (so gradients reach them) and equal the plain closure's
        values to rounding.
        """
        return None

    def prepared_rates(self):
        """A memory closure's ``s = [x, r] ↦ [m, dr/dt]`` with its constants folded once, or ``None``.

        For memory closures that are not affine in the state (:meth:`affine_rates`
        covers those); same contract: built from the parameters, valid until they
        change, equal to :meth:`correction` and :meth:`hidden_field` to rounding.
        """
        return None

    def prepared_correction(self):
        """A memoryless closure's correction ``x ↦ m(x)`` with its constants folded once, or ``None``.

        Same contract as :meth:`affine_rates`: built from the parameters, valid until
        they change, equal to :meth:`correction` to rounding.
        """
        return None

    def initial_hidden(self, batch_shape, dtype=torch.float32) -> torch.Tensor:
        """Hidden state before warm-up: zeros unless a subclass learns one."""
        ref = next(iter(self.buffers()), None)
        device = ref.device if ref is not None else None
        return torch.zeros((*batch_shape, self.hidden_size), dtype=dtype, device=device)

    def forward(self, x: torch.Tensor, r: torch.Tensor | None = None, u: torch.Tensor | None = None):
        return self.correction(x, r, u)


class RegressionFittable(metaclass=ABCMeta):
    """A memoryless closure fitted from input/target pairs in physical units."""

    @abstractmethod
    def fit_regression(self, inputs: torch.Tensor, targets: torch.Tensor, generator: torch.Generator | None = None,
                       val_inputs: torch.Tensor | None = None, val_targets: torch.Tensor | None = None,
                       progress: bool = False, log=None) -> dict:
        """Fit to ``inputs (N, in_dim) → targets (N, dim)``; returns plain diagnostics."""


class LinearReadout(metaclass=ABCMeta):
    """A closure whose output is linear in :meth:`readout_features`, so ridge regression sets its readout."""

    #: ridge penalty (or candidates) the closure suggests for its readout; ``None``: the fitter's default
    ridge: float | list | None = None

    @property
    def has_linear_readout(self) -> bool:
        """Whether this instance's readout is linear (a configurable readout may be an MLP instead)."""
        return True

    @abstractmethod
    def readout_features(self, x: torch.Tensor, r: torch.Tensor | None, u: torch.Tensor | None = None) -> torch.Tensor:
        """Features ``(..., p)`` in which the (normalised) output is linear."""

    @abstractmethod
    def set_readout(self, weight: torch.Tensor) -> None:
        """Set the readout from ridge weights ``(p, dim)`` (normalised output units)."""


class Memory(Closure):
    """A closure with a hidden memory state (either kind below) and a rule for how it starts."""

    initial_hidden_mode: str = "zeros"  # zeros | learned | warm_up

    @abstractmethod
    def hidden_field(self, x: torch.Tensor, r: torch.Tensor, u: torch.Tensor | None = None) -> torch.Tensor:
        """``dr/dt`` (:class:`Recurrent`) or the next hidden state (:class:`DiscreteRecurrent`)."""


class Recurrent(Memory):
    """A closure with a continuous hidden field ``dr/dt = g(x, r, u)``."""


class DiscreteRecurrent(Memory):
    """A closure on the flow map with a recurrent cell ``r_{n+1} = cell(x_n, r_n)``."""
