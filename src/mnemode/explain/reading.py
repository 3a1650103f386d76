"""Read a fitted model's learned correction: one call gathers every view of it.

:func:`read_correction` takes a loaded hybrid model and its data and returns a
:class:`CorrectionReading`: the correction against its regression targets, its
partial dependence on each input, a sparse polynomial surrogate, the memory's time
constants and the share of the correction each input's history carries (closures
with memory), and, for a flow-map correction, what it is and the vector-field term
equivalent to it. :func:`mnemode.explain.write_reading` turns it into a report and
figures.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import torch

from ..errors import ConfigError, DataError
from ..hybrid import HybridFlowMap
from .against_targets import TargetComparison, compare_with_targets, nominal_field
from .memory import HistoryShare, TimeConstants, history_share, time_constants
from .partial_dependence import PartialDependence, partial_dependence
from .surrogate import PolynomialLibrary, SparseFit, fit_sparse
from .trace import Trace, trace_correction
from .vector_field import DISCRETE_STATEMENT, VectorFieldEquivalent, equivalent_vector_field, midpoint_surrogate

__all__ = ["CorrectionReading", "read_correction", "CONTINUOUS_STATEMENT"]

CONTINUOUS_STATEMENT = (
    "This correction is a term of the vector field: dx/dt = f0(x) + m(x{memory}). Its values are rates "
    "(state units per time unit) and can be read directly as the missing part of dx/dt.")


@dataclass
class CorrectionReading:
    """Everything :func:`read_correction` found about one learned correction.

    Attributes:
        model_name: name of the model in its run.
        form: ``'continuous'`` (vector-field term) or ``'discrete'`` (flow-map correction).
        closure: the closure's class name.
        hidden_size: size of its hidden state (0: memoryless).
        dt: the data's sampling interval.
        state_names, state_units, time_unit: labels of the observed variables.
        input_names: the closure's inputs (observed, then forcing).
        statement: what the correction is, in words.
        comparisons: the correction against derivative and flow-map targets.
        partial: partial-dependence curves.
        surrogate: sparse polynomial surrogate of the learned correction.
        time_constants: memory time constants (``None`` when memoryless).
        history: share of the correction each input's history carries (``None`` when memoryless).
        equivalent: vector-field term equivalent to a flow-map correction, or ``None``.
        midpoint: surrogate of the continuous (midpoint) flow-map targets of the learned step, or ``None``.
        notes: what was not computed and why.
        settings: the settings used.
    """

    model_name: str
    form: str
    closure: str
    hidden_size: int
    dt: float
    state_names: list[str]
    state_units: list[str]
    time_unit: str
    input_names: list[str]
    statement: str
    comparisons: list[TargetComparison]
    partial: PartialDependence
    surrogate: SparseFit
    time_constants: TimeConstants | None = None
    history: HistoryShare | None = None
    equivalent: VectorFieldEquivalent | None = None
    midpoint: SparseFit | None = None
    notes: list[str] = field(default_factory=list)
    settings: dict = field(default_factory=dict)
    trace: Trace | None = field(default=None, repr=False)
    surrogate_points: tuple | None = field(default=None, repr=False)  # (variables, learned values)

    def to_dict(self) -> dict:
        """Plain data (for ``reading.json``)."""
        return {
            "model": self.model_name, "form": self.form, "closure": self.closure,
            "hidden_size": self.hidden_size, "dt": self.dt, "state_names": self.state_names,
            "state_units": self.state_units, "time_unit": self.time_unit, "statement": self.statement,
            "against_targets": [c.to_dict(self.state_names) for c in self.comparisons],
            "partial_dependence_spread": self.partial.to_dict(self.state_names),
            "surrogate": self.surrogate.to_dict(),
            "time_constants": None if self.time_constants is None else self.time_constants.to_dict(),
            "history": None if self.history is None else self.history.to_dict(),
            "vector_field_equivalent": None if self.equivalent is None else self.equivalent.to_dict(),
            "midpoint_flow_map_surrogate": None if self.midpoint is None else self.midpoint.to_dict(),
            "notes": self.notes, "settings": self.settings,
        }


_SENSITIVITY_BUDGET = 25_000_000  # float64 numbers (200 MB) in the flow sensitivities of the equivalent fit


def _rms(a, axis=0):
    return np.sqrt(np.mean(np.asarray(a, dtype=np.float64) ** 2, axis=axis))


def _physics_size(model, x: torch.Tensor, u: torch.Tensor | None) -> np.ndarray | None:
    """RMS of the nominal physics per component at the points ``x``, or ``None`` without physics."""
    f0 = nominal_field(model)
    if f0 is None:
        return None
    with torch.no_grad():
        values = f0(0.0, x) if u is None else f0(0.0, x, u)
    return _rms(values.to(torch.float64).numpy())


def read_correction(model, test, train, *, model_name: str = "model", state_names=None, state_units=None,
                    time_unit: str = "", solver=None, warm_up: float = 0.0, degree: int = 2,
                    threshold: float = 0.01, noise_floor: float = 0.01, scheme: str = "central4",
                    n_points: int = 2000, n_grid: int = 41, seed: int = 0) -> CorrectionReading:
    """Gather every view of ``model``'s learned correction on ``test`` data.

    Args:
        model: a fitted :class:`~mnemode.hybrid.HybridField` or
            :class:`~mnemode.hybrid.HybridFlowMap` with a closure.
        test: trajectories the correction is read on (a :class:`~mnemode.data.TrajectorySet`).
        train: the training trajectories (their range is the partial-dependence
            envelope; their means freeze histories).
        model_name: a label.
        state_names, state_units, time_unit: labels (default: from ``test``).
        solver: integrates a continuous hidden field (default RK4, step Δt/2).
        warm_up: time units at the start of each test trajectory used only to drive
            the hidden state (memory closures).
        degree: highest polynomial degree of the surrogate in the observed inputs
            (hidden states enter linearly).
        threshold: STLSQ relative threshold: a term whose contribution is below this
            fraction of its component's size is dropped.
        noise_floor: a component whose correction is below this fraction of the
            nominal physics' size in that component is treated as noise.
        scheme: finite-difference stencil of the derivative targets.
        n_points: test samples used for the surrogate and the vector-field equivalent.
        n_grid: grid values per partial-dependence curve.
        seed: chooses sample subsets.

    Returns:
        a :class:`CorrectionReading` (write it with :func:`mnemode.explain.write_reading`).

    Raises:
        ConfigError: a model without a closure, a negative degree or threshold.
        DataError: test trajectories no longer than the warm-up (closures with memory).
    """
    closure = model.closure
    if closure is None:
        raise ConfigError("model", "has no closure, so there is no learned correction to read",
                          "pass a hybrid model with a fitted closure.")
    if int(degree) < 0 or not float(threshold) >= 0 or not float(noise_floor) >= 0:
        raise ConfigError("surrogate settings", f"degree={degree}, threshold={threshold}, "
                          f"noise_floor={noise_floor}; expected a degree ≥ 0 and fractions ≥ 0",
                          "e.g. degree 2, threshold 0.01.")
    discrete = isinstance(model, HybridFlowMap)
    memory = bool(closure.hidden_size)
    dt = float(test.dt)
    names = list(state_names or test.names)
    units = list(state_units or test.units)
    forcing_names = list(test.forcing_names or ())
    input_names = names + (forcing_names if closure.forcing_dim else [])
    notes: list[str] = []

    trace = trace_correction(model, test, solver)
    times = np.asarray(test.times, dtype=np.float64)
    keep_t = (times - times[0] >= warm_up) if memory else np.ones(times.size, dtype=bool)
    if not keep_t.any():
        raise DataError("test trajectories", f"last {times[-1] - times[0]} time units, no longer than the "
                        f"warm-up ({warm_up}), so no sample has a driven hidden state",
                        "use longer test trajectories or a shorter warm_up.")
    comparisons = compare_with_targets(model, test, trace, warm_up, scheme)

    envelope = train.envelope()
    if closure.forcing_dim and train.forcing is not None:
        flat = train.forcing.reshape(-1, train.forcing.shape[-1])
        envelope.update({n: [float(flat[:, i].min()), float(flat[:, i].max())] for i, n in enumerate(forcing_names)})
    partial = partial_dependence(closure, trace, envelope, input_names, n_grid=n_grid, keep=keep_t, seed=seed)

    # sample points for the surrogate: test samples after the warm-up
    T, B, D = trace.x.shape
    rows = np.nonzero(np.repeat(keep_t, B))[0]
    rng = np.random.default_rng(seed)
    if rows.size > n_points:
        rows = np.sort(rng.choice(rows, n_points, replace=False))
    idx = torch.as_tensor(rows)
    x = trace.x.reshape(-1, D)[idx]
    u = None if trace.u is None or not closure.forcing_dim else trace.u.reshape(-1, trace.u.shape[-1])[idx]
    m = trace.m.reshape(-1, D)[idx].to(torch.float64).numpy()
    size = _physics_size(model, x, None if trace.u is None else trace.u.reshape(-1, trace.u.shape[-1])[idx])
    floor = None if size is None else noise_floor * size
    variables = [x.to(torch.float64).numpy()]
    var_names = list(input_names)
    if u is not None:
        variables.append(u.to(torch.float64).numpy())
    hidden_names: list[str] = []
    if memory:
        hidden_names = [f"r{k + 1}" for k in range(closure.hidden_size)]
        variables.append(trace.r.reshape(-1, closure.hidden_size)[idx].to(torch.float64).numpy())
    library = PolynomialLibrary(var_names + hidden_names, degree, linear_only=hidden_names, linear_degree=1)
    surrogate = fit_sparse(library, np.concatenate(variables, axis=1), m, threshold=threshold,
                           component_names=names, floor=floor)

    tc = history = None
    if memory:
        tc = time_constants(closure, trace, dt, keep=keep_t)
        primary = comparisons[0] if not discrete else comparisons[1]
        means = [float(v) for v in train.states.reshape(-1, train.dim).mean(0)]
        if closure.forcing_dim and train.forcing is not None:
            means += [float(v) for v in train.forcing.reshape(-1, train.forcing.shape[-1]).mean(0)]
        history = history_share(model, trace, dt, means, input_names, primary.rows, primary.target,
                                primary.kind, keep_t, solver)

    equivalent = midpoint = None
    if discrete:
        statement = DISCRETE_STATEMENT
        if model.flow_map is None:
            notes.append("No vector-field equivalent: the model has no physics (Ψ0 is the identity), so the "
                         "correction is the whole step per Δt of a data-only model.")
        elif memory:
            notes.append("No vector-field equivalent: the correction carries a discrete hidden state, which has "
                         "no continuous-time counterpart in this version.")
        elif closure.forcing_dim:
            notes.append("No vector-field equivalent: forced flow-map corrections are not matched in this version.")
        else:
            lib_x = PolynomialLibrary(names, degree)
            x64 = x.to(torch.float64)
            # the sensitivities hold N·D·(terms·D) numbers: keep them under _SENSITIVITY_BUDGET
            per_point = D * len(lib_x) * D
            n_fit = min(x64.shape[0], _SENSITIVITY_BUDGET // per_point)
            if n_fit < 2 * len(lib_x):
                notes.append(f"No vector-field equivalent: {len(lib_x)} candidate terms in each of {D} components "
                             "need more flow sensitivities than this version integrates (a 200 MB budget); "
                             "a lower --degree may fit.")
            else:
                stride = -(-x64.shape[0] // n_fit)
                equivalent = equivalent_vector_field(model, x64[::stride], lib_x, threshold=threshold, floor=floor,
                                                     component_names=names)
            midpoint = midpoint_surrogate(model, x64, lib_x, threshold=threshold, floor=floor,
                                          component_names=names)
    else:
        statement = CONTINUOUS_STATEMENT.format(memory=", r" if memory else "")
        if memory:
            statement += (" The hidden state r is a filtered memory of the inputs' past, driven by the observed "
                          "history during the warm-up.")
    settings = {"degree": degree, "threshold": threshold, "noise_floor": noise_floor, "scheme": scheme,
                "warm_up": warm_up, "n_points": int(rows.size), "n_grid": n_grid, "seed": seed}
    return CorrectionReading(
        model_name=model_name, form="discrete" if discrete else "continuous", closure=type(closure).__name__,
        hidden_size=int(closure.hidden_size), dt=dt, state_names=names, state_units=units, time_unit=time_unit,
        input_names=input_names, statement=statement, comparisons=comparisons, partial=partial,
        surrogate=surrogate, time_constants=tc, history=history, equivalent=equivalent, midpoint=midpoint,
        notes=notes, settings=settings, trace=trace,
        surrogate_points=(np.concatenate(variables, axis=1), m))
