"""Reference models every assessment compares against: physics alone, the oracle, the truth floor.

* **physics only** — the nominal field ``f0`` with no closure: what the modeller
  already had.
* **oracle** — the truth system itself, started from the true full state
  (observed components from the test data, hidden ones from the generator's
  record) with a small perturbation: the practical upper limit of forecast skill,
  since even perfect equations lose a chaotic trajectory from a slightly wrong
  start. Only for generated data (the truth and its hidden components known).
* **floor** — an independent truth run scored against the test data with the
  same statistics as the models: what "as good as possible" looks like for the
  invariant-measure KL and the ACF error given finite samples.

Also here: the largest Lyapunov exponent used to express validity in Lyapunov
times (the system's published/measured value, else estimated on the truth).
"""

from __future__ import annotations

import numpy as np
import torch

from ..data import TrajectorySet, generate
from ..hybrid import HybridField
from ..lyapunov import largest_lyapunov_exponent
from ..solvers import RK4
from ..systems.base import System
from ..forecasting import RunOutcome, Starts

__all__ = ["physics_only_model", "resolve_lyapunov", "oracle_noise_level", "oracle_unavailable",
           "oracle_forecasts", "truth_run"]


def physics_only_model(system: System) -> HybridField:
    """The nominal model alone, ``dx/dt = f0(x)``, as a hybrid field with no closure."""
    return HybridField(system.nominal, None, system.dim)


def resolve_lyapunov(system: System, *, duration: float = 100.0, step: float = 0.005, n_runs: int = 8,
                     seed: int = 0) -> tuple[float | None, str | None]:
    """The truth's largest Lyapunov exponent and where it came from.

    Returns ``(λ, "system")`` when the system states it, ``(λ, "estimated")``
    from :func:`mnemode.lyapunov.largest_lyapunov_exponent` on the truth
    (``n_runs`` random starts, the system's spin-up as transient, ``duration``
    averaging time, RK4 with ``step``) when it has a truth generator, else
    ``(None, None)``. A non-positive estimate (no chaos) gives ``(None, "not chaotic")``.
    """
    if system.lyapunov_exponent is not None:
        return float(system.lyapunov_exponent), "system"
    if system.truth is None:
        return None, None
    gen = torch.Generator().manual_seed(int(seed))
    z0 = system.random_truth_states(int(n_runs), gen, torch.float64)
    lam = largest_lyapunov_exponent(system.truth.to(torch.float64), z0, duration=float(duration),
                                    solver=RK4(min(step, 0.01)), transient=max(float(system.spin_up), 10.0),
                                    seed=int(seed))
    if not np.isfinite(lam) or lam <= 0:
        return None, "not chaotic"
    return float(lam), "estimated"


def oracle_noise_level(test: TrajectorySet, oracle_noise: float | None) -> float:
    """The oracle's start perturbation, relative to each component's std.

    The given level, else the data's observation-noise level (``test.meta['noise']``),
    else 1e-4 for clean data.
    """
    if oracle_noise is not None:
        return float(oracle_noise)
    noise = float(test.meta.get("noise", 0.0) or 0.0)
    return noise if noise > 0 else 1e-4


def oracle_unavailable(system: System, test: TrajectorySet) -> str | None:
    """Why the oracle cannot run on this test set, or ``None`` when it can."""
    if system.truth is None:
        return "no truth system is known (data from a file): the oracle baseline is skipped"
    if test.forcing is not None:
        return "the data are forced and the truth generator takes no forcing: the oracle baseline is skipped"
    n_hidden = system.truth_dim - len(system.observed_index)
    if n_hidden > 0:
        if test.hidden is None:
            return ("the test set does not carry the truth's hidden components (loaded from a file?): "
                    "the oracle baseline is skipped")
        if test.hidden.shape[-1] != n_hidden:
            return (f"the test set carries {test.hidden.shape[-1]} hidden components but the truth has "
                    f"{n_hidden}: the oracle baseline is skipped")
    return None


def oracle_forecasts(system: System, test: TrajectorySet, starts: Starts, n_steps: int, level: float,
                     step: float = 0.005, seed: int = 0) -> RunOutcome:
    """Forecasts of the truth system from perturbed true full states at ``starts``.

    The full state ``z`` puts ``test.states`` at ``system.observed_index`` and
    ``test.hidden`` elsewhere. Each component ``i`` is perturbed by
    ``level · std_i · ξ`` (``ξ`` standard normal, ``std_i`` over the test set) —
    except observed components of noisy data (``test.meta['noise'] > 0``), which
    already carry an error of that size. Integrated with RK4 (step
    ``min(dt, step)``) in float64.
    """
    dt = test.dt
    obs = list(system.observed_index)
    hid = [i for i in range(system.truth_dim) if i not in obs]
    b, s = starts.trajectory, starts.index
    z = np.zeros((len(starts), system.truth_dim))
    z[:, obs] = test.states[s, b]
    std = np.zeros(system.truth_dim)
    if hid:
        z[:, hid] = test.hidden[s, b]
        std[hid] = test.hidden.reshape(-1, len(hid)).std(axis=0)
    if not float(test.meta.get("noise", 0.0) or 0.0) > 0:
        std[obs] = test.states.reshape(-1, test.dim).std(axis=0)
    rng = np.random.default_rng(int(seed) + 104729)
    z = z + level * std * rng.standard_normal(z.shape)
    field = system.truth.to(torch.float64)
    with torch.no_grad():
        traj = RK4(min(dt, step)).unroll(field, torch.as_tensor(z), 0.0, dt, n_steps)
        x = system.observe(traj).numpy()
    return RunOutcome(np.asarray(x, dtype=np.float64))


def truth_run(system: System, n_runs: int, duration: float, dt: float, step: float = 0.005,
              seed: int = 0) -> np.ndarray:
    """Observed states ``(T, n_runs, D)`` of independent truth runs (fresh random starts, spun up).

    Uses :func:`mnemode.data.generate` with no noise and RK4 of step ``min(dt, step)``.
    """
    ts = generate(system, n_trajectories=int(n_runs), duration=float(duration), dt=float(dt),
                  solver=RK4(min(dt, step)), seed=int(seed), noise=0.0)
    return ts.states
