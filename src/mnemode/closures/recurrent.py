"""Continuous-time recurrent closure: a learned hidden field with a readout into dx/dt.

The closure carries a hidden memory state ``r`` (``hidden_size`` components) that
follows its own vector field, driven by the normalised observed state
``x̃ = (x − μ)/s`` (and forcing ``u`` when ``forcing_dim > 0``). Three forms:

* ``'leaky'`` (leaky-linear)::

      dr/dt = A r + B x̃ + b,          A initialised to −diag(1/τ_i)

  It represents linear relaxation towards a driven value exactly (the memory of
  a heat-storing wall, say) and is cheap to unroll. It is parameterised per
  state in units of its initial rate λ_i = 1/τ_i (``A = diag(λ) A_rel``,
  ``B = diag(λ) B_rel``, ``b = λ ⊙ b_rel``, with ``A_rel`` starting at −I), so
  that a gradient step changes a slow state no more, relative to its own time
  scale, than a fast one.
* ``'tanh'`` (continuous-time recurrent network)::

      dr/dt = (−r + tanh(W r + U x̃ + b)) / τ,        τ_i = exp(log_τ_i) learned
* ``'gated'`` (state-dependent time constants)::

      z = σ(W_z r + U_z x̃ + b_z) · 2/τ_min
      dr/dt = z ⊙ (tanh(W r + U x̃ + b) − r)

  with ``b_z`` initialised so that the rates start at ``1/τ_i``.

In every form the time constants ``τ_i`` start log-spaced over
``time_constants = (τ_min, τ_max)``, the plausible range of the memory.

Readout (the term added to dx/dt)::

    'linear':  m = out_offset + out_scale ⊙ (C r + D x̃ + c)
    'mlp':     m = out_offset + out_scale ⊙ MLP([x̃, r])

A linear readout is linear in the features ``[r, x̃, 1]``, so it can also be
fitted by ridge regression (:meth:`readout_features`, :meth:`set_readout`).

References:
    K. Funahashi, Y. Nakamura, Neural Networks 6 (1993) 801–806 (continuous-time
    recurrent networks); K. Cho et al., EMNLP 2014 (gated units).
"""

from __future__ import annotations

import math

import torch
from torch import nn

from ..errors import ConfigError
from .base import LinearReadout, Recurrent, Scaling

__all__ = ["RecurrentClosure", "log_spaced"]

_FORMS = ("leaky", "gated", "tanh")
_READOUTS = ("linear", "mlp")
_INITIAL = ("zeros", "learned", "warm_up")
_INPUT_INIT = ("random", "filter_bank")


def log_spaced(bounds, n: int) -> torch.Tensor:
    """``n`` values log-spaced over ``bounds = (lo, hi)`` (float64); ``lo`` alone when ``n = 1``."""
    lo, hi = (float(b) for b in bounds)
    if not (0 < lo <= hi):
        raise ConfigError("time_constants", f"is {tuple(bounds)}; expected 0 < τ_min ≤ τ_max",
                          "give two positive time constants, e.g. [0.1, 10.0].")
    if n == 1:
        return torch.tensor([lo], dtype=torch.float64)
    return torch.logspace(math.log10(lo), math.log10(hi), n, dtype=torch.float64)


def _check_choice(name: str, value, choices) -> None:
    if value not in choices:
        raise ConfigError(name, f"is {value!r}; expected one of {choices}", f"set {name} to one of {choices}.")


def _candidate_bounds(name: str, value) -> list[tuple[float, float]]:
    """One ``(τ_min, τ_max)`` pair, or a list of them (candidates a ridge fit chooses among)."""
    try:
        nested = len(value) > 0 and all(hasattr(v, "__len__") and not isinstance(v, str) for v in value)
    except TypeError:
        nested = False
    pairs = [_init_bounds(name, v) for v in value] if nested else [_init_bounds(name, value)]
    return pairs


def _init_bounds(name: str, bounds) -> tuple[float, float]:
    try:
        lo, hi = (float(b) for b in bounds)
    except (TypeError, ValueError):
        raise ConfigError(name, f"is {bounds!r}; expected two numbers (τ_min, τ_max)",
                          "write e.g. time_constants: [0.1, 10.0].") from None
    log_spaced((lo, hi), 1)  # validates
    return lo, hi


def _taylor_phi(z: torch.Tensor, k: int) -> torch.Tensor:
    """``φ_k(z) = Σ_j z^j/(j + k)!`` for ``j = 0..6`` (Horner), ``k ∈ {1, 2}``."""
    out = torch.full_like(z, 1.0 / math.factorial(6 + k))
    for j in range(5, -1, -1):
        out = out * z + 1.0 / math.factorial(j + k)
    return out


class _MLP(nn.Module):
    """Two tanh hidden layers; the last layer starts small so the readout starts near its offset."""

    def __init__(self, n_in: int, width: int, n_out: int, gen: torch.Generator):
        super().__init__()
        # skip_init: the layers are initialised below from the closure's own generator
        self.hidden1 = nn.utils.skip_init(nn.Linear, n_in, width)
        self.hidden2 = nn.utils.skip_init(nn.Linear, width, width)
        self.out = nn.utils.skip_init(nn.Linear, width, n_out)
        with torch.no_grad():
            for layer, gain in ((self.hidden1, 1.0), (self.hidden2, 1.0), (self.out, 0.1)):
                fan_in = layer.weight.shape[1]
                layer.weight.copy_(torch.randn(layer.weight.shape, generator=gen) * gain / math.sqrt(fan_in))
                layer.bias.zero_()

    def forward(self, z):
        return self.out(torch.tanh(self.hidden2(torch.tanh(self.hidden1(z)))))


class RecurrentClosure(Recurrent, LinearReadout):
    """Closure with a continuous-time recurrent hidden state (see the module docstring).

    Args:
        dim: observed components corrected.
        hidden_size: size of the hidden state ``r`` (≥ 1); ``None`` gives 6 per input
            (one leaky integrator per input and time constant) with
            ``input_init='filter_bank'``, 8 otherwise.
        form: ``'leaky'``, ``'tanh'`` or ``'gated'``.
        time_constants: ``(τ_min, τ_max)``; initial time constants are log-spaced
            over this range (time units of the data). A list of such pairs gives
            candidates: the closure starts with the first, and a ridge
            initialisation (:class:`~mnemode.fitting.ReadoutRidgeFit`, alone or
            before :class:`~mnemode.fitting.TrajectoryFit`) keeps the one whose
            validation forecasts stay valid longest (leaky form, linear readout).
        readout: ``'linear'`` or ``'mlp'``.
        readout_width: hidden width of the MLP readout.
        initial_hidden: the state before any warm-up: ``'zeros'``, ``'learned'``
            (a trained vector), or ``'warm_up'`` (zeros, and fitting refuses to run
            without a warm-up, because the state is only meaningful once driven by
            observations).
        input_init: ``'random'`` (Gaussian input weights) or ``'filter_bank'``
            (leaky form only: the hidden state starts as a bank of leaky
            integrators, one per input and time constant, so ``hidden_size`` must
            be a multiple of the number of inputs; a good start for a ridge readout).
        coupling: leaky form only: learn a full matrix ``A`` (``True``) or only each
            state's own time constant, ``A = −diag(λ ⊙ exp(s))`` with ``s`` learned
            from 0 (``False``: a bank of leaky integrators with learned time
            constants and input mixing, which keeps fine-tuning well conditioned).
        forcing_dim: number of forcing inputs ``u`` the closure sees (0: ignores ``u``).
        seed: seeds the initial weights (construction never touches the global RNG).

    Raises:
        ConfigError: an unknown option or inconsistent sizes.
    """

    def __init__(self, dim: int, hidden_size: int | None = 8, form: str = "leaky",
                 time_constants=(0.1, 10.0), readout: str = "linear", readout_width: int = 32,
                 initial_hidden: str = "zeros", input_init: str = "random", coupling: bool = True,
                 forcing_dim: int = 0, seed: int = 0, dtype=None):
        super().__init__(dim, forcing_dim, None, dtype)
        _check_choice("form", form, _FORMS)
        _check_choice("readout", readout, _READOUTS)
        _check_choice("initial_hidden", initial_hidden, _INITIAL)
        _check_choice("input_init", input_init, _INPUT_INIT)
        if hidden_size is None:
            hidden_size = 6 * (self.dim + int(forcing_dim)) if input_init == "filter_bank" else 8
        if int(hidden_size) < 1:
            raise ConfigError("hidden_size", f"is {hidden_size}; a recurrent closure needs at least 1 hidden state",
                              "use a memoryless closure for hidden_size 0.")
        self.hidden_size = int(hidden_size)
        self.form, self.readout, self.readout_width = form, readout, int(readout_width)
        self.time_constant_candidates = _candidate_bounds("time_constants", time_constants)
        self._bounds = self.time_constant_candidates[0]
        if len(self.time_constant_candidates) > 1 and (form != "leaky" or readout != "linear"):
            raise ConfigError("time_constants", f"lists {len(self.time_constant_candidates)} candidate ranges, but "
                              f"only the leaky form with a linear readout chooses among them (got form={form!r}, "
                              f"readout={readout!r})", "give one pair, e.g. time_constants: [0.1, 10.0].")
        self.initial_hidden_mode, self.input_init, self.coupling = initial_hidden, input_init, bool(coupling)
        self.seed = int(seed)
        n_in = self.in_dim
        if input_init == "filter_bank":
            if form != "leaky":
                raise ConfigError("input_init", f"'filter_bank' needs form='leaky', got form={form!r}",
                                  "use input_init='random' or form='leaky'.")
            if self.hidden_size % n_in:
                raise ConfigError("hidden_size", f"is {hidden_size}, not a multiple of the {n_in} inputs that "
                                  "input_init='filter_bank' gives one integrator each per time constant",
                                  f"use hidden_size = {n_in} × (number of time constants), e.g. {6 * n_in}.")
        self.scaling = Scaling(n_in, self.dim, self.dtype)

        gen = torch.Generator().manual_seed(self.seed)
        dtype = self.dtype
        H = self.hidden_size

        def randn(*shape, scale=1.0):
            return (torch.randn(shape, generator=gen, dtype=torch.float64) * scale).to(dtype)

        taus = self._taus(self._bounds)
        rates = (1.0 / taus)
        if form == "leaky":
            # A = diag(λ)·A_rel, B = diag(λ)·B_rel, b = λ ⊙ b_rel with the initial rates λ = 1/τ fixed:
            # each state's parameters are in units of its own rate, so an optimiser step changes a
            # slow state as little, relative to its time constant, as a fast one
            self.register_buffer("rate", rates.to(dtype))
            if self.coupling:
                self.A_rel = nn.Parameter(-torch.eye(H, dtype=dtype))
            else:
                self.log_rate = nn.Parameter(torch.zeros(H, dtype=dtype))
            if input_init == "filter_bank":
                B = self._filter_bank_inputs()
            else:
                B = torch.randn((H, n_in), generator=gen, dtype=torch.float64) / math.sqrt(n_in)
            self.B_rel = nn.Parameter(B.to(dtype))
            self.b_rel = nn.Parameter(torch.zeros(H, dtype=dtype))
        else:
            self.W = nn.Parameter(randn(H, H, scale=0.5 / math.sqrt(H)))
            self.U = nn.Parameter(randn(H, n_in, scale=1.0 / math.sqrt(n_in)))
            self.bias = nn.Parameter(torch.zeros(H, dtype=dtype))
            if form == "tanh":
                self.log_tau = nn.Parameter(taus.log().to(dtype))
            else:
                self.W_z = nn.Parameter(randn(H, H, scale=0.1 / math.sqrt(H)))
                self.U_z = nn.Parameter(randn(H, n_in, scale=0.1 / math.sqrt(n_in)))
                # σ(b_z)·2/τ_min = 1/τ_i at the start
                p = (self._bounds[0] / (2.0 * taus)).clamp(1e-6, 1 - 1e-6)
                self.b_z = nn.Parameter(torch.log(p / (1 - p)).to(dtype))
        if readout == "linear":
            self.C = nn.Parameter(randn(self.dim, H, scale=0.1 / math.sqrt(H)))
            self.D = nn.Parameter(torch.zeros(self.dim, n_in, dtype=dtype))
            self.c = nn.Parameter(torch.zeros(self.dim, dtype=dtype))
        else:
            self.mlp = _MLP(n_in + H, self.readout_width, self.dim, gen).to(dtype)
        if initial_hidden == "learned":
            self.r0 = nn.Parameter(torch.zeros(H, dtype=dtype))

    def _taus(self, bounds) -> torch.Tensor:
        """The initial time constants (float64): log-spaced over ``bounds``, per input for a filter bank."""
        if self.input_init == "filter_bank":
            return log_spaced(bounds, self.hidden_size // self.in_dim).repeat_interleave(self.in_dim)
        return log_spaced(bounds, self.hidden_size)

    def _filter_bank_inputs(self) -> torch.Tensor:
        """State k integrates input k mod n_in with time constant τ_k: ``dr_k/dt = (x̃_j − r_k)/τ_k``."""
        H, n_in = self.hidden_size, self.in_dim
        B = torch.zeros(H, n_in, dtype=torch.float64)
        B[torch.arange(H), torch.arange(H) % n_in] = 1.0
        return B

    def set_time_constants(self, bounds) -> None:
        """Leaky form: start the hidden field afresh with time constants log-spaced over ``bounds``.

        The rates become ``1/τ``, the learned time-constant factors and the offset
        return to their initial values and a filter bank's input weights to its
        integrators; the readout is left for a fit to set. Used to try each of
        :attr:`time_constant_candidates`.
        """
        if self.form != "leaky":
            raise ConfigError("form", f"is {self.form!r}; only the leaky form's time constants can be reset",
                              "give one pair of time_constants for the tanh and gated forms.")
        bounds = _init_bounds("time_constants", bounds)
        with torch.no_grad():
            self.rate.copy_(1.0 / self._taus(bounds))
            if self.coupling:
                self.A_rel.copy_(-torch.eye(self.hidden_size))
            else:
                self.log_rate.zero_()
            if self.input_init == "filter_bank":
                self.B_rel.copy_(self._filter_bank_inputs())
            self.b_rel.zero_()
        self._bounds = bounds

    @property
    def time_constants(self) -> tuple[float, float]:
        """``(τ_min, τ_max)`` the hidden field started from (leaky form: read from its rates, so a
        range chosen among candidates survives saving and loading)."""
        if self.form == "leaky":
            rate = self.rate.detach().to(torch.float64)
            return float(1.0 / rate.max()), float(1.0 / rate.min())
        return self._bounds

    # -- the contract -------------------------------------------------------------
    def hidden_field(self, x, r, u=None):
        """``dr/dt`` for the chosen form (module docstring)."""
        z = self.normalised_inputs(x, u)
        if self.form == "leaky":
            own = r @ self.A_rel.T if self.coupling else -r * torch.exp(self.log_rate)
            return (own + z @ self.B_rel.T + self.b_rel) * self.rate
        pre = torch.tanh(r @ self.W.T + z @ self.U.T + self.bias)
        if self.form == "tanh":
            return (pre - r) * torch.exp(-self.log_tau)
        rate = torch.sigmoid(r @ self.W_z.T + z @ self.U_z.T + self.b_z) * (2.0 / self._bounds[0])
        return rate * (pre - r)

    def correction(self, x, r=None, u=None):
        """The readout ``m(x, r)`` added to dx/dt (module docstring)."""
        if r is None:
            raise ConfigError(type(self).__name__, "needs its hidden state r, got None",
                              "simulate it inside a HybridField, which carries r.")
        z = self.normalised_inputs(x, u)
        if self.readout == "linear":
            y = r @ self.C.T + z @ self.D.T + self.c
        else:
            y = self.mlp(torch.cat((z, r.expand(*z.shape[:-1], r.shape[-1])), dim=-1))
        return self.scaling.outputs(y)

    @property
    def A(self) -> torch.Tensor:
        """Leaky form: the hidden state's matrix ``A = diag(λ)·A_rel`` (``−diag(λ ⊙ e^s)`` uncoupled)."""
        if not self.coupling:
            return torch.diag(-self.rate * torch.exp(self.log_rate))
        return self.rate[:, None] * self.A_rel

    @property
    def B(self) -> torch.Tensor:
        """Leaky form: the input matrix ``B = diag(λ)·B_rel``."""
        return self.rate[:, None] * self.B_rel

    @property
    def b(self) -> torch.Tensor:
        """Leaky form: the hidden field's offset ``b = λ ⊙ b_rel``."""
        return self.rate * self.b_rel

    def initial_hidden(self, batch_shape, dtype=torch.float32):
        if self.initial_hidden_mode == "learned":
            return self.r0.to(dtype).expand(*batch_shape, self.hidden_size)
        return super().initial_hidden(batch_shape, dtype)

    # -- ridge readout (linear readout only) ----------------------------------------
    @property
    def has_linear_readout(self) -> bool:
        return self.readout == "linear"

    def readout_features(self, x, r, u=None) -> torch.Tensor:
        """Features ``[r, x̃(, u), 1]`` in which the linear readout is linear."""
        z = self.normalised_inputs(x, u)
        one = torch.ones((*z.shape[:-1], 1), dtype=z.dtype, device=z.device)
        return torch.cat((r, z, one), dim=-1)

    def set_readout(self, weight: torch.Tensor) -> None:
        """Set ``C, D, c`` from ridge weights ``(H + n_in + 1, dim)`` (normalised output units)."""
        if self.readout != "linear":
            raise ConfigError("readout", "'mlp' readouts cannot be set by ridge regression",
                              "use readout='linear' with a ridge fitter, or a trajectory fit.")
        H, n = self.hidden_size, self.in_dim
        w = weight.to(self.C.dtype)
        with torch.no_grad():
            self.C.copy_(w[:H].T)
            self.D.copy_(w[H:H + n].T)
            self.c.copy_(w[H + n])

    # -- exact stepping of the leaky-linear hidden field -------------------------------
    def exact_propagators(self, dt: float):
        """Leaky form: ``(E, P1, P2) = (e^{AΔ}, Δ·φ1(AΔ), Δ·φ2(AΔ))`` for one interval Δ = ``dt``.

        With ``φ1(M) = M⁻¹(e^M − I)`` and ``φ2(M) = M⁻²(e^M − I − M)``, the hidden
        field ``dr/dt = A r + B z(t) + b`` with ``z`` linear from ``z_a`` to ``z_b``
        over the interval is solved exactly by (variation of constants)::

            r(Δ) = E r(0) + P1 (B z_a + b) + P2 B (z_b − z_a)

        All three come from one matrix exponential of the block matrix
        ``[[AΔ, I, 0], [0, 0, I], [0, 0, 0]]``, whose first block row is
        ``[e^{AΔ}, φ1(AΔ), φ2(AΔ)]`` (no inverse of ``A`` needed, which may be singular).
        Differentiable in the closure's parameters.

        References:
            C. F. Van Loan, IEEE Trans. Autom. Control 23 (1978) 395–404 (integrals of
            matrix exponentials by block exponentials); M. Hochbruck, A. Ostermann,
            Acta Numerica 19 (2010) 209–286 (φ-functions, exponential integrators).

        Raises:
            ConfigError: the closure is not of the leaky form.
        """
        if self.form != "leaky":
            raise ConfigError("form", f"is {self.form!r}; exact stepping needs the linear hidden field of form='leaky'",
                              "step the hidden field with a solver (RK4) for the tanh and gated forms.")
        H = self.hidden_size
        A = self.A
        eye = torch.eye(H, dtype=A.dtype, device=A.device)
        zero = torch.zeros(H, H, dtype=A.dtype, device=A.device)
        block = torch.cat((torch.cat((A * dt, eye, zero), 1), torch.cat((zero, zero, eye), 1),
                           torch.cat((zero, zero, zero), 1)), 0)
        top = torch.linalg.matrix_exp(block)[:H]
        return top[:, :H], dt * top[:, H:2 * H], dt * top[:, 2 * H:]

    def exact_hidden_step(self, x_a, x_b, r, dt: float, u_a=None, u_b=None, propagators=None):
        """Leaky form: the hidden state after one interval driven by ``x`` (and ``u``) linear from ``a`` to ``b``.

        Exact for the piecewise-linear input (see :meth:`exact_propagators`, whose
        result may be passed in to reuse it across intervals of the same ``dt``).
        """
        E, P1, P2 = self.exact_propagators(dt) if propagators is None else propagators
        za, zb = self.normalised_inputs(x_a, u_a), self.normalised_inputs(x_b, u_b)
        drive_a = za @ self.B.T + self.b
        return r @ E.T + drive_a @ P1.T + ((zb - za) @ self.B.T) @ P2.T

    @property
    def drives_exactly(self) -> bool:
        """Whether an observation-driven warm-up is solved exactly (the leaky form's linear hidden field)."""
        return self.form == "leaky"

    def _diagonal_propagators(self, dt: float):
        """Uncoupled leaky form: the diagonals ``(e, p1, p2)`` of :meth:`exact_propagators`, elementwise.

        With ``z = a_i Δ`` (``a_i < 0`` the diagonal of ``A``): ``e = e^z``,
        ``p1 = Δ·(e^z − 1)/z`` and ``p2 = Δ·(e^z − 1 − z)/z²``; for ``|z| < 0.1`` the
        φ-functions are summed from their Taylor series (to ``z⁶``, error below
        ``|z|⁷/9!`` relative), where the closed forms lose digits to cancellation.
        """
        z = -self.rate * torch.exp(self.log_rate) * dt
        small = z.abs() < 0.1
        zs = torch.where(small, torch.ones_like(z), z)  # keeps the closed forms finite where unused
        em1 = torch.expm1(zs)
        phi1 = torch.where(small, _taylor_phi(z, 1), em1 / zs)
        phi2 = torch.where(small, _taylor_phi(z, 2), (em1 - zs) / (zs * zs))
        return torch.exp(z), dt * phi1, dt * phi2

    def exact_warm_up(self, history: torch.Tensor, dt: float, r0: torch.Tensor | None = None,
                      forcing: torch.Tensor | None = None, return_all: bool = False) -> torch.Tensor:
        """Leaky form: the hidden state driven by observed ``history (T, *batch, dim)``, integrated exactly.

        Solves the same problem as :func:`mnemode.hybrid.warm_up` (``x_obs`` linear
        between samples, ``T − 1`` intervals of ``dt``) without a solver's
        truncation error: the input terms of every interval come from two batched
        matrix products, ``c_n = P1 (B z_n + b) + P2 B (z_{n+1} − z_n)``, and the
        linear recurrence ``r_{n+1} = E r_n + c_n`` is then either stepped or — for
        the uncoupled form, whose ``E = diag(e)`` — summed in closed form,
        ``r_N = e^N ⊙ r_0 + Σ_n e^{N−1−n} ⊙ c_n`` (a handful of tensor operations
        for the whole history, differentiable). ``forcing`` are the forcing samples
        ``(T, *batch, forcing_dim)`` on the same grid (``None``: unforced). Returns
        the final state, or all ``T`` states with ``return_all``.
        """
        z = self.normalised_inputs(history, forcing)
        bz = z @ self.B.T
        r = self.initial_hidden(history.shape[1:-1], history.dtype) if r0 is None else r0
        n = history.shape[0] - 1
        if not self.coupling:
            e, p1, p2 = self._diagonal_propagators(dt)
            c = (bz[:-1] + self.b) * p1 + (bz[1:] - bz[:-1]) * p2
            if not return_all:
                if n == 0:
                    return r
                # e^{N−1−n} as exp((N−1−n)·log e): log e = a Δ exactly, no power of a rounded e
                k = torch.arange(n - 1, -1, -1, dtype=e.dtype, device=e.device)
                weights = torch.exp(k[:, None] * torch.log(e))  # (N, H)
                flat = c.reshape(n, -1, self.hidden_size)
                total = torch.einsum("nh,nbh->bh", weights, flat).reshape(c.shape[1:])
                return r * torch.exp(n * torch.log(e)) + total
            out = [r]
            for i in range(n):
                r = torch.addcmul(c[i], r, e)
                out.append(r)
            return torch.stack(out)
        E, P1, P2 = self.exact_propagators(dt)
        c = (bz[:-1] + self.b) @ P1.T + (bz[1:] - bz[:-1]) @ P2.T
        out = [r] if return_all else None
        Et = E.T
        for i in range(n):
            r = torch.addmm(c[i], r, Et) if r.dim() == 2 else r @ Et + c[i]
            if return_all:
                out.append(r)
        return torch.stack(out) if return_all else r

    # -- the unroll's affine form ----------------------------------------------------
    def affine_rates(self):
        """``(M, v)`` with ``[m, dr/dt] = [x, r] @ M + v``, or ``None`` when the closure is not affine.

        The leaky form with a linear readout and no forcing inputs is affine in the
        state ``s = [x, r]``: the input scaling, the per-state rates and the output
        scaling fold into one ``(dim + H) × (dim + H)`` matrix and one offset, so a
        solver stage evaluates the whole closure as one matrix product. Built from
        the parameters (differentiable); valid until they change.
        """
        if self.form != "leaky" or self.readout != "linear" or self.forcing_dim:
            return None
        sc = self.scaling
        if sc.applied:
            mu, inv_sd, o_scale, o_off = sc.in_mean, 1.0 / sc.in_std, sc.out_scale, sc.out_offset
        else:
            mu, inv_sd = torch.zeros_like(sc.in_mean), torch.ones_like(sc.in_std)
            o_scale, o_off = torch.ones_like(sc.out_scale), torch.zeros_like(sc.out_offset)
        D = self.D * inv_sd                       # z = (x − μ)/s folded into the input weights
        B = self.B_rel * inv_sd * self.rate[:, None]
        own = torch.diag(-self.rate * torch.exp(self.log_rate)) if not self.coupling else self.A
        from_x = torch.cat((D.T * o_scale, B.T), 1)
        from_r = torch.cat((self.C.T * o_scale, own.T), 1)
        M = torch.cat((from_x, from_r), 0)
        v = torch.cat((o_off + o_scale * (self.c - D @ mu), self.rate * self.b_rel - B @ mu))
        return M, v

    def extra_repr(self) -> str:
        return (f"dim={self.dim}, hidden_size={self.hidden_size}, form={self.form!r}, "
                f"readout={self.readout!r}, time_constants=({self.time_constants[0]:.4g}, {self.time_constants[1]:.4g}))")
