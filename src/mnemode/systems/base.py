"""What every system provides: nominal physics, an optional truth generator, metadata.

A *system* is the physics a modeller trusts (the nominal right-hand side ``f0`` of
the observed variables) plus, for built-in benchmarks and the demo, the full truth
system whose hidden variables push the observed ones around. Vector fields are
``nn.Module`` objects called as ``f(t, x)`` (optionally ``f(t, x, u)`` with a
forcing input), batched over leading dimensions and dtype-agnostic (float32 and
float64 both work).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import torch
from torch import nn

__all__ = ["VectorField", "System"]


class VectorField(nn.Module):
    """A right-hand side ``dx/dt = f(t, x[, u])`` acting on the last dimension.

    Subclasses implement :meth:`forward`. ``t`` is the true time: a float or a
    0-d tensor when the whole batch shares it, else a ``(..., 1)`` tensor (each
    trajectory's own time) that broadcasts against ``x``; ``x`` has shape
    ``(..., dim)``; ``u`` (forcing) has shape ``(..., n_forcing)`` or is ``None``.
    Parameters are plain floats stored as buffers so that the module moves with
    ``.to(dtype)`` and exports cleanly.

    ``autonomous`` declares that the field ignores ``t``: unrolls then skip
    shifting the solver's clock to each trajectory's true time (a small saving
    per evaluation). It is ``False`` unless a class says otherwise, so a field
    that does not declare it always receives the true time.
    """

    dim: int
    autonomous: bool = False

    def forward(self, t, x: torch.Tensor, u: torch.Tensor | None = None) -> torch.Tensor:  # pragma: no cover
        raise NotImplementedError


@dataclass
class System:
    """A named system: nominal physics of the observed variables and, if known, the truth.

    Attributes:
        name: short identifier used in configs and manifests.
        state_names: names of the observed components, in order.
        state_units: units of the observed components (free text, same order).
        time_unit: what one unit of time means physically.
        nominal: the trusted but imperfect right-hand side ``f0`` of the observed
            variables.
        truth: the full right-hand side including hidden variables, or ``None``
            when the system exists only as data.
        observed_index: positions of the observed components inside the truth
            state.
        hidden_names: names of the truth's hidden components.
        lyapunov_exponent: the truth's largest Lyapunov exponent where known
            (published or measured; see each system's docstring), else ``None``.
        spin_up: time to discard from truth runs before recording (transient).
        ring: ``True`` when the observed components are identical sites on a
            ring (Lorenz-96 kinds), so one closure may be shared across them.
        initial_scale: a rough scale for random initial truth states.
    """

    name: str
    state_names: tuple[str, ...]
    state_units: tuple[str, ...]
    time_unit: str
    nominal: VectorField
    truth: VectorField | None = None
    observed_index: tuple[int, ...] = ()
    hidden_names: tuple[str, ...] = ()
    lyapunov_exponent: float | None = None
    spin_up: float = 0.0
    ring: bool = False
    initial_mean: tuple[float, ...] = ()
    initial_scale: tuple[float, ...] = ()
    description: str = ""
    extra: dict = field(default_factory=dict)

    @property
    def dim(self) -> int:
        """Number of observed components."""
        return len(self.state_names)

    @property
    def truth_dim(self) -> int:
        """Number of components of the full truth state."""
        return self.truth.dim if self.truth is not None else self.dim

    def observe(self, z: torch.Tensor) -> torch.Tensor:
        """Observed components of full truth states ``z`` (``(..., truth_dim)``)."""
        if self.truth is None:
            return z
        return z[..., list(self.observed_index)]

    def random_truth_states(self, n: int, generator: torch.Generator, dtype=torch.float64) -> torch.Tensor:
        """``n`` random full truth states, spread around the attractor's rough location.

        They are not on the attractor: generation discards ``spin_up`` time first.
        """
        d = self.truth_dim
        mean = torch.as_tensor(self.initial_mean or (0.0,) * d, dtype=dtype)
        scale = torch.as_tensor(self.initial_scale or (1.0,) * d, dtype=dtype)
        noise = torch.randn((n, d), generator=generator, dtype=dtype)
        return mean + scale * noise
