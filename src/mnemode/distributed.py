"""Data-parallel fitting through ``torch.distributed``: the process group and who writes.

mnemode does not launch processes itself: ``torchrun`` does, and sets ``RANK``,
``WORLD_SIZE``, ``MASTER_ADDR`` and ``MASTER_PORT`` for every process. With those set,
:func:`init_from_env` joins the process group (gloo, the CPU backend) and the trajectory
fitter shards each batch of windows across the processes, wrapping the loss in
:class:`torch.nn.parallel.DistributedDataParallel`, which averages the gradients. Every
process holds the same model, draws the same windows and validates identically; only
rank 0 writes (run directory, checkpoints, TensorBoard, logs).

Example (2 processes on one machine)::

    torchrun --standalone --nproc_per_node 2 -m mnemode fit experiment=tiny
"""

from __future__ import annotations

import os

__all__ = ["init_from_env", "world_size", "rank", "is_main", "barrier", "shared_value", "finish"]


def _dist():
    import torch.distributed as dist

    return dist if dist.is_available() else None


def init_from_env() -> bool:
    """Join the process group ``torchrun`` describes in the environment; ``False`` when not launched so."""
    if int(os.environ.get("WORLD_SIZE", "1")) <= 1:
        return False
    dist = _dist()
    if dist is None:
        from .errors import ConfigError

        raise ConfigError("WORLD_SIZE", f"is {os.environ['WORLD_SIZE']} but this torch has no torch.distributed",
                          "run in one process, or install a torch build with distributed support.")
    if not dist.is_initialized():
        dist.init_process_group(backend="gloo")
    return True


def world_size() -> int:
    """Number of processes fitting together (1 outside a process group)."""
    dist = _dist()
    return dist.get_world_size() if dist is not None and dist.is_initialized() else 1


def rank() -> int:
    """This process's rank (0 outside a process group)."""
    dist = _dist()
    return dist.get_rank() if dist is not None and dist.is_initialized() else 0


def is_main() -> bool:
    """Whether this process writes files and logs (rank 0)."""
    return rank() == 0


def barrier() -> None:
    """Wait until every process gets here (no-op outside a process group)."""
    if world_size() > 1:
        _dist().barrier()


def shared_value(value):
    """``value`` as rank 0 has it, on every process (e.g. the run directory rank 0 created)."""
    if world_size() == 1:
        return value
    box = [value]
    _dist().broadcast_object_list(box, src=0)
    return box[0]


def finish() -> None:
    """Leave the process group (after a barrier, so no process exits while others still talk)."""
    dist = _dist()
    if dist is not None and dist.is_initialized():
        dist.barrier()
        dist.destroy_process_group()
