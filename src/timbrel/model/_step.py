
"""One contrastive-divergence step: the gradient estimate of one minibatch (not applied).

For a set of visibles with hidden expectations h, each phase contributes ⟨(v/σ²) hᵀ⟩ to
W, ⟨(v − b)/σ²⟩ to b and ⟨h⟩ to c, data minus model.  The variances are learned through
zᵢ = log σᵢ² from the free energy F(v) = Σᵢ e^{−zᵢ} (vᵢ − bᵢ)²/2 − Σⱼ φ(xⱼ):

    ∂F/∂zᵢ = −e^{−zᵢ} [(vᵢ − bᵢ)²/2 − vᵢ Σⱼ Wᵢⱼ E[hⱼ|v]],

and because Σ_batch e^{−zᵢ} vᵢ Σⱼ Wᵢⱼ hⱼ = Σⱼ Wᵢⱼ Gᵢⱼ with G the weight gradient, the
z update needs no extra matrix product.  One minibatch of CD-1 costs five products of
size batch × n_visible × n_hidden: hidden input (data), visible mean, hidden input
(reconstruction) and the weight gradient, whose two phases are stacked into one.
Persistent CD adds one product for the monitored reconstruction.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ._kernels import F32
from ._state import TrainingState, Workspace

__all__ = ["EpochTally", "Phases", "StepPlan", "combine_phases", "contrastive_step"]


@dataclass
class EpochTally:
    """Figures one epoch gathers from its minibatches, for the guard and the history."""

    n_hidden: int
    rows: int = 0
    squared_error: float = 0.0
    total_spread: float = 0.0
    activity: float = 0.0
    first_relative_error: float | None = None
    limited_steps: int = 0
    max_input: np.ndarray = field(default_factory=lambda: np.empty(0, F32))

    def __post_init__(self) -> None:
        self.max_input = np.full(self.n_hidden, -np.inf, F32)

    def add_error(self, squared_error: float, n: int, spread: float) -> None:
        """Count one minibatch's reconstruction error against its spread."""
        self.squared_error += squared_error
        self.rows += n
        if self.first_relative_error is None:
            self.first_relative_error = squared_error / spread if spread > 0 else math.inf

    @property
    def relative_error(self) -> float:
        """Squared error over the minibatches' squared deviation from their column means."""
        return self.squared_error / self.total_spread if self.total_spread > 0 else 0.0


@dataclass(frozen=True)
class StepPlan:
    """What one CD step does besides the gradient: the same for a whole epoch."""

    rate: float
    n_steps: int
    persistent: bool = False
    sparsity: bool = False
    variance: bool = False


@dataclass
class Phases:
    """Statistics of the data (positive) and model (negative) phases of one minibatch.

    ``vis_stack`` holds the phases' visibles divided by σ², ``hid_stack`` their hidden
    expectations already multiplied by +rate/n_pos (data) and −rate/n_neg (model), plus
    any extra rank-one rows.
    """

    vis_stack: np.ndarray
    hid_stack: np.ndarray
    n_pos: int
    pos_sum: np.ndarray
    pos_sq: np.ndarray | None
    n_neg: int = 0
    neg_sum: np.ndarray | None = None
    neg_sq: np.ndarray | None = None


def combine_phases(model: Any, phases: Phases, out_weights: np.ndarray, *, rate: float,
                   variance: bool) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """Turn phase statistics into scaled gradients.

    Fills ``out_weights`` with rate·∂logL/∂W and returns rate·∂/∂b, rate·∂/∂c and the
    grouped ∂/∂z (unscaled; None unless ``variance``).
    """
    p = phases
    np.matmul(p.vis_stack.T, p.hid_stack, out=out_weights)
    grad_hidden = p.hid_stack.sum(axis=0)
    neg_mean = p.neg_sum / p.n_neg if p.n_neg and p.neg_sum is not None \
        else model.visible_bias_
    grad_visible = p.pos_sum / p.n_pos - neg_mean
    grad_visible = model._visible_units.scale(grad_visible, model._inv_var, out=grad_visible)
    grad_visible *= rate
    grad_log_var = None
    if variance and p.pos_sq is not None:
        # Σⱼ Wᵢⱼ Gᵢⱼ = rate · (⟨e^{−zᵢ} vᵢ Σⱼ Wᵢⱼ hⱼ⟩_data − ⟨…⟩_model)
        coupling = np.einsum("ij,ij->i", model.weights_, out_weights)
        spread = p.pos_sq / p.n_pos
        if p.n_neg and p.neg_sq is not None:
            spread = spread - p.neg_sq / p.n_neg
        grad_full = 0.5 * model._inv_var * spread - coupling / rate
        grad_log_var = model._group_sum(grad_full.astype(F32))
    return grad_visible.astype(F32), grad_hidden.astype(F32), grad_log_var


def _positive_phase(model: Any, ws: Workspace, v0: np.ndarray, vis_pos: np.ndarray,
                    h_pos: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Hidden input and expectation of the data; the data's column sums and squares."""
    n = v0.shape[0]
    x = ws.hidden_input[:n]
    model._visible_units.scale(v0, model._inv_var, out=vis_pos)
    np.matmul(vis_pos, model.weights_, out=x)
    x += model.hidden_bias_
    model._hidden_units.mean(x, h_pos, ws.hidden_tmp[:n])
    pos_sum = v0.sum(axis=0)
    deviation = ws.visible_tmp[:n]
    np.subtract(v0, model.visible_bias_, out=deviation)
    np.square(deviation, out=deviation)
    return x, pos_sum, deviation.sum(axis=0)


def _tally_positive(tally: EpochTally, x: np.ndarray, h_pos: np.ndarray, pos_sum: np.ndarray,
                    pos_sq: np.ndarray, bias: np.ndarray) -> float:
    """Record the data's activity and inputs; return its spread about the column means."""
    n = x.shape[0]
    np.maximum(tally.max_input, x.max(axis=0), out=tally.max_input)
    tally.activity += float(h_pos.sum(axis=0).sum(dtype=np.float64))
    spread = float(pos_sq.sum(dtype=np.float64)) - float(
        np.square(pos_sum.astype(np.float64) - n * bias).sum()) / n
    tally.total_spread += spread
    return spread


def _persistent_drive(model: Any, state: TrainingState, ws: Workspace, x: np.ndarray,
                      rng: np.random.Generator) -> np.ndarray:
    """The persistent chains, started from this minibatch's hidden samples when new."""
    n = x.shape[0]
    if state.chain is None:
        state.chain = np.empty((model.batch_size, model.n_hidden), F32)
        state.chain_needs_start = True
    if state.chain_needs_start:
        start = ws.hidden_sample[:n]
        model._hidden_units.sample(x, start, ws.hidden_tmp[:n], ws.hidden_tmp2[:n], rng)
        state.chain[:] = np.resize(start, state.chain.shape)
        state.chain_needs_start = False
    return state.chain


def _reconstruct(model: Any, h: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Mean visibles given hidden states h, into ``out``."""
    np.matmul(h, model.weights_.T, out=out)
    out += model.visible_bias_
    return model._visible_units.mean(out)


def _squared_error(v0: np.ndarray, reconstruction: np.ndarray, scratch: np.ndarray) -> float:
    np.subtract(v0, reconstruction, out=scratch)
    return float(np.vdot(scratch, scratch))


def _negative_phase(model: Any, ws: Workspace, drive: np.ndarray, chain: np.ndarray | None,
                    vis_neg: np.ndarray, n_steps: int, rng: np.random.Generator,
                    monitor: Any) -> tuple[np.ndarray, np.ndarray]:
    """Run the Gibbs chain from hidden states ``drive``; return its visibles and input.

    ``monitor(v_mean)`` sees the first reconstruction (CD only). With persistent chains
    the last hidden sample is kept in ``chain``.
    """
    n_neg = drive.shape[0]
    x_neg = ws.hidden_input[:n_neg]
    noise = ws.visible_tmp[:n_neg]
    visible, hidden = model._visible_units, model._hidden_units
    for step in range(n_steps):
        v_mean = _reconstruct(model, drive, ws.visible_mean[:n_neg])
        if step == 0 and monitor is not None:
            monitor(v_mean)
        v_neg = visible.sample(v_mean, model._sigma, rng, noise, ws.visible_scratch, vis_neg)
        visible.scale(v_neg, model._inv_var, out=vis_neg)
        np.matmul(vis_neg, model.weights_, out=x_neg)
        x_neg += model.hidden_bias_
        if step < n_steps - 1 or chain is not None:
            target = chain if (chain is not None and step == n_steps - 1) \
                else ws.hidden_sample[:n_neg]
            hidden.sample(x_neg, target, ws.hidden_tmp[:n_neg], ws.hidden_tmp2[:n_neg], rng)
            drive = target
    return v_neg, x_neg


def _sparsity_row(model: Any, state: TrainingState, h_pos: np.ndarray, vis_pos: np.ndarray,
                  vis_row: np.ndarray, hid_row: np.ndarray, rate: float) -> None:
    """Rank-one row mean(v/σ²) ⊗ −cost·(q − p): reaches W, c and z through the product.

    The penalty's derivative with respect to each hidden input is taken as (q − p)
    (Hinton 2010, sec. 11), with q the running mean activation.
    """
    batch_activity = h_pos.mean(axis=0)
    estimate = state.sparsity_estimate
    if estimate is None:
        estimate = batch_activity
    else:
        decay = model.sparsity_decay
        estimate = decay * estimate + (1 - decay) * batch_activity
    state.sparsity_estimate = estimate.astype(F32)
    vis_row[...] = vis_pos.mean(axis=0)
    hid_row[...] = -rate * model.sparsity_cost * (
        state.sparsity_estimate - model.sparsity_target)


def contrastive_step(model: Any, state: TrainingState, v0: np.ndarray, plan: StepPlan,
                     tally: EpochTally | None
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
    """One CD-k / PCD-k gradient estimate on the minibatch ``v0`` (not applied).

    Returns rate-scaled ascent directions for W (a workspace buffer), b and c, and the
    unscaled grouped direction for z (None unless ``plan.variance``).
    """
    rng = state.rng
    n = v0.shape[0]
    n_neg = model.batch_size if plan.persistent else n
    n_stack = n + n_neg + (1 if plan.sparsity else 0)
    ws = state.buffers(max(n, n_neg), n_stack, model.n_features_in_, model.n_hidden)
    vis_stack, hid_stack = ws.vis_stack[:n_stack], ws.hid_stack[:n_stack]
    vis_pos, vis_neg = vis_stack[:n], vis_stack[n:n + n_neg]
    h_pos, h_neg = hid_stack[:n], hid_stack[n:n + n_neg]

    x, pos_sum, pos_sq = _positive_phase(model, ws, v0, vis_pos, h_pos)
    spread = 0.0 if tally is None else _tally_positive(tally, x, h_pos, pos_sum, pos_sq,
                                                       model.visible_bias_)
    deviation = ws.visible_tmp[:n]
    monitor: Callable[[np.ndarray], None] | None = None
    if tally is not None:
        def monitor(v_mean: np.ndarray) -> None:
            tally.add_error(_squared_error(v0, v_mean, deviation), n, spread)

    chain = None
    if plan.persistent:
        chain = drive = _persistent_drive(model, state, ws, x, rng)
        if monitor is not None:
            # PCD's chains do not reconstruct the data: one extra product for the monitor
            monitor(_reconstruct(model, h_pos, ws.visible_mean[:n]))
            monitor = None
    else:
        drive = ws.hidden_sample[:n]
        model._hidden_units.sample(x, drive, ws.hidden_tmp[:n], ws.hidden_tmp2[:n], rng)

    v_neg, x_neg = _negative_phase(model, ws, drive, chain, vis_neg, plan.n_steps, rng, monitor)
    model._hidden_units.mean(x_neg, h_neg, ws.hidden_tmp[:n_neg])
    neg_sum = v_neg.sum(axis=0)
    neg_sq = None
    if plan.variance:
        neg_deviation = ws.visible_tmp[:n_neg]
        np.subtract(v_neg, model.visible_bias_, out=neg_deviation)
        np.square(neg_deviation, out=neg_deviation)
        neg_sq = neg_deviation.sum(axis=0)
    if plan.sparsity:
        _sparsity_row(model, state, h_pos, vis_pos, vis_stack[n_stack - 1],
                      hid_stack[n_stack - 1], plan.rate)

    h_pos *= F32(plan.rate / n)
    h_neg *= F32(-plan.rate / n_neg)
    phases = Phases(vis_stack, hid_stack, n_pos=n, pos_sum=pos_sum, pos_sq=pos_sq,
                    n_neg=n_neg, neg_sum=neg_sum, neg_sq=neg_sq)
    grad_visible, grad_hidden, grad_log_var = combine_phases(
        model, phases, ws.grad_weights, rate=plan.rate, variance=plan.variance)
    return ws.grad_weights, grad_visible, grad_hidden, grad_log_var
