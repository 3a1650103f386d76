"""The one exception type every user-facing failure is raised as.

A :class:`MnemodeError` carries three parts -- the thing at fault, what was
expected, and the fix -- so the command line can print one clear message and
exit non-zero instead of a traceback.
"""

from __future__ import annotations

import re

# numpy scalars print as np.float64(1.5) under numpy >= 2; users should read 1.5
_NUMPY_REPR = re.compile(r"\bnp\.(?:float|int|uint|bool|complex)_?\d*\(([^()]*)\)")


def plain_numbers(text: str) -> str:
    """``text`` with numpy scalar reprs (``np.float64(0.5)``) shown as plain numbers (``0.5``)."""
    return _NUMPY_REPR.sub(r"\1", text)

__all__ = ["MnemodeError", "ConfigError", "DataError", "CheckpointError", "FitDiverged", "RunLocked",
           "plain_numbers"]


class MnemodeError(Exception):
    """A failure the user can act on.

    Args:
        what: the thing at fault (a file, a config key, a tensor path, ...).
        problem: what came and what was expected instead.
        fix: what the user should do about it.
    """

    exit_code = 2

    def __init__(self, what: str, problem: str, fix: str | None = None):
        self.what = what
        self.problem = problem
        self.fix = fix
        msg = f"{what}: {problem}"
        if fix:
            msg += f" Fix: {fix}"
        msg = plain_numbers(msg)
        super().__init__(msg)


class ConfigError(MnemodeError):
    """A configuration value is missing, of the wrong kind or out of range."""


class DataError(MnemodeError):
    """A trajectory file or array is unreadable, inconsistent or non-finite."""


class CheckpointError(MnemodeError):
    """A checkpoint or run directory is missing, corrupt or does not match the config."""


class FitDiverged(MnemodeError):
    """A fit produced non-finite losses or parameters."""

    exit_code = 3


class RunLocked(CheckpointError):
    """Another live process is writing into the run directory."""

    exit_code = 4
