"""Settings that make a run repeat exactly on one machine for a fixed seed.

Seeds fix every random draw, but floating-point sums still depend on how the
math library splits them: Intel MKL (torch's BLAS and LAPACK on x86) picks its
thread count at run time when the machine is loaded (``MKL_DYNAMIC``) and its
code path by the memory alignment of each array unless a reproducibility mode is
set (``MKL_CBWR``). Rounding differences of 1e-16 grow through a chaotic free run
into different invariant statistics. :func:`pin_math_library` fixes both before
torch is first imported; the user's own settings of these variables win.
"""

from __future__ import annotations

import os

__all__ = ["PINNED_ENVIRONMENT", "pin_math_library"]

PINNED_ENVIRONMENT = {
    "MKL_DYNAMIC": "FALSE",   # keep the thread count fixed under load
    "MKL_CBWR": "AUTO",       # conditional numerical reproducibility: results independent of alignment
}


def pin_math_library() -> dict[str, str]:
    """Set the variables of :data:`PINNED_ENVIRONMENT` that the user has not set; return those now in force.

    Effective only before the math library initialises (before ``import torch``).
    """
    for key, value in PINNED_ENVIRONMENT.items():
        os.environ.setdefault(key, value)
    return {key: os.environ[key] for key in PINNED_ENVIRONMENT}
