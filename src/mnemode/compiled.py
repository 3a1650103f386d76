"""Compiled one-step maps for the fixed-step solvers, with a clean eager fallback.

A fixed-step unroll at a small batch spends most of its time dispatching many small
tensor operations from Python (an RK4 step of the demo's hybrid field is a few
hundred of them, forward and backward). :class:`CompiledStep` hands the whole
step — every stage of the solver and every evaluation of the field inside it — to
``torch.compile``, which fuses them into a few native kernels, forward and
backward, while the Python loop over steps stays where it is (so output times,
sub-steps, warm-ups and truncated backpropagation behave exactly as in the eager
solver).

Times and shapes must not force recompilation: the step time ``t`` and the
observation times of a warm-up change every interval and the batch changes
between fitting and validation. The step time is passed to the graph as a 0-d
float64 tensor (so the field receives ``t`` as a tensor on this path), and
shapes and the remaining Python floats are compiled as symbols
(``dynamic=True``). One graph is built per kind of field (model, model driven by
a forcing, warm-up drive), per gradient mode (and whether the state entering it
carries a gradient) and per dtype.

Fallback: when ``torch.compile`` is unavailable (no C++ compiler for inductor,
an unsupported Python) or a graph fails to compile or run, the step is
recomputed eagerly; if the eager step succeeds the failure was the compiler's,
a :class:`CompileFallbackWarning` says so once, and the step stays eager from then
on. An error of the field itself is raised by the eager step as usual.

The compiled step computes the same arithmetic as the eager one but in fused
kernels whose rounding may differ in the last bits (gradients agree to ~1e-12 in
float64 on the demo). A fit is reproducible run to run with the same setting; a
resumed fit is bit-for-bit equal to an uninterrupted one only with the same
setting, so the compiled path is opt-in (``solver.compile=true``).

References:
    PyTorch documentation, ``torch.compile`` (TorchDynamo graph capture,
    TorchInductor code generation, ``dynamic`` shapes).
"""

from __future__ import annotations

import os
import types
import warnings
from typing import Callable

import torch

__all__ = ["CompiledStep", "CompileFallbackWarning", "compile_disabled"]

# Setting this variable to 1 turns every compiled step into the eager one (a kill switch for a machine where
# compilation misbehaves, without editing configs).
DISABLE_ENV = "MNEMODE_NO_COMPILE"


class CompileFallbackWarning(RuntimeWarning):
    """A compiled solver step could not be compiled or run and fell back to the eager step."""


def compile_disabled() -> bool:
    """Whether compiled steps are switched off for this process (``MNEMODE_NO_COMPILE=1``)."""
    return os.environ.get(DISABLE_ENV, "").strip() not in ("", "0")


def _own_code(fn: Callable) -> Callable:
    """``fn`` rebuilt on a copy of its code object.

    The compiler keeps its graphs, and its limit on how many it builds, per code
    object: every solver of a class shares ``one_step``'s code, so without a copy
    the solvers of one process (fit, validation, truth, simulator) would share a
    budget of a handful of graphs and the later ones would silently run eagerly.
    """
    bound_to = getattr(fn, "__self__", None)
    func = getattr(fn, "__func__", fn)
    if not isinstance(func, types.FunctionType):
        return fn
    clone = types.FunctionType(func.__code__.replace(), func.__globals__, func.__name__, func.__defaults__,
                               func.__closure__)
    clone.__kwdefaults__ = func.__kwdefaults__
    return clone if bound_to is None else types.MethodType(clone, bound_to)


class CompiledStep:
    """A solver's one-step map ``(f, t, y, h) ↦ y_next`` run through ``torch.compile``, eager on failure.

    Args:
        step: the eager one-step map (e.g. ``RK4.one_step`` of a solver instance).
        what: a name for messages (e.g. ``'RK4(step=0.02)'``).

    Attributes:
        failed: ``None`` while compiled; the reason once it has fallen back to eager.
    """

    def __init__(self, step: Callable, what: str):
        self.step, self.what = step, what
        self.failed: str | None = None
        self._compiled = None

    def _build(self):
        if self._compiled is None:
            self._compiled = torch.compile(_own_code(self.step), dynamic=True, fullgraph=False)
        return self._compiled

    def __call__(self, f, t, y: torch.Tensor, h: float) -> torch.Tensor:
        if self.failed is not None or compile_disabled():
            return self.step(f, t, y, h)
        try:
            # t enters the graph as a 0-d float64 tensor: a Python float that the field does not use (an
            # autonomous field) is specialised by the compiler, which then recompiles at every new t
            return self._build()(f, torch.as_tensor(t, dtype=torch.float64), y, h)
        except Exception as exc:  # the compiler raises many kinds; decide below whose error it was
            out = self.step(f, t, y, h)  # an error of the field itself is raised here, as in the eager solver
            first = str(exc).strip().splitlines()[0][:200] if str(exc).strip() else ""
            self.failed = f"{type(exc).__name__}: {first}"
            warnings.warn(f"{self.what}: the compiled step failed ({self.failed}); continuing with the eager step",
                          CompileFallbackWarning, stacklevel=3)
            return out

    def __getstate__(self):
        # compiled graphs are process-local; a copy (deepcopy, pickle) recompiles on first use
        state = dict(self.__dict__)
        state["_compiled"] = None
        return state
