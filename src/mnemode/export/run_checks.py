"""Run-level checks before an export: the fitted model file exists, loads as tensors and did not diverge."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Mapping

import torch

from ..errors import CheckpointError, FitDiverged

__all__ = ["check_exportable"]


def _nonfinite_tensor(obj, path="") -> str | None:
    if isinstance(obj, torch.Tensor):
        if obj.is_floating_point() and not bool(torch.isfinite(obj).all()):
            return path or "<tensor>"
        return None
    if isinstance(obj, Mapping):
        for k, v in obj.items():
            hit = _nonfinite_tensor(v, f"{path}.{k}" if path else str(k))
            if hit:
                return hit
    elif isinstance(obj, (list, tuple)):
        for i, v in enumerate(obj):
            hit = _nonfinite_tensor(v, f"{path}[{i}]")
            if hit:
                return hit
    return None


def check_exportable(model_path, diagnostics: Mapping | None = None) -> None:
    """Refuse to export a model that is missing, unreadable or came from a diverged fit.

    Args:
        model_path: the fitted model file (``RUN_DIR/models/<name>.pt``).
        diagnostics: the fit's diagnostics (``metrics.json`` ``fit.<name>``), or
            ``None`` when not recorded. A fit counts as diverged when it says so
            (``diverged: true`` or ``status: "diverged"``) or when ``train_error``
            or ``val_error`` is present but non-finite (JSON writes NaN as null).

    Raises:
        CheckpointError: the file is missing, empty or not loadable with
            ``weights_only=True``.
        FitDiverged: the diagnostics or the saved tensors show a diverged fit.
    """
    path = Path(model_path)
    if not path.is_file():
        raise CheckpointError(str(path), "fitted model file is missing",
                              "fit the model first (or resume the run) before exporting it.")
    if path.stat().st_size == 0:
        raise CheckpointError(str(path), "fitted model file is empty (truncated write)", "refit the model.")
    if diagnostics is not None:
        if diagnostics.get("diverged") is True or str(diagnostics.get("status", "")).lower() == "diverged":
            raise FitDiverged(str(path), "the fit that produced this model diverged; it will not be exported",
                              "refit with a smaller learning rate or step, or shorter windows.")
        for key in ("train_error", "val_error"):
            if key in diagnostics:
                v = diagnostics[key]
                ok = isinstance(v, (int, float)) and math.isfinite(float(v))
                if not ok:
                    raise FitDiverged(str(path), f"the fit's {key} is {v!r} (not a finite number): the fit diverged",
                                      "refit with a smaller learning rate or step, or shorter windows, "
                                      "before exporting.")
    try:
        payload = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:
        raise CheckpointError(str(path), f"cannot be read as tensors and plain data ({type(exc).__name__})",
                              "the file is corrupt or truncated; refit the model.") from None
    bad = _nonfinite_tensor(payload)
    if bad:
        raise FitDiverged(f"{path} [{bad}]", "holds non-finite values: the fit diverged",
                          "refit with a smaller learning rate or step before exporting.")
