"""Training checkpoints: tensors and plain data, written atomically, loaded with ``weights_only=True``.

A fit's checkpoint directory (``RUN_DIR/checkpoints/<name>/``) holds one file,
``state.pt``, replaced atomically (written beside it, then ``os.replace``) every
time a checkpoint is taken, so a crash or a kill leaves either the previous
complete checkpoint or the new complete one. It is a dict of plain data:

``format``, ``version``, ``step`` (completed optimiser updates), ``finished``,
``settings`` (the fitter's and the run's settings, to refuse a resume under
different ones), ``model`` (state dict), ``optimiser`` (state dict),
``generator`` (state of the fit's own ``torch.Generator``), ``torch_rng``
(global CPU generator state, restored too for safety), ``counters`` (elapsed
seconds, best score, patience, ...), ``best_model`` (state dict of the best
model so far) and ``diagnostics`` once finished.

A model is rebuilt from its config and its tensors loaded with
:func:`load_state_checked`, which names the tensor path of any mismatch.
"""

from __future__ import annotations

import os
from pathlib import Path

import torch

from ..errors import CheckpointError
from ..fileio import atomic_path

__all__ = ["CHECKPOINT_FILE", "checkpoint_path", "has_checkpoint", "save_checkpoint", "load_checkpoint",
           "checkpoint_step", "load_state_checked"]

CHECKPOINT_FILE = "state.pt"
FORMAT = "mnemode.fit_checkpoint"
VERSION = 1
_REQUIRED = ("format", "version", "step", "finished", "settings", "model")


def checkpoint_path(ckpt_dir: str | os.PathLike) -> Path:
    """The checkpoint file inside a checkpoint directory."""
    return Path(ckpt_dir) / CHECKPOINT_FILE


def has_checkpoint(ckpt_dir: str | os.PathLike | None) -> bool:
    """Whether ``ckpt_dir`` holds a checkpoint file (readable or not)."""
    return ckpt_dir is not None and checkpoint_path(ckpt_dir).exists()


def save_checkpoint(ckpt_dir: str | os.PathLike, state: dict) -> Path:
    """Write ``state`` (plain data and tensors) as the directory's checkpoint, atomically."""
    path = checkpoint_path(ckpt_dir)
    payload = {"format": FORMAT, "version": VERSION, **state}
    with atomic_path(path) as tmp:
        torch.save(payload, tmp)
    return path


def load_checkpoint(ckpt_dir: str | os.PathLike) -> dict:
    """Read and check a checkpoint written by :func:`save_checkpoint`.

    Raises:
        CheckpointError: missing, unreadable (corrupt, truncated, not tensors and
            plain data) or of another format.
    """
    path = checkpoint_path(ckpt_dir)
    if not path.exists():
        raise CheckpointError(str(path), "no checkpoint to resume from",
                              "start the fit without resume, or point to the run directory that holds it.")
    try:
        state = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:  # torch raises several types for a damaged file
        raise CheckpointError(str(path), f"cannot be read ({type(exc).__name__}: {str(exc).splitlines()[0][:200]})",
                              "the file is corrupt or truncated; delete the checkpoint directory to start "
                              "the fit again.") from None
    if not isinstance(state, dict) or state.get("format") != FORMAT:
        raise CheckpointError(str(path), "is not a mnemode fit checkpoint",
                              "point to a run directory written by mnemode, or delete the file.")
    if state.get("version") != VERSION:
        raise CheckpointError(str(path), f"has format version {state.get('version')!r}; this mnemode reads "
                              f"version {VERSION}", "resume with the mnemode version that wrote it, or refit.")
    missing = [k for k in _REQUIRED if k not in state]
    if missing:
        raise CheckpointError(str(path), f"lacks the entries {missing}",
                              "the file is damaged; delete the checkpoint directory to start the fit again.")
    return state


def checkpoint_step(ckpt_dir: str | os.PathLike | None) -> int | None:
    """The optimiser step a resumed fit continues from, or ``None`` without a checkpoint.

    Everything a fit logs for update ``k`` (0-based) goes to TensorBoard step ``k``,
    so a writer opened with ``purge_step=checkpoint_step(dir)`` hides exactly the
    events written after the checkpoint by the interrupted run.

    Raises:
        CheckpointError: the checkpoint exists but is unreadable.
    """
    if not has_checkpoint(ckpt_dir):
        return None
    return int(load_checkpoint(ckpt_dir)["step"])


def load_state_checked(module: torch.nn.Module, state_dict: dict, where: str) -> None:
    """``module.load_state_dict(state_dict)`` with a clear error naming the first mismatching tensor.

    Raises:
        CheckpointError: a tensor is missing, unexpected, of another shape, or not finite.
    """
    own = module.state_dict()
    for key in own:
        if key not in state_dict:
            raise CheckpointError(f"{where} [{key}]", "tensor is missing from the checkpoint",
                                  "the model's config changed since the checkpoint; restore it or refit.")
    for key, value in state_dict.items():
        if key not in own:
            raise CheckpointError(f"{where} [{key}]", "checkpoint tensor has no place in the model built "
                                  "from config", "the model's config changed since the checkpoint; restore it "
                                  "or refit.")
        if not isinstance(value, torch.Tensor):
            raise CheckpointError(f"{where} [{key}]", f"holds a {type(value).__name__}, not a tensor",
                                  "the file is damaged; refit.")
        if tuple(value.shape) != tuple(own[key].shape):
            raise CheckpointError(f"{where} [{key}]", f"has shape {tuple(value.shape)} but the model built from "
                                  f"config expects {tuple(own[key].shape)}",
                                  "the model's config (e.g. hidden_size) changed since the checkpoint; "
                                  "restore it or refit.")
        if value.is_floating_point() and not bool(torch.isfinite(value).all()):
            raise CheckpointError(f"{where} [{key}]", "holds non-finite values",
                                  "the checkpoint was taken from a diverged fit; refit with a lower learning rate.")
    module.load_state_dict({k: v.to(own[k].dtype) for k, v in state_dict.items()})
