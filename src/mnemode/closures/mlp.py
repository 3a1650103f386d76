"""A multilayer perceptron as a memoryless closure ``m(x[, u])``.

On the closure's normalised inputs ``x̃``::

    h_0 = x̃,   h_{l+1} = act(W_l h_l + c_l)  (l < depth),   ỹ = W_out h_depth + c_out

with ``depth`` hidden layers of ``width`` units. Regression fitting minimises the
mean squared error of the normalised targets with Adam on minibatches; the output
bias starts at the mean normalised target (≈ 0 when the fitter's output offset is
the target mean, which then carries the offset), and with validation pairs the
weights of the best validation epoch are kept (early stopping after ``patience``
epochs without improvement). The same network can later be fine-tuned by
trajectory fitting (its weights are ordinary parameters).

Reference: D. P. Kingma & J. Ba, "Adam: a method for stochastic optimization",
ICLR (2015).
"""

from __future__ import annotations

import math
import time

import torch
from torch import nn

from ..errors import ConfigError, FitDiverged
from .base import Closure, RegressionFittable, Scaling

__all__ = ["MLPClosure", "ACTIVATIONS"]

ACTIVATIONS = {"tanh": nn.Tanh, "gelu": nn.GELU, "relu": nn.ReLU, "silu": nn.SiLU,
               "softplus": nn.Softplus, "elu": nn.ELU}


class MLPClosure(Closure, RegressionFittable):
    """Memoryless closure given by a fully connected network.

    Args:
        dim: number of output components.
        in_dim: number of inputs (``dim`` plus forcing inputs, or a neighbourhood
            size inside a ring closure); ``dim`` when ``None``.
        width: units per hidden layer.
        depth: number of hidden layers (0 gives an affine map).
        activation: one of ``ACTIVATIONS`` (tanh, gelu, relu, silu, softplus, elu).
        lr: Adam learning rate.
        epochs: passes over the training pairs.
        batch_size: pairs per Adam step.
        weight_decay: Adam's L2 weight decay.
        patience: epochs without validation improvement before stopping (with validation pairs).
        seed: initial weights (and the minibatch order when the fit gets no generator).

    Raises:
        ConfigError: an unknown activation or non-positive sizes or rates.
    """

    def __init__(self, dim: int, forcing_dim: int = 0, width: int = 32, depth: int = 2,
                 activation: str = "tanh", lr: float = 3e-3, epochs: int = 200, batch_size: int = 256,
                 weight_decay: float = 0.0, patience: int = 20, seed: int = 0, n_inputs: int | None = None,
                 dtype=None):
        super().__init__(dim, forcing_dim, n_inputs, dtype)
        if activation not in ACTIVATIONS:
            raise ConfigError("closure.activation", f"{activation!r} is not one of {sorted(ACTIVATIONS)}",
                              "pick one of the listed names.")
        for name, v in (("dim", self.dim), ("in_dim", self.in_dim), ("width", width), ("epochs", epochs),
                        ("batch_size", batch_size), ("patience", patience)):
            if int(v) < 1:
                raise ConfigError(f"closure.{name}", f"is {v}; expected ≥ 1", "give a positive integer.")
        if int(depth) < 0 or not float(lr) > 0 or float(weight_decay) < 0:
            raise ConfigError("closure", f"depth={depth}, lr={lr}, weight_decay={weight_decay}; expected "
                              "depth ≥ 0, lr > 0, weight_decay ≥ 0", "fix the closure config.")
        self.width, self.depth, self.activation = int(width), int(depth), str(activation)
        self.lr, self.epochs, self.batch_size = float(lr), int(epochs), int(batch_size)
        self.weight_decay, self.patience, self.seed = float(weight_decay), int(patience), int(seed)
        self.scaling = Scaling(self.in_dim, self.dim, self.dtype)
        layers: list[nn.Module] = []
        width_in = self.in_dim
        for _ in range(self.depth):
            layers += [nn.Linear(width_in, self.width, dtype=self.dtype), ACTIVATIONS[self.activation]()]
            width_in = self.width
        layers.append(nn.Linear(width_in, self.dim, dtype=self.dtype))
        self.net = nn.Sequential(*layers)
        self._initialise(torch.Generator().manual_seed(self.seed))

    def _initialise(self, gen: torch.Generator) -> None:
        """Seeded uniform(±1/sqrt(fan_in)) weights (PyTorch's default bound); zero output layer bias."""
        with torch.no_grad():
            for layer in self.net:
                if isinstance(layer, nn.Linear):
                    bound = 1.0 / math.sqrt(layer.in_features)
                    layer.weight.uniform_(-bound, bound, generator=gen)
                    layer.bias.uniform_(-bound, bound, generator=gen)
            self.net[-1].bias.zero_()

    def correction(self, x: torch.Tensor, r: torch.Tensor | None = None,
                   u: torch.Tensor | None = None) -> torch.Tensor:
        """``m(x[, u]) = out_offset + out_scale · net(x̃)``, ``(..., dim)``."""
        return self.scaling.outputs(self.net(self.scaling.inputs(self._join(x, u))))

    def fit_regression(self, inputs: torch.Tensor, targets: torch.Tensor, generator: torch.Generator | None = None,
                       val_inputs: torch.Tensor | None = None, val_targets: torch.Tensor | None = None,
                       progress: bool = False, log=None) -> dict:
        """Train on ``inputs (N, in_dim) → targets (N, dim)`` (physical units) by Adam.

        Inputs and targets are normalised through ``self.scaling`` (set it first).
        Training runs in the closure's dtype. ``log(tag, value, step)``, if given,
        receives the epoch losses.

        Returns:
            ``{'epochs_run', 'best_epoch', 'final_train_loss', 'best_val_loss', 'seconds'}``
            (plain floats; normalised mean squared errors, NaN without validation).

        Raises:
            DataError: shapes that do not match ``in_dim``/``dim``.
            FitDiverged: a non-finite loss.
        """
        dtype = self.net[-1].weight.dtype
        xt, yt = (t.to(dtype) for t in self.normalised_regression_data(inputs, targets, "MLP regression data"))
        has_val = val_inputs is not None and val_targets is not None
        if has_val:
            vx, vy = (t.to(dtype) for t in self.normalised_regression_data(val_inputs, val_targets,
                                                                           "MLP validation data"))
        # Initial weights follow the closure's own seed; the minibatch order the fit's generator.
        self._initialise(torch.Generator().manual_seed(self.seed))
        gen = generator if generator is not None else torch.Generator().manual_seed(self.seed + 1)
        with torch.no_grad():
            self.net[-1].bias.copy_(yt.mean(0))
        opt = torch.optim.Adam(self.net.parameters(), lr=self.lr, weight_decay=self.weight_decay)
        n = xt.shape[0]
        epochs = range(self.epochs)
        bar = None
        if progress:
            from tqdm.auto import tqdm
            epochs = bar = tqdm(epochs, desc="MLP closure", unit="epoch", leave=False)
        best_val, best_epoch, best_state, since_best = math.inf, -1, None, 0
        train_loss = math.nan
        run = 0
        t0 = time.perf_counter()
        for epoch in epochs:
            run = epoch + 1
            perm = torch.randperm(n, generator=gen)
            total = 0.0
            for start in range(0, n, self.batch_size):
                idx = perm[start:start + self.batch_size]
                opt.zero_grad()
                loss = ((self.net(xt[idx]) - yt[idx]) ** 2).mean()
                loss.backward()
                opt.step()
                total += float(loss.detach()) * idx.numel()
            train_loss = total / n
            if not math.isfinite(train_loss):
                raise FitDiverged("MLPClosure", f"training loss became {train_loss} at epoch {epoch}",
                                  "lower lr or check the targets for extreme values.")
            if log is not None:
                log("mlp/train_loss", train_loss, epoch)
            if has_val:
                with torch.no_grad():
                    val_loss = float(((self.net(vx) - vy) ** 2).mean())
                if log is not None:
                    log("mlp/val_loss", val_loss, epoch)
                if val_loss < best_val:
                    best_val, best_epoch, since_best = val_loss, epoch, 0
                    best_state = {k: v.detach().clone() for k, v in self.net.state_dict().items()}
                else:
                    since_best += 1
                    if since_best >= self.patience:
                        break
            if bar is not None:
                bar.set_postfix(loss=f"{train_loss:.3g}")
        if bar is not None:
            bar.close()
        if best_state is not None:
            self.net.load_state_dict(best_state)
        return {"epochs_run": float(run), "best_epoch": float(best_epoch if has_val else run - 1),
                "final_train_loss": float(train_loss), "best_val_loss": float(best_val if has_val else math.nan),
                "seconds": time.perf_counter() - t0}

    def extra_repr(self) -> str:
        return f"dim={self.dim}, in_dim={self.in_dim}"
