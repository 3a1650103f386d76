"""Optional ONNX copies of the programs (``torch.onnx.export``, dynamo path) and their check."""

from __future__ import annotations

import tempfile
import warnings
from pathlib import Path

import numpy as np
import torch

from ..errors import ConfigError

__all__ = ["require_onnx", "onnx_bytes", "onnx_check"]


def require_onnx() -> None:
    """Refuse an ONNX export early when the ONNX extra is not installed."""
    missing = []
    for pkg in ("onnx", "onnxscript"):
        try:
            __import__(pkg)
        except ImportError:
            missing.append(pkg)
    if missing:
        raise ConfigError("onnx export", f"needs the package(s) {', '.join(missing)}, which are not installed",
                          'pip install "mnemode[onnx]" (or export without onnx).')


def onnx_bytes(module, examples: tuple, input_names, output_name: str, what: str) -> bytes:
    """The ONNX bytes of ``module`` with a dynamic batch on every non-scalar input."""
    batch = torch.export.Dim("batch", min=1)
    shapes = tuple(None if e.ndim == 0 else {0: batch} for e in examples)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "program.onnx"
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                torch.onnx.export(module, examples, str(path), dynamo=True, dynamic_shapes=shapes,
                                  input_names=list(input_names), output_names=[output_name],
                                  external_data=False, verbose=False)
        except Exception as exc:
            first = str(exc).strip().splitlines()[0][:300] if str(exc).strip() else type(exc).__name__
            raise ConfigError(what, f"cannot be exported to ONNX ({type(exc).__name__}: {first})",
                              "export without onnx; the .pt2 program is complete on its own.") from None
        return path.read_bytes()


def onnx_check(data: bytes, program, examples: tuple) -> float | None:
    """Max |onnxruntime − .pt2| on one call with ``examples`` (None without onnxruntime)."""
    try:
        import onnxruntime as ort
    except ImportError:
        return None
    sess = ort.InferenceSession(data, providers=["CPUExecutionProvider"])
    feeds = {i.name: e.numpy() for i, e in zip(sess.get_inputs(), examples)}
    got = sess.run(None, feeds)[0]
    with torch.no_grad():
        want = program(*examples).numpy()
    return float(np.abs(got - want).max())
