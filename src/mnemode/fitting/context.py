"""What a fitter is told about the run it is part of."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from ..solvers import RK4, Solver

__all__ = ["FitContext"]


@dataclass
class FitContext:
    """Run-level settings shared by every fitter.

    Attributes:
        solver: integrates continuous hybrid models (unrolls, warm-ups, validation).
        warm_up: observed history (time units) that drives the hidden state before
            each forecast; the same value is used in assessment.
        lyapunov_time: 1 / largest Lyapunov exponent if known, for windows given
            in Lyapunov times; ``None`` otherwise.
        writer: a ``torch.utils.tensorboard.SummaryWriter`` or ``None``.
        checkpoint_dir: where training state is written for resume, or ``None``.
        resume: continue from the checkpoint in ``checkpoint_dir`` if there is one.
        seed: seeds every random choice of the fit.
        progress: show a progress bar.
        name: the model's name in the run (tags in TensorBoard, file names).
    """

    solver: Solver = None  # type: ignore[assignment]
    warm_up: float = 5.0
    lyapunov_time: float | None = None
    writer: object | None = None
    checkpoint_dir: Path | None = None
    resume: bool = False
    seed: int = 0
    progress: bool = False
    name: str = "model"

    def __post_init__(self):
        if self.solver is None:
            self.solver = RK4(0.02)
        if self.checkpoint_dir is not None:
            self.checkpoint_dir = Path(self.checkpoint_dir)
