"""The update rule: learning-rate schedule, momentum, the step limit and weight decay."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ._kernels import F32
from ._step import EpochTally

__all__ = ["DECAY_STEP", "WeightDecay", "apply_update", "limit_step", "momentum", "schedule"]

#: Weight decay is applied once the gathered factor is this far below 1 (see RBM).
DECAY_STEP = 1e-5

Gradients = tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]


def schedule(learning_rate_decay: float, epoch: int) -> float:
    """Factor on both learning rates in ``epoch``: 1 / (1 + decay · epoch)."""
    return 1.0 / (1.0 + float(learning_rate_decay) * epoch)


def momentum(model: Any, epoch: int) -> float:
    """The initial momentum before ``momentum_switch_epoch``, the final one from it on."""
    if epoch < model.momentum_switch_epoch:
        return float(model.initial_momentum)
    return float(model.final_momentum)


def limit_step(model: Any, grads: Gradients, tally: EpochTally) -> Gradients:
    """Scale one minibatch's gradients so the weight step stays below ``max_step``.

    The limit is ``max_step`` times the weights' Frobenius norm (at least that of the
    initial weights); biases and log-variances shrink with the weights' step.
    """
    grad_weights = grads[0]
    floor = model.weight_scale * math.sqrt(grad_weights.size)
    limit = float(model.max_step) * max(float(np.linalg.norm(model.weights_)), floor)
    norm = float(np.linalg.norm(grad_weights))
    if not norm > limit:  # also passes NaN on, for the guard to catch
        return grads
    tally.limited_steps += 1
    shrink = F32(limit / norm)
    grad_weights *= shrink
    grad_visible, grad_hidden, grad_log_var = grads[1:]
    return (grad_weights, grad_visible * shrink, grad_hidden * shrink,
            None if grad_log_var is None else grad_log_var * shrink)


def _momentum_step(param: np.ndarray, velocity: np.ndarray, grad: np.ndarray,
                   momentum: float) -> None:
    velocity *= F32(momentum)
    velocity += grad
    param += velocity


def apply_update(model: Any, velocity: dict[str, np.ndarray], grads: Gradients, *,
                 momentum: float, variance_rate: float) -> None:
    """Momentum step of every parameter; z is clipped to the σ bounds afterwards."""
    grad_weights, grad_visible, grad_hidden, grad_log_var = grads
    _momentum_step(model.weights_, velocity["weights"], grad_weights, momentum)
    _momentum_step(model.visible_bias_, velocity["visible_bias"], grad_visible, momentum)
    _momentum_step(model.hidden_bias_, velocity["hidden_bias"], grad_hidden, momentum)
    if grad_log_var is not None and variance_rate > 0:
        vel = velocity["log_variance"]
        _momentum_step(model._log_variance, vel, F32(variance_rate) * grad_log_var, momentum)
        low = 2.0 * math.log(model.sigma_floor)
        high = 2.0 * math.log(model.sigma_ceiling)
        clipped = (model._log_variance < low) | (model._log_variance > high)
        if clipped.any():
            np.clip(model._log_variance, low, high, out=model._log_variance)
            vel[clipped] = 0.0  # no momentum pushing against a bound
        model._sync_variance()


class WeightDecay:
    """L2 weight decay W ← (1 − η·decay) W, gathered in float64 and applied in steps.

    A single update's factor is within float32's rounding of 1, so the factors of
    successive updates are multiplied in float64 and applied together once they differ
    from 1 by :data:`DECAY_STEP`, and at the end of each epoch (:meth:`flush`).
    """

    def __init__(self) -> None:
        self.factor = 1.0

    def add(self, weights: np.ndarray, rate: float, decay: float) -> None:
        """Gather one update's shrinkage; apply it to ``weights`` once it is large enough."""
        self.factor *= 1.0 - rate * float(decay)
        if self.factor <= 1.0 - DECAY_STEP:
            self.flush(weights)

    def flush(self, weights: np.ndarray) -> None:
        """Apply what was gathered."""
        if self.factor != 1.0:
            weights *= F32(self.factor)
            self.factor = 1.0
