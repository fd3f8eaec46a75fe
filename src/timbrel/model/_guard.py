"""The guarded epoch: snapshot, one CD update per minibatch, a check, roll-back on divergence."""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Callable, Iterable
from typing import Any

import numpy as np

from .._errors import DivergenceError, ParameterError
from ._step import EpochTally, StepPlan, contrastive_step
from ._update import WeightDecay, apply_update, limit_step, momentum, schedule

__all__ = ["DivergenceWarning", "guarded_epoch"]

Batches = Callable[[], Iterable[Any]]


class DivergenceWarning(RuntimeWarning):
    """An epoch diverged and was rolled back with halved learning rates."""


def _snapshot(model: Any) -> dict[str, Any]:
    return {"weights": model.weights_.copy(), "visible_bias": model.visible_bias_.copy(),
            "hidden_bias": model.hidden_bias_.copy(), "log_variance": model._log_variance.copy(),
            "state": model._state.snapshot()}


def _restore(model: Any, snap: dict[str, Any]) -> None:
    np.copyto(model.weights_, snap["weights"])
    np.copyto(model.visible_bias_, snap["visible_bias"])
    np.copyto(model.hidden_bias_, snap["hidden_bias"])
    model._log_variance = snap["log_variance"].copy()
    model._sync_variance()
    model._state.restore(snap["state"])


def _plan(model: Any, scale: float) -> StepPlan:
    return StepPlan(
        rate=model.learning_rate * model.learning_rate_scale_ * scale,
        n_steps=model.n_steps, persistent=model.persistent,
        sparsity=model.sparsity_target is not None and model.sparsity_cost > 0,
        variance=(model._visible_units.has_variance and model.learn_variance
                  and model.variance_learning_rate > 0))


def _run_batches(model: Any, make_batches: Batches, plan: StepPlan, tally: EpochTally,
                 momentum: float, variance_rate: float) -> str | None:
    """One CD update per minibatch; the reason it stopped early, or None."""
    decay = WeightDecay()
    for index, batch in enumerate(make_batches()):
        v0 = model._check_input(batch, name=f"minibatch {index}")
        grads = contrastive_step(model, model._state, v0, plan, tally)
        if not math.isfinite(tally.squared_error):
            return f"non-finite reconstruction error at minibatch {index}"
        if model.max_step > 0:
            grads = limit_step(model, grads, tally)
        apply_update(model, model._state.velocity, grads, momentum=momentum,
                     variance_rate=variance_rate)
        decay.add(model.weights_, plan.rate, model.weight_decay)
    decay.flush(model.weights_)
    if tally.rows == 0:
        raise ParameterError("make_batches() yielded no minibatches")
    return None


def _run_epoch(model: Any, make_batches: Batches, epoch: int) -> tuple[EpochTally, str | None]:
    scale = schedule(model.learning_rate_decay, epoch)
    plan = _plan(model, scale)
    variance_rate = model.variance_learning_rate * model.learning_rate_scale_ * scale
    tally = EpochTally(model.n_hidden)
    # Overflow while diverging is expected and handled by the guard (rollback), so
    # numpy's floating-point warnings would only repeat it less clearly.
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        failure = _run_batches(model, make_batches, plan, tally, momentum(model, epoch),
                               variance_rate)
    return tally, failure


def _epoch_failure(model: Any, tally: EpochTally) -> str | None:
    if not model._parameters_finite():
        return "a parameter became NaN or infinite"
    relative = tally.relative_error
    if not math.isfinite(relative):
        return "non-finite reconstruction error"
    # The first minibatch is measured before any update of this epoch, so data that are
    # harder from the start (a new recording, a level shift) raise the reference rather
    # than passing for divergence.
    candidates = [r for r in (model._state.reference_error, tally.first_relative_error)
                  if r is not None]
    reference = max(candidates) if candidates else None
    if reference is not None and relative > 1.0 and \
            relative > model.divergence_factor * reference:
        return (f"relative reconstruction error jumped to {relative:.3g} "
                f"(reference {reference:.3g}, limit ×{model.divergence_factor:g})")
    return None


def _epoch_stats(model: Any, tally: EpochTally, epoch: int, reasons: list[str],
                 began: float) -> dict[str, Any]:
    return {
        "epoch": epoch + 1,
        "recon_error": tally.squared_error / (tally.rows * model.n_features_in_),
        "relative_error": tally.relative_error,
        "mean_hidden_activity": tally.activity / (tally.rows * model.n_hidden),
        "dead_fraction": float(np.mean(tally.max_input <= 0)),
        "sigma_min": float(model._sigma.min()),
        "sigma_max": float(model._sigma.max()),
        "rollbacks": len(reasons),
        "rollback_reasons": reasons,
        "limited_steps": tally.limited_steps,
        "learning_rate_scale": float(model.learning_rate_scale_),
        "learning_rate": float(model.learning_rate * model.learning_rate_scale_
                               * schedule(model.learning_rate_decay, epoch)),
        "momentum": momentum(model, epoch),
        "n_rows": tally.rows,
        "seconds": time.perf_counter() - began,
    }


def guarded_epoch(model: Any, make_batches: Batches, epoch: int) -> dict[str, Any]:
    """Train one epoch of a fitted, checked model; see :meth:`RBM.fit_epoch`."""
    began = time.perf_counter()
    snapshot = _snapshot(model)
    reasons: list[str] = []
    while True:
        try:
            tally, failure = _run_epoch(model, make_batches, epoch)
        except BaseException:
            _restore(model, snapshot)
            raise
        if failure is None:
            failure = _epoch_failure(model, tally)
        if failure is None:
            break
        _restore(model, snapshot)
        if len(reasons) >= model.max_rollbacks:
            raise DivergenceError(
                f"training diverged in epoch {epoch} ({failure}) on "
                f"{len(reasons) + 1} attempt(s) in a row, the last at learning-rate "
                f"scale {model.learning_rate_scale_:g}; the model keeps its parameters "
                f"from before the epoch. Lower learning_rate or variance_learning_rate, "
                f"or raise sigma_floor."
            )
        reasons.append(failure)
        model.learning_rate_scale_ *= 0.5
        warnings.warn(
            f"RBM epoch {epoch} diverged ({failure}); rolled back to the parameters "
            f"before the epoch and halved the learning rates (scale now "
            f"{model.learning_rate_scale_:g}); retrying",
            DivergenceWarning,
            stacklevel=3,
        )
    stats = _epoch_stats(model, tally, epoch, reasons, began)
    model._state.reference_error = tally.relative_error
    return stats
