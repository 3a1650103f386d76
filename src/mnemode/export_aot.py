"""Ahead-of-time compilation of an exported program into a native package, with the plain program as fallback.

:func:`compile_program` turns a ``torch.export`` program (an ``ExportedProgram`` or
its saved ``.pt2`` file) into a package of native code built by PyTorch's inductor
(``torch._inductor.aoti_compile_and_package``). The package loads

* from Python with ``torch._inductor.aoti_load_package(path)`` (a callable taking
  the program's inputs), and
* from C++ without Python with ``torch::inductor::AOTIModelPackageLoader`` (libtorch).

Compiling needs a working C++ compiler. Where none is found, or compilation fails,
or the compiled package does not reproduce the program within tolerance, the plain
exported program is written instead (``kind = 'pt2'``, loaded with
``torch.export.load(path).module()``) and the reason recorded. Either way the result
says which kind was written, so a loader (:func:`load_compiled`) knows what to do.

Parity: the package is loaded back and called on ``example_inputs`` (and, when
every input is batched along its first axis with batch > 1, on the batch-1 slice,
because the batch axis of a simulator program is dynamic) against the exported
program's own module; the largest absolute difference must be ≤ ``tolerance``
(1e-6 by default, the float64 parity of the exported simulator).

References:
    PyTorch documentation, "AOTInductor: ahead-of-time compilation for
    torch.export-ed models" (``aoti_compile_and_package``, ``aoti_load_package``,
    ``AOTIModelPackageLoader``).
"""

from __future__ import annotations

import hashlib
import io
import os
import shutil
import time
from pathlib import Path

import torch

from .errors import ConfigError

__all__ = ["compile_program", "load_compiled", "cxx_compiler", "AOTI", "PLAIN"]

AOTI = "aoti"    # native package built by inductor
PLAIN = "pt2"    # the exported program as saved by torch.export.save

_DEFAULT_TOLERANCE = 1e-6


def cxx_compiler() -> str | None:
    """Path of the C++ compiler inductor would use, or ``None`` when there is none on this machine."""
    try:
        from torch._inductor import config

        names = config.cpp.cxx
        names = names if isinstance(names, (tuple, list)) else (names,)
    except Exception:  # inductor unavailable in this build of torch
        return None
    for name in [os.environ.get("CXX")] + [n for n in names if n]:
        if name and shutil.which(name):
            return shutil.which(name)
    for name in ("g++", "clang++", "c++"):
        if shutil.which(name):
            return shutil.which(name)
    return None


def _as_program(program):
    """An ``ExportedProgram`` from one, or from a path to a saved ``.pt2``."""
    if isinstance(program, (str, os.PathLike)):
        path = Path(program)
        if not path.is_file():
            raise ConfigError(str(path), "does not exist", "pass an exported program or the path of a saved .pt2.")
        try:
            return torch.export.load(str(path))
        except Exception as exc:
            raise ConfigError(str(path), f"is not a program saved by torch.export ({type(exc).__name__})",
                              "pass the .pt2 written by torch.export.save (e.g. an export's simulator.pt2).") \
                from None
    if not isinstance(program, torch.export.ExportedProgram):
        raise ConfigError("program", f"is a {type(program).__name__}; expected a torch.export.ExportedProgram or a "
                          "path to its .pt2", "export the module with torch.export.export first.")
    return program


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _max_diff(a, b) -> float:
    a = a if isinstance(a, (tuple, list)) else (a,)
    b = b if isinstance(b, (tuple, list)) else (b,)
    if len(a) != len(b):
        return float("inf")
    worst = 0.0
    for x, y in zip(a, b):
        if x.shape != y.shape:
            return float("inf")
        d = (x.to(torch.float64) - y.to(torch.float64)).abs()
        if d.numel():
            worst = max(worst, float(d.max()) if torch.isfinite(d).all() else float("inf"))
    return worst


def _parity_inputs(example_inputs: tuple) -> list[tuple]:
    """The examples, and their batch-1 slice when every input is batched along axis 0 with the same batch > 1."""
    sets = [example_inputs]
    if example_inputs and all(isinstance(t, torch.Tensor) and t.dim() >= 1 for t in example_inputs):
        batch = {t.shape[0] for t in example_inputs}
        if len(batch) == 1 and batch.pop() > 1:
            sets.append(tuple(t[:1].contiguous() for t in example_inputs))
    return sets


def _write_plain(ep, out: Path) -> None:
    buf = io.BytesIO()
    torch.export.save(ep, buf)
    tmp = out.with_name(out.name + ".tmp")
    tmp.write_bytes(buf.getvalue())
    os.replace(tmp, out)


def compile_program(program, out_path, example_inputs, *, tolerance: float = _DEFAULT_TOLERANCE,
                    allow_fallback: bool = True) -> dict:
    """Compile an exported program ahead of time into ``out_path``; the plain program where that is not possible.

    Args:
        program: a ``torch.export.ExportedProgram`` or the path of one saved with
            ``torch.export.save``.
        out_path: file to write (``.pt2``; an AOT package and a plain program
            both use that suffix; :func:`load_compiled` tells them apart by ``kind``).
        example_inputs: a tuple of tensors the program accepts; used for the
            parity check (and its batch-1 slice when batched).
        tolerance: largest absolute difference allowed between the package and
            the exported program on the examples.
        allow_fallback: write the plain program when the AOT package cannot be
            built or fails parity (``False``: raise instead).

    Returns:
        ``{"kind": "aoti" | "pt2", "path", "sha256", "seconds", "parity", "reason"}``:
        what was written, its SHA-256, the seconds spent (compilation included),
        the largest difference found in the parity check (``None`` for the plain
        program, which is the reference itself) and, for a fallback, why.

    Raises:
        ConfigError: ``program`` is not an exported program, ``out_path`` exists
            as a directory, or (``allow_fallback=False``) the package could not be
            built or failed parity.
    """
    t0 = time.perf_counter()
    ep = _as_program(program)
    out = Path(out_path)
    if out.is_dir():
        raise ConfigError(str(out), "is a directory", "give the path of a .pt2 file to write.")
    out.parent.mkdir(parents=True, exist_ok=True)
    example_inputs = tuple(example_inputs)
    if getattr(ep, "example_inputs", None) is None:  # mnemode's saved programs carry none (nothing pickled)
        ep.example_inputs = (example_inputs, {})

    reason, worst = None, None
    compiler = cxx_compiler()
    if compiler is None:
        reason = "no C++ compiler found (set CXX or install g++/clang++)"
    else:
        tmp = out.with_name(out.name + ".aoti.tmp.pt2")
        try:
            from torch._inductor import aoti_compile_and_package, aoti_load_package

            if tmp.exists():
                tmp.unlink()
            aoti_compile_and_package(ep, package_path=str(tmp))
            runner = aoti_load_package(str(tmp))
            reference = ep.module()
            worst = 0.0
            with torch.no_grad():
                for inputs in _parity_inputs(example_inputs):
                    worst = max(worst, _max_diff(runner(*inputs), reference(*inputs)))
            if not worst <= tolerance:
                reason = f"the compiled package differs from the program by {worst:.3g} (> {tolerance:g})"
            else:
                os.replace(tmp, out)
        except Exception as exc:  # inductor raises many kinds; every one means "no native package here"
            first = str(exc).strip().splitlines()[0][:300] if str(exc).strip() else ""
            reason = f"ahead-of-time compilation failed ({type(exc).__name__}: {first})"
        finally:
            if tmp.exists():
                tmp.unlink()
    if reason is None:
        kind = AOTI
    else:
        if not allow_fallback:
            raise ConfigError(str(out), f"could not be compiled ahead of time: {reason}",
                              "install a C++ compiler, or allow the plain .pt2 fallback.")
        _write_plain(ep, out)
        kind, worst = PLAIN, None
    return {"kind": kind, "path": str(out), "sha256": _sha256(out), "seconds": time.perf_counter() - t0,
            "parity": worst, "reason": reason}


def load_compiled(path, kind: str):
    """A callable running the program written by :func:`compile_program` (``kind`` as it returned)."""
    if kind == AOTI:
        from torch._inductor import aoti_load_package

        return aoti_load_package(str(path))
    if kind == PLAIN:
        return torch.export.load(str(path)).module()
    raise ConfigError("kind", f"is {kind!r}; expected {AOTI!r} or {PLAIN!r}", "pass the kind compile_program returned.")
