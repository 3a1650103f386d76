"""One small closure shared by every site of a ring (Lorenz-96 kinds).

For ``K`` identical sites on a ring the correction of site ``k`` is one function
of its neighbourhood, the same for every ``k``::

    m_k(x) = out_offset + out_scale · g( x̃_{k−n}, …, x̃_k, …, x̃_{k+n} )        (indices mod K)

``g`` is an *inner* memoryless closure with ``dim = 1`` and ``in_dim = 2n + 1``.
The input and output scalings are pooled over sites (one mean and one std for all),
so the closure commutes with rotations of the ring: rolling ``x`` by ``s`` sites
rolls ``m(x)`` by ``s``. The number of learned numbers does not depend on ``K``.

Regression fitting turns ``N`` states of ``K`` sites into ``N·K`` neighbourhood →
correction pairs and fits ``g`` on them.

Config (Hydra)::

    closure:
      _target_: mnemode.closures.RingLocalClosure
      dim: ${system.dim}
      neighbours: 2
      inner:
        _target_: mnemode.closures.MLPClosure
        _partial_: true          # the ring supplies dim=1 and n_inputs=2n+1
        width: 16
"""

from __future__ import annotations

import functools
from typing import Callable

import torch

from ..errors import ConfigError, DataError
from .base import Closure, RegressionFittable, Scaling

__all__ = ["RingLocalClosure"]


class RingLocalClosure(Closure, RegressionFittable):
    """Memoryless closure of a ring built from one local closure shared by all sites.

    Args:
        dim: number of sites ``K`` on the ring.
        inner: a factory (class or ``functools.partial``, e.g. Hydra ``_partial_: true``)
            called as ``inner(dim=1, n_inputs=2·neighbours+1)``, or an already built
            closure of those sizes. ``None`` gives a random-feature closure.
        neighbours: ``n``, sites on each side of ``k`` that ``m_k`` sees.
        in_dim: must equal ``dim`` (ring closures take no forcing inputs); for a
            common constructor signature.

    Raises:
        ConfigError: a neighbourhood wider than the ring, an inner closure of the
            wrong size or with memory, or forcing inputs.
    """

    #: the regression fitters pool the scaling over sites for this closure
    pooled_scaling = True

    def __init__(self, dim: int, inner: Callable[..., Closure] | Closure | None = None, neighbours: int = 2,
                 forcing_dim: int = 0, dtype=None):
        super().__init__(dim, 0, None, dtype)
        self.neighbours = int(neighbours)
        if int(forcing_dim) != 0:
            raise ConfigError("closure", f"a ring closure got forcing_dim={forcing_dim}; ring closures take no "
                              "forcing inputs", "choose another closure for forced data, or drop the forcing columns.")
        if self.neighbours < 0 or 2 * self.neighbours + 1 > self.dim:
            raise ConfigError("closure.neighbours", f"is {neighbours}; a ring of {self.dim} sites allows 0 to "
                              f"{(self.dim - 1) // 2}", "choose a smaller neighbourhood.")
        width = 2 * self.neighbours + 1
        if inner is None:
            from .random_features import RandomFeatureClosure
            inner = functools.partial(RandomFeatureClosure, n_features=200)
        if isinstance(inner, Closure):
            closure = inner
        elif callable(inner):
            closure = inner(dim=1, n_inputs=width, dtype=self.dtype)
        else:
            raise ConfigError("closure.inner", f"is a {type(inner).__name__}; expected a closure factory",
                              "give a closure config with _partial_: true.")
        if not isinstance(closure, Closure):
            raise ConfigError("closure.inner", f"built a {type(closure).__name__}, not a Closure",
                              "point inner._target_ at a mnemode closure class.")
        if closure.dim != 1 or closure.in_dim != width or closure.hidden_size:
            raise ConfigError("closure.inner", f"has dim={closure.dim}, in_dim={closure.in_dim}, "
                              f"hidden_size={closure.hidden_size}; the ring needs a memoryless closure with dim=1 "
                              f"and in_dim={width}", "use _partial_: true so the ring supplies the sizes.")
        if not isinstance(closure, RegressionFittable):
            raise ConfigError("closure.inner", f"{type(closure).__name__} has no regression fit",
                              "use GaussianProcessClosure, RandomFeatureClosure, MLPClosure or PolynomialClosure.")
        self.inner = closure
        closure.scaling.applied = False  # the ring normalises; the inner's scaling stays the identity
        self.scaling = Scaling(self.dim, self.dim, self.dtype)

    def neighbourhoods(self, z: torch.Tensor) -> torch.Tensor:
        """``(..., K)`` → ``(..., K, 2n+1)``: entry ``[..., k, j] = z[..., (k + j − n) mod K]``.

        The ring padded by ``n`` sites on each side, then a sliding window (a view): no
        index tensor, so a compiled step reads the sites directly instead of through a gather.
        """
        n = self.neighbours
        if n == 0:
            return z.unsqueeze(-1)
        padded = torch.cat((z[..., self.dim - n:], z, z[..., :n]), dim=-1)
        return padded.unfold(-1, 2 * n + 1, 1)

    def correction(self, x: torch.Tensor, r: torch.Tensor | None = None,
                   u: torch.Tensor | None = None) -> torch.Tensor:
        """``m_k(x) = out_offset + out_scale · g(x̃_{k−n..k+n})`` for every site ``k``, ``(..., K)``."""
        if u is not None:
            raise ConfigError("RingLocalClosure", "got forcing inputs", "ring closures take none; drop the forcing.")
        local = self.inner.correction(self.neighbourhoods(self.scaling.inputs(x)))
        return self.scaling.outputs(local.squeeze(-1))

    def prepared_correction(self):
        """The correction with the inner polynomial's coefficients prepared once and the ring's pooled output
        scaling folded into them, or ``None`` (another inner closure, or scalings that are not pooled).

        Equal to :meth:`correction` to rounding; built from the coefficients
        (differentiable), valid until they change.
        """
        folded = getattr(self.inner, "folded_nested", None)
        sc = self.scaling
        if folded is None or not getattr(self.inner, "nested", False) or not sc.applied:
            return None
        if not (bool((sc.out_scale == sc.out_scale[0]).all()) and bool((sc.out_offset == sc.out_offset[0]).all())):
            return None
        contract = folded(sc.out_scale[:1], sc.out_offset[:1])
        mean, std, width = sc.in_mean, sc.in_std, 2 * self.neighbours + 1

        def correction(x: torch.Tensor) -> torch.Tensor:
            local = self.neighbourhoods((x - mean) / std)                           # (..., K, width)
            return contract(local.reshape(-1, width)).reshape(x.shape)

        return correction

    def fit_regression(self, inputs: torch.Tensor, targets: torch.Tensor, generator: torch.Generator | None = None,
                       val_inputs: torch.Tensor | None = None, val_targets: torch.Tensor | None = None,
                       progress: bool = False, log=None) -> dict:
        """Fit the shared inner closure on all sites' neighbourhood → correction pairs.

        ``inputs`` and ``targets`` are ``(N, K)`` in physical units, normalised
        through ``self.scaling`` (pooled; the regression fitters set it). The inner
        closure's own scaling is reset to the identity (its data are already normalised)
        and is not applied in :meth:`correction` either (``Scaling.applied``).

        Returns:
            the inner closure's diagnostics.
        """
        def pairs(a, b):
            a = torch.as_tensor(a).to(torch.float64)
            b = torch.as_tensor(b).to(torch.float64)
            if a.ndim != 2 or b.shape != a.shape or a.shape[1] != self.dim:
                raise DataError("ring regression data", f"inputs {tuple(a.shape)} and targets {tuple(b.shape)}; "
                                f"expected (N, {self.dim}) each", "check the closure's dim.")
            s = self.scaling
            at = (a - s.in_mean.double()) / s.in_std.double()
            bt = (b - s.out_offset.double()) / s.out_scale.double()
            return self.neighbourhoods(at).reshape(-1, 2 * self.neighbours + 1), bt.reshape(-1, 1)

        x, y = pairs(inputs, targets)
        vx = vy = None
        if val_inputs is not None and val_targets is not None:
            vx, vy = pairs(val_inputs, val_targets)
        inner_scaling = self.inner.scaling
        with torch.no_grad():
            for buf, value in ((inner_scaling.in_mean, 0.0), (inner_scaling.in_std, 1.0),
                               (inner_scaling.out_offset, 0.0), (inner_scaling.out_scale, 1.0)):
                buf.fill_(value)
        return self.inner.fit_regression(x, y, generator=generator, val_inputs=vx, val_targets=vy,
                                         progress=progress, log=log)

    def extra_repr(self) -> str:
        return f"dim={self.dim}, neighbours={self.neighbours}"
