"""Property-based tests (hypothesis) of the exported simulator's input validation.

For any input the simulator either returns a finite trajectory of the documented shape
or raises a MnemodeError (never another exception, never NaN output), and it accepts an
input exactly when the rule written out here independently says it should: shapes,
dtypes, non-finite values, batch sizes, step counts, history and forcing lengths.
"""

from __future__ import annotations

import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from mnemode.errors import MnemodeError
from mnemode.export import export_simulator
from mnemode.hybrid import HybridField
from mnemode.simulator import load_simulator
from mnemode.solvers import RK4

sys.path.insert(0, str(Path(__file__).resolve().parent / "forced_slab"))
from slab_physics import NominalSlab  # noqa: E402
from test_forced_export import CoreClosure  # noqa: E402

torch.set_num_threads(1)

W, D, U, HID = 3, 2, 1, 1
SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@pytest.fixture(scope="module")
def sim(tmp_path_factory):
    out = tmp_path_factory.mktemp("inputs")
    model = HybridField(NominalSlab(), CoreClosure(), 2).double()
    export_simulator(model, out, dt=0.1, solver=RK4(0.05), state_names=["T1", "T2"], state_units=["K", "K"],
                     warm_up_steps=W, envelope={"T1": [0.0, 9.0], "T2": [0.0, 6.0]}, forcing_names=["load"],
                     forcing_envelope={"load": [0.2, 1.8]}, parity_steps=3, check_float32=False)
    return load_simulator(out, on_envelope="ignore")


def arrays(shape_st, finite_only=False):
    """Arrays of the given shapes as a float64 tensor, float32 tensor, int tensor, numpy array or list."""
    def build(shape, kind, fill, nan_at):
        a = np.full(shape, fill, dtype=np.float64)
        if nan_at is not None and a.size and not finite_only:
            a.flat[nan_at % a.size] = np.nan
        if kind == "f64":
            return a, torch.as_tensor(a)
        if kind == "f32":
            return a, torch.as_tensor(a, dtype=torch.float32)
        if kind == "int":
            return a, torch.as_tensor(np.nan_to_num(a), dtype=torch.int64)
        if kind == "numpy":
            return a, a.astype(np.float32)
        return a, a.tolist()
    return st.builds(build, shape_st, st.sampled_from(["f64", "f32", "int", "numpy", "list"]),
                     st.floats(0.5, 1.5), st.one_of(st.none(), st.integers(0, 50)))


shapes = st.lists(st.integers(0, 4), min_size=0, max_size=3).map(tuple)


def _ok_tensor(raw: np.ndarray, value) -> bool:
    if isinstance(value, torch.Tensor) and value.dtype != torch.float64:
        return False
    return bool(np.isfinite(raw).all())


def _outcome(fn):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            return fn(), None
        except MnemodeError as exc:
            return None, exc


@SETTINGS
@given(x0=arrays(shapes), n=st.integers(-2, 4), r_batch=st.integers(1, 3))
def test_x0_shapes_dtypes_values_and_steps(sim, x0, n, r_batch):
    raw, value = x0
    r0 = np.ones((r_batch, HID))
    batch = 1 if raw.ndim == 1 else (raw.shape[0] if raw.ndim == 2 else -1)
    want_ok = (_ok_tensor(raw, value) and raw.ndim in (1, 2) and raw.shape[-1] == D and batch >= 1
               and n >= 0 and r_batch in (1, batch))
    u = np.ones((max(n, 0) + 1, U))
    out, err = _outcome(lambda: sim.rollout(value, n, r0=r0, forcing=u))
    assert (err is None) == want_ok, err
    if out is not None:
        assert out.shape == (n + 1, batch, D) and bool(torch.isfinite(out).all())


@SETTINGS
@given(n=st.integers(0, 4), length=st.integers(0, 7), fbatch=st.integers(0, 4), width=st.integers(0, 2),
       two_d=st.booleans(), batch=st.integers(1, 3))
def test_forcing_lengths_batches_and_widths(sim, n, length, fbatch, width, two_d, batch):
    x0 = np.ones((batch, D))
    u = np.ones((length, width)) if two_d else np.ones((length, fbatch, width))
    want_ok = length == n + 1 and width == U and (two_d or fbatch in (1, batch))
    out, err = _outcome(lambda: sim.rollout(x0, n, r0=[1.0], forcing=u))
    assert (err is None) == want_ok, err
    if out is not None:
        assert out.shape == (n + 1, batch, D)


@SETTINGS
@given(t_len=st.integers(0, 6), batch=st.integers(0, 3), width=st.integers(1, 3), n=st.integers(0, 3),
       extra=st.integers(-1, 1), nan=st.booleans())
def test_history_and_its_forcing(sim, t_len, batch, width, n, extra, nan):
    hist = np.full((t_len, batch, width), 2.0)
    if nan and hist.size:
        hist.flat[0] = np.nan
    u = np.ones((max(t_len + n + extra, 0), U))
    want_ok = t_len >= 2 and batch >= 1 and width == D and not (nan and hist.size) and extra == 0
    out, err = _outcome(lambda: sim.rollout(None, n, history=hist, forcing=u))
    assert (err is None) == want_ok, err
    if out is not None:
        assert out.shape == (n + 1, batch, D)
        np.testing.assert_array_equal(out[0].numpy(), hist[-1])


@SETTINGS
@given(n=st.one_of(st.integers(-3, 3), st.floats(-1, 3), st.booleans(), st.none(), st.text(max_size=2)))
def test_step_counts(sim, n):
    want_ok = isinstance(n, int) and not isinstance(n, bool) and n >= 0
    out, err = _outcome(lambda: sim.rollout([1.0, 1.0], n, r0=[1.0], forcing=np.ones((4, U))))
    if want_ok:
        # a valid count with a forcing of the wrong length is still refused (only n = 3 fits)
        assert (err is None) == (n == 3), err
    else:
        assert err is not None
