# ruff: noqa: RUF002  (docstrings and messages use math notation: σ, −, ×)
"""Restricted Boltzmann machine for real-valued frames, trained by contrastive divergence.

The estimator :class:`RBM` models visible vectors (e.g. standardised log-mel context
windows) with Gaussian visible units, one learned variance per mel band, and noisy
rectified hidden units.  Binary visibles and binary or stepped hiddens are available
for stacking and for checks against reference formulas.

Everything is numpy in float32.  The module imports nothing from timbrel but its
error types, so the rest of the package (front end, trainer, exporter) can build on
it freely.

Energy
------
With σᵢ the *standard deviation* of visible unit i (Cho, Ilin & Raiko 2011)::

    E(v, h) = Σᵢ (vᵢ − bᵢ)² / (2σᵢ²) − Σⱼ cⱼ hⱼ − Σᵢⱼ (vᵢ / σᵢ²) Wᵢⱼ hⱼ

so the hidden input is ``xⱼ = cⱼ + Σᵢ Wᵢⱼ vᵢ / σᵢ²`` and ``p(vᵢ | h) = N(bᵢ + Σⱼ Wᵢⱼ hⱼ, σᵢ²)``.
Binary visibles use ``E(v, h) = −b·v − c·h − vᵀWh``.

References
----------
Nair, V. & Hinton, G. E. (2010). Rectified linear units improve restricted Boltzmann
machines. ICML.
Cho, K., Ilin, A. & Raiko, T. (2011). Improved learning of Gaussian-Bernoulli
restricted Boltzmann machines. ICANN.
Hinton, G. E. (2010). A practical guide to training restricted Boltzmann machines.
UTML TR 2010-003.
"""

from __future__ import annotations

import hashlib
import inspect
import json
import math
import numbers
import os
import re
import tempfile
import time
import warnings
import zipfile
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from timbrel._atomic import os_reason
from timbrel._errors import (
    DivergenceError,
    ModelFileError,
    NotFittedError,
    OutputError,
    ParameterError,
)

__all__ = [
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "RBM",
    "RELU_LINEAR_THRESHOLD",
    "RELU_WINDOW_COPIES",
    "DivergenceWarning",
    "ModelFile",
    "read_model_file",
]

FORMAT_NAME = "timbrel-rbm"
"""Name stored in every model file's header; files with another name are refused."""

FORMAT_VERSION = 1
"""Model-file format version written by this module; newer versions are refused."""

RELU_LINEAR_THRESHOLD = 25.0
"""Copies whose input exceeds this are summed in closed form (softplus(t) = t + 1.4e-11)."""

RELU_WINDOW_COPIES = 40
"""Copies evaluated explicitly below the linear part of the rectified free energy.

The neglected copies all have input below ``RELU_LINEAR_THRESHOLD + 1 - RELU_WINDOW_COPIES
= -14``, minus the one-copy margin, i.e. below -15, so their sum is at most
``e^-15 / (1 - e^-1) ≈ 4.9e-7`` per hidden unit, below the 1e-6 target.
"""

_F32 = np.float32
_TRANSFORM_CHUNK = 8192
#: Weight decay is applied once the gathered factor is this far below 1 (see RBM).
_DECAY_STEP = 1e-5
_HIDDEN_KINDS = ("relu", "binary", "stepped")
_VISIBLE_KINDS = ("gaussian", "binary")
_TIE_KINDS = ("band", "unit")
_PARAM_ARRAYS = ("weights", "visible_bias", "hidden_bias", "log_variance", "sigma")
_USER_NAME = re.compile(r"^[A-Za-z0-9_.-]{1,64}$")
_MAX_EXACT_HIDDEN = 24


class DivergenceWarning(RuntimeWarning):
    """An epoch diverged and was rolled back with halved learning rates."""


# --------------------------------------------------------------------------------------
# elementwise kernels (in place, float32, no temporaries beyond the given buffers)
# --------------------------------------------------------------------------------------


def _sigmoid(x: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Logistic function into ``out`` (may alias ``x``)."""
    np.negative(x, out=out)
    # exp(-x) overflows to inf for x < -88; 1 / (1 + inf) = 0 is the right limit.
    with np.errstate(over="ignore"):
        np.exp(out, out=out)
    out += 1.0
    np.reciprocal(out, out=out)
    return out


def _uniform_fill(rng: np.random.Generator, out: np.ndarray) -> np.ndarray:
    """Fill the float32 ``out`` with uniforms on [0, 1) in steps of 2⁻²⁴.

    The very numbers ``rng.random(out=out, dtype=np.float32)`` gives, leaving the
    generator in the same state, in about 60 % of its time: numpy's float32 path calls
    the bit generator once per number (the top 24 bits of a 32-bit draw, each 64-bit
    word giving its low half, then its high half, which the generator keeps for the
    next 32-bit draw); this asks for the raw words in bulk and converts them with two
    passes. The kept half is read from and returned to the generator's state.
    """
    if not out.flags.c_contiguous:  # reshape would copy, and the draws would be lost
        out[...] = _uniform_fill(rng, np.empty(out.shape, _F32))
        return out
    flat = out.reshape(-1)
    n = flat.size
    if n == 0:
        return out
    bits = rng.bit_generator
    state = bits.state
    kept = int(state.get("has_uint32", 0))
    if kept:  # the half the generator kept from its last word comes first
        flat[0] = _F32(int(state["uinteger"]) >> 8) * _F32(2.0 ** -24)
    fresh = n - kept
    halves = bits.random_raw((fresh + 1) // 2).view(np.uint32)
    if kept or fresh % 2:  # a half was consumed from, or is left to, the generator
        state = dict(bits.state)
        state["has_uint32"] = fresh % 2
        if fresh % 2:
            state["uinteger"] = int(halves[fresh])
        bits.state = state
    used = halves[:fresh]
    np.right_shift(used, 8, out=used)
    rest = flat[kept:]
    rest[...] = used  # integers below 2²⁴ are exact in float32
    rest *= _F32(2.0 ** -24)
    return out


def _standard_normal(rng: np.random.Generator, out: np.ndarray, scratch: np.ndarray, *,
                     variance: float = 1.0) -> np.ndarray:
    """Fill ``out`` with N(0, variance) float32 draws (Box & Muller 1958) from float32
    uniforms (the variance costs nothing: it scales the radius's square).

    numpy's float32 ziggurat costs about 9 ns per draw on the machines we measured,
    the transform about 2.5 ns, which matters because every minibatch draws one
    normal per visible and per rectified hidden unit.  With 24-bit uniforms the radius
    is at most sqrt(2·24·ln 2) ≈ 5.77, so the tails beyond 5.77σ (probability 8e-9)
    are cut.  ``scratch`` needs at least ``out.size // 2`` elements; ``out`` must be
    C-contiguous.
    """
    flat = out.reshape(-1)
    half = flat.size // 2
    _uniform_fill(rng, flat)
    first, second = flat[:half], flat[half:2 * half]
    radius = scratch.reshape(-1)[:half]
    np.subtract(_F32(1.0), first, out=radius)  # in (0, 1], so the log is finite
    np.log(radius, out=radius)
    radius *= _F32(-2.0 * variance)
    np.sqrt(radius, out=radius)
    second *= _F32(2.0 * np.pi)
    np.cos(second, out=first)
    np.sin(second, out=second)
    first *= radius
    second *= radius
    if flat.size % 2:
        flat[-1] = rng.standard_normal(dtype=_F32) * _F32(math.sqrt(variance))
    return out


def _relu(x: np.ndarray, out: np.ndarray) -> np.ndarray:
    """max(x, 0) into ``out`` (may alias ``x``).

    numpy's maximum against the scalar 0 runs a loop about 2x slower than against a
    row of zeros broadcast over the rows (45 against 24 us per 128 x 1024 float32 pass;
    making the row takes under 1 us; a full array of zeros takes 16 us but costs as
    much cache as ``x``).
    """
    return np.maximum(x, np.zeros(x.shape[-1], x.dtype), out=out)


def _softplus(x: np.ndarray, out: np.ndarray, tmp: np.ndarray) -> np.ndarray:
    """log(1 + e^x) = max(x, 0) + log1p(e^-|x|), stable for any x."""
    np.abs(x, out=tmp)
    np.negative(tmp, out=tmp)
    np.exp(tmp, out=tmp)
    np.log1p(tmp, out=tmp)
    np.maximum(x, 0.0, out=out)
    out += tmp
    return out


def _relu_partial_sum(x: np.ndarray, *, derivative: bool) -> np.ndarray:
    """Σₙ₌₁^∞ softplus(x − n + 0.5) (or its derivative Σₙ sigmoid(x − n + 0.5)) per element.

    Copies with input above ``RELU_LINEAR_THRESHOLD`` are summed in closed form, the
    next ``RELU_WINDOW_COPIES`` explicitly; the rest is below 1e-6 (see the constant).
    """
    shifted = x.astype(_F32, copy=True)
    shifted += 0.5
    n_linear = np.floor(shifted - RELU_LINEAR_THRESHOLD)
    np.maximum(n_linear, 0.0, out=n_linear)
    if derivative:
        # each linear copy contributes sigmoid(t) = 1 to within 1.4e-11
        total = n_linear.copy()
    else:
        # Σₙ₌₁ᵏ (x + 0.5 − n) = k (x + 0.5) − k (k + 1) / 2
        total = n_linear * shifted - 0.5 * n_linear * (n_linear + 1.0)
    base = shifted - n_linear
    t = np.empty_like(base)
    term = np.empty_like(base)
    tmp = np.empty_like(base)
    for copy_index in range(1, RELU_WINDOW_COPIES + 1):
        np.subtract(base, copy_index, out=t)
        if derivative:
            _sigmoid(t, term)
        else:
            _softplus(t, term, tmp)
        total += term
    return total


# --------------------------------------------------------------------------------------
# small helpers
# --------------------------------------------------------------------------------------


def _is_int(value: Any) -> bool:
    return isinstance(value, numbers.Integral) and not isinstance(value, (bool, np.bool_))


def _is_real(value: Any) -> bool:
    return isinstance(value, numbers.Real) and not isinstance(value, (bool, np.bool_))


def _as_float32_matrix(values: Any, *, name: str) -> np.ndarray:
    """Validate and convert to a C-contiguous float32 (n, d) array; the input is not modified."""
    if np.iscomplexobj(values):
        raise ParameterError(f"{name} must be real-valued; got a complex array")
    try:
        with np.errstate(over="ignore"):  # overflow to inf is reported below
            array = np.asarray(values, dtype=_F32)
    except (TypeError, ValueError) as exc:
        raise ParameterError(f"{name} must be convertible to float32: {exc}") from None
    if array.ndim != 2:
        raise ParameterError(
            f"{name} must be 2-D of shape (n_samples, n_features); got shape {array.shape}"
        )
    if array.shape[0] == 0 or array.shape[1] == 0:
        raise ParameterError(f"{name} must hold at least one row and one column; got shape "
                             f"{array.shape}")
    finite = np.isfinite(array)
    if not finite.all():
        n_bad = int(array.size - np.count_nonzero(finite))
        raise ParameterError(
            f"{name} holds {n_bad} NaN or infinite value(s) (after conversion to float32, "
            f"which overflows beyond ±3.4e38)"
        )
    return np.ascontiguousarray(array)


def _json_safe(value: Any) -> Any:
    """Python scalars for numpy ones; non-finite floats become None (JSON has no NaN)."""
    if isinstance(value, dict):
        return {str(k): _json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(v) for v in value]
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, (np.floating, float)):
        value = float(value)
        return value if math.isfinite(value) else None
    if isinstance(value, np.ndarray):
        return _json_safe(value.tolist())
    return value


def _canonical_json(value: Any) -> str:
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=False,
                      allow_nan=False)


def _content_digest(arrays: list[tuple[str, np.ndarray]], header: Mapping[str, Any]) -> str:
    """SHA-256 over the arrays (name, dtype, shape, bytes; in the given order) and the header."""
    digest = hashlib.sha256()
    for name, array in arrays:
        digest.update(name.encode("utf-8") + b"\0")
        digest.update(array.dtype.str.encode("ascii") + b"\0")
        digest.update(json.dumps(list(array.shape)).encode("ascii") + b"\0")
        digest.update(np.ascontiguousarray(array).tobytes())
    digest.update(_canonical_json(dict(header)).encode("utf-8"))
    return digest.hexdigest()


class _Workspace:
    """Preallocated float32 buffers for one minibatch size (reused across minibatches)."""

    def __init__(self, n_rows: int, n_stack: int, n_visible: int, n_hidden: int) -> None:
        self.n_rows = n_rows
        self.n_stack = n_stack
        self.vis_stack = np.empty((n_stack, n_visible), _F32)
        self.hid_stack = np.empty((n_stack, n_hidden), _F32)
        self.hidden_input = np.empty((n_rows, n_hidden), _F32)
        self.hidden_sample = np.empty((n_rows, n_hidden), _F32)
        self.hidden_tmp = np.empty((n_rows, n_hidden), _F32)
        self.hidden_tmp2 = np.empty((n_rows, n_hidden), _F32)
        self.visible_mean = np.empty((n_rows, n_visible), _F32)
        self.visible_tmp = np.empty((n_rows, n_visible), _F32)
        self.visible_scratch = np.empty((n_rows * n_visible + 1) // 2, _F32)
        self.grad_weights = np.empty((n_visible, n_hidden), _F32)


@dataclass
class _EpochTally:
    n_hidden: int
    rows: int = 0
    squared_error: float = 0.0
    total_spread: float = 0.0
    activity: float = 0.0
    first_relative_error: float | None = None
    limited_steps: int = 0
    max_input: np.ndarray = field(default_factory=lambda: np.empty(0, _F32))

    def __post_init__(self) -> None:
        self.max_input = np.full(self.n_hidden, -np.inf, _F32)


@dataclass(frozen=True)
class ModelFile:
    """The contents of a model file, as returned by :func:`read_model_file`.

    Attributes
    ----------
    rbm : RBM
        The fitted estimator (its ``metadata_`` holds ``metadata``).
    metadata : dict
        The JSON metadata saved with the model (front-end config, training config, ...).
    arrays : dict of str to ndarray
        The extra arrays saved with the model (e.g. per-band mean and standard deviation).
    checksum : str
        Hex SHA-256 of the file's content, verified on reading.
    """

    rbm: RBM
    metadata: dict[str, Any]
    arrays: dict[str, np.ndarray]
    checksum: str


# --------------------------------------------------------------------------------------
# the estimator
# --------------------------------------------------------------------------------------


class RBM:
    r"""Restricted Boltzmann machine with Gaussian (or binary) visibles, trained by CD-k.

    ``__init__`` only stores the hyperparameters; they are validated by ``fit``,
    ``partial_fit``, ``fit_epoch`` and ``initialize``.  The estimator models the
    visible vectors exactly as given (no standardisation inside; that is the
    pipeline's job), so ``sigma_floor``, ``sigma_ceiling`` and ``initial_sigma`` are in
    the units of X.  float32 in, float32 out; float64 input is converted.

    Parameters
    ----------
    n_hidden : int, default=1024
        Number of hidden units, ≥ 1.  Many hidden units help (Nair & Hinton 2010;
        Hinton 2010, sec. 12, section number from memory): on the spoken-word probe of
        ``bench/bench_probe.py`` 256, 512 and 1024 relu units scored 0.969, 0.990 and
        0.995 on unseen voices, one run each (runs of one setting spread over about
        ±2 points from seed to seed).
    hidden : {"relu", "binary", "stepped"}, default="relu"
        Hidden unit kind.  ``"binary"``: logistic, mean sigmoid(x).  ``"stepped"``:
        ``n_copies`` binary copies sharing weights and bias with offsets −0.5, −1.5, …;
        mean Σₙ sigmoid(x − n + 0.5), sample the sum of the copies' Bernoulli draws.
        ``"relu"``: noisy rectified unit (Nair & Hinton 2010), sample
        max(0, x + ε) with ε ~ N(0, sigmoid(x)) (sigmoid(x) is the *variance*), mean
        max(0, x); its free energy is the stepped one with infinitely many copies,
        evaluated to within 1e-6 per unit (see ``RELU_WINDOW_COPIES``).
    n_copies : int, default=10
        Copies per stepped hidden unit, ≥ 1 (used only by ``hidden="stepped"``).
    visible : {"gaussian", "binary"}, default="gaussian"
        Visible unit kind.  Binary visibles (for stacking and reference checks) have
        σ = 1, not learned.
    learn_variance : bool, default=True
        Learn the Gaussian visibles' variances (ignored for binary visibles).
    tie_variance : {"band", "unit"}, default="band"
        ``"band"``: one variance per mel band shared by all context positions (see
        ``layout``); ``"unit"``: one variance per visible unit.
    layout : tuple of (int, int) or None, default=None
        ``(n_positions, n_bands)`` of a context window; visible index
        ``position * n_bands + band``.  With None each column is its own band.
    n_steps : int, default=1
        Gibbs steps per update (CD-k), ≥ 1.
    persistent : bool, default=False
        Persistent CD: ``batch_size`` negative chains carried across minibatches.
    learning_rate : float, default=1e-3
        Step size for weights and biases, > 0.  Gaussian visibles need a small rate
        (Hinton 2010 suggests 1–2 orders below the binary case); 0.01–0.1 suits binary
        visibles.
    variance_learning_rate : float, default=1e-4
        Step size for the log-variances zᵢ = log σᵢ², ≥ 0.
    initial_momentum, final_momentum : float, default=0.5, 0.9
        Momentum before and from ``momentum_switch_epoch`` on, in [0, 1).
    momentum_switch_epoch : int, default=5
        Epoch index at which the final momentum starts, ≥ 0.
    learning_rate_decay : float, default=0.5
        Learning-rate schedule: epoch e (from 0) uses both learning rates divided by
        1 + learning_rate_decay · e, ≥ 0 (0 keeps them constant).  Smaller late steps
        (annealing the learning rate: common practice) let the weights settle once σ
        has shrunk, which raises the curvature the steps meet.
    weight_decay : float, default=1e-5
        L2 penalty on the weights, ≥ 0: each update shrinks them as
        ``W ← (1 − η·weight_decay) W`` (not accumulated in the momentum).  The factors of
        successive updates are multiplied in float64 and applied together once they
        differ from 1 by ``1e-5`` (and at the end of each epoch): a single update's
        factor is within float32's rounding of 1 (1 − 1e-7 rounds to 1 − 1.19e-7, and
        anything above 1 − 6e-8 to exactly 1, as the learning rate decays).  The value
        1e-4 often used with binary units cost 0.8 points of probe accuracy on held-out
        voices of the spoken-word set (``bench/bench_probe.py --voices validation``).
    sparsity_target : float or None, default=None
        Target mean hidden activation (> 0), or None for no sparsity cost.
    sparsity_cost : float, default=0.1
        Weight of the sparsity penalty, ≥ 0.  The penalty's derivative with respect to
        each hidden input is taken as (q − p) (Hinton 2010, sec. 11), with q the running
        mean activation; it reaches c, W and z through x.
    sparsity_decay : float, default=0.95
        Decay of the running mean activation q, in [0, 1).
    batch_size : int, default=128
        Rows per minibatch, ≥ 1; also the number of persistent chains.
    epochs : int, default=20
        Passes over the data made by ``fit``, ≥ 1.
    sigma_floor, sigma_ceiling : float, default=0.05, 20.0
        Bounds on the learned σ (units of X), 0 < floor < ceiling.  With standardised
        bands σ lies below 1; the floor caps the gain 1/σ² at 400.
    initial_sigma : float, default=1.0
        Starting σ for every Gaussian visible, within the bounds.
    weight_scale : float, default=0.01
        Standard deviation of the initial weights, > 0 (Hinton 2010, sec. 8).
    max_step : float, default=0.05
        Limit on one minibatch's weight step, as a share of the weights' Frobenius
        norm (at least that of the initial weights): a larger gradient is scaled down,
        biases and log-variances with it (gradient-norm clipping, Pascanu, Mikolov &
        Bengio 2013).  With rectified hiddens a single Gibbs step can amplify the
        reconstruction when the loop gain Wᵀ diag(1/σ²) W nears 1, and one such
        minibatch would otherwise throw the weights far away.  0 turns it off.
        The epoch's count of limited steps is reported as ``limited_steps``.
    divergence_factor : float, default=3.0
        An epoch counts as diverged when its relative reconstruction error exceeds both
        1 (worse than the minibatch mean) and this factor times the larger of the
        previous epoch's and its own first minibatch's, > 1 (see :meth:`fit_epoch`).
    max_rollbacks : int, default=5
        Retries of one epoch after divergence (each halves all learning rates) before
        :class:`DivergenceError`, ≥ 0.
    warm_start : bool, default=False
        Let ``fit`` continue from the current state instead of re-initialising.
    seed : int or None, default=None
        Seed of the ``np.random.Generator`` created when training starts.

    Attributes
    ----------
    weights_ : ndarray of shape (n_visible, n_hidden), float32
    visible_bias_ : ndarray of shape (n_visible,), float32
    hidden_bias_ : ndarray of shape (n_hidden,), float32
    sigma_ : ndarray of shape (n_visible,), float32
        Visible standard deviations (read-only view; assign a new array to change).
    history_ : list of dict
        Per-epoch figures returned by :meth:`fit_epoch`.
    n_features_in_ : int
    n_epochs_ : int
        Epochs completed.
    learning_rate_scale_ : float
        Factor on all learning rates, halved at each rollback.
    metadata_ : dict
        Metadata read from a model file (set by :meth:`load`).

    Notes
    -----
    Learning ascends the log-likelihood with CD-k.  For a set of visibles with hidden
    expectations h (``max(0, x)`` for relu, the exact conditional mean otherwise), each
    phase contributes ⟨(v/σ²) hᵀ⟩ to W, ⟨(v − b)/σ²⟩ to b and ⟨h⟩ to c, data minus
    model.  The variances are learned through zᵢ = log σᵢ², from the free energy

        F(v) = Σᵢ e^{−zᵢ} (vᵢ − bᵢ)²/2 − Σⱼ φ(xⱼ),
        ∂F/∂zᵢ = −e^{−zᵢ} [(vᵢ − bᵢ)²/2 − vᵢ Σⱼ Wᵢⱼ E[hⱼ|v]],

    and the update is ⟨−∂F/∂z⟩_data − ⟨−∂F/∂z⟩_model (summed over the positions of a
    band when tied), with its own rate, then clipped to the σ bounds.  Because
    Σ_batch e^{−zᵢ} vᵢ Σⱼ Wᵢⱼ hⱼ = Σⱼ Wᵢⱼ Gᵢⱼ with G the weight gradient, the z update
    needs no extra matrix product.  One minibatch of CD-1 costs five products of
    size batch × n_visible × n_hidden: hidden input (data), visible mean, hidden input
    (reconstruction) and the weight gradient, whose two phases are stacked into one
    product.  Persistent CD adds one product for the monitored reconstruction.
    """

    metadata_: dict[str, Any]  # set only by load/read_model_file, as documented above

    def __init__(
        self,
        *,
        n_hidden: int = 1024,
        hidden: str = "relu",
        n_copies: int = 10,
        visible: str = "gaussian",
        learn_variance: bool = True,
        tie_variance: str = "band",
        layout: tuple[int, int] | None = None,
        n_steps: int = 1,
        persistent: bool = False,
        learning_rate: float = 1e-3,
        variance_learning_rate: float = 1e-4,
        initial_momentum: float = 0.5,
        final_momentum: float = 0.9,
        momentum_switch_epoch: int = 5,
        learning_rate_decay: float = 0.5,
        weight_decay: float = 1e-5,
        sparsity_target: float | None = None,
        sparsity_cost: float = 0.1,
        sparsity_decay: float = 0.95,
        batch_size: int = 128,
        epochs: int = 20,
        sigma_floor: float = 0.05,
        sigma_ceiling: float = 20.0,
        initial_sigma: float = 1.0,
        weight_scale: float = 0.01,
        max_step: float = 0.05,
        divergence_factor: float = 3.0,
        max_rollbacks: int = 5,
        warm_start: bool = False,
        seed: int | None = None,
    ) -> None:
        self.n_hidden = n_hidden
        self.hidden = hidden
        self.n_copies = n_copies
        self.visible = visible
        self.learn_variance = learn_variance
        self.tie_variance = tie_variance
        self.layout = layout
        self.n_steps = n_steps
        self.persistent = persistent
        self.learning_rate = learning_rate
        self.variance_learning_rate = variance_learning_rate
        self.initial_momentum = initial_momentum
        self.final_momentum = final_momentum
        self.momentum_switch_epoch = momentum_switch_epoch
        self.learning_rate_decay = learning_rate_decay
        self.weight_decay = weight_decay
        self.sparsity_target = sparsity_target
        self.sparsity_cost = sparsity_cost
        self.sparsity_decay = sparsity_decay
        self.batch_size = batch_size
        self.epochs = epochs
        self.sigma_floor = sigma_floor
        self.sigma_ceiling = sigma_ceiling
        self.initial_sigma = initial_sigma
        self.weight_scale = weight_scale
        self.max_step = max_step
        self.divergence_factor = divergence_factor
        self.max_rollbacks = max_rollbacks
        self.warm_start = warm_start
        self.seed = seed

    # ---------------------------------------------------------------- sklearn protocol

    @classmethod
    def _param_names(cls) -> list[str]:
        signature = inspect.signature(cls.__init__)
        return sorted(
            p.name for p in signature.parameters.values()
            if p.kind is inspect.Parameter.KEYWORD_ONLY
        )

    def get_params(self, deep: bool = True) -> dict[str, Any]:
        """Hyperparameters as a dict (the ``__init__`` keywords).

        Parameters
        ----------
        deep : bool, default=True
            Accepted for scikit-learn compatibility; the RBM has no nested estimators.

        Returns
        -------
        params : dict
        """
        return {name: getattr(self, name) for name in self._param_names()}

    def set_params(self, **params: Any) -> RBM:
        """Set hyperparameters by keyword; unknown names raise :class:`ParameterError`.

        Returns
        -------
        self : RBM
        """
        valid = self._param_names()
        for name, value in params.items():
            if name not in valid:
                raise ParameterError(
                    f"unknown RBM parameter {name!r}; valid parameters: {', '.join(valid)}"
                )
            setattr(self, name, value)
        return self

    def __repr__(self) -> str:
        defaults = {
            p.name: p.default for p in inspect.signature(type(self).__init__).parameters.values()
            if p.kind is inspect.Parameter.KEYWORD_ONLY
        }
        changed = [f"{k}={v!r}" for k, v in self.get_params().items() if v != defaults[k]]
        return f"{type(self).__name__}({', '.join(changed)})"

    def __sklearn_is_fitted__(self) -> bool:
        return hasattr(self, "weights_")

    def __sklearn_tags__(self) -> Any:
        """Estimator tags for scikit-learn ≥ 1.6 (its Pipeline asks every step for them).

        Only scikit-learn calls this, so it is imported already; timbrel itself never
        imports scikit-learn from this module.
        """
        from sklearn.utils import InputTags, Tags, TargetTags, TransformerTags

        return Tags(
            estimator_type=None,
            target_tags=TargetTags(required=False),
            transformer_tags=TransformerTags(preserves_dtype=["float32"]),
            input_tags=InputTags(two_d_array=True, allow_nan=False),
            non_deterministic=self.seed is None,
        )

    # ---------------------------------------------------------------- validation

    def _check_params(self) -> None:
        def choice(name: str, options: tuple[str, ...]) -> None:
            value = getattr(self, name)
            if value not in options:
                raise ParameterError(f"{name} must be one of {options}; got {value!r}")

        def integer(name: str, low: int) -> None:
            value = getattr(self, name)
            if not _is_int(value) or value < low:
                raise ParameterError(f"{name} must be an integer ≥ {low}; got {value!r}")

        def real(name: str, low: float, high: float = math.inf, *, low_open: bool = False,
                 high_open: bool = True) -> None:
            value = getattr(self, name)
            ok = _is_real(value) and math.isfinite(value)
            if ok:
                ok = (value > low if low_open else value >= low) and (
                    value < high if high_open else value <= high)
            if not ok:
                left = "(" if low_open else "["
                right = ")" if high_open else "]"
                raise ParameterError(
                    f"{name} must be a finite number in {left}{low}, {high}{right}; got {value!r}"
                )

        def boolean(name: str) -> None:
            value = getattr(self, name)
            if not isinstance(value, (bool, np.bool_)):
                raise ParameterError(f"{name} must be True or False; got {value!r}")

        integer("n_hidden", 1)
        choice("hidden", _HIDDEN_KINDS)
        integer("n_copies", 1)
        choice("visible", _VISIBLE_KINDS)
        boolean("learn_variance")
        choice("tie_variance", _TIE_KINDS)
        if self.layout is not None and not (
            isinstance(self.layout, (tuple, list)) and len(self.layout) == 2
            and all(_is_int(n) and n >= 1 for n in self.layout)
        ):
            raise ParameterError(
                f"layout must be None or (n_positions, n_bands) with positive integers; "
                f"got {self.layout!r}"
            )
        integer("n_steps", 1)
        boolean("persistent")
        real("learning_rate", 0.0, low_open=True)
        real("variance_learning_rate", 0.0)
        real("initial_momentum", 0.0, 1.0)
        real("final_momentum", 0.0, 1.0)
        integer("momentum_switch_epoch", 0)
        real("learning_rate_decay", 0.0)
        real("weight_decay", 0.0)
        if self.sparsity_target is not None:
            real("sparsity_target", 0.0, low_open=True)
        real("sparsity_cost", 0.0)
        real("sparsity_decay", 0.0, 1.0)
        integer("batch_size", 1)
        integer("epochs", 1)
        real("sigma_floor", 0.0, low_open=True)
        real("sigma_ceiling", float(self.sigma_floor) if _is_real(self.sigma_floor) else 0.0,
             low_open=True)
        real("initial_sigma", float(self.sigma_floor), float(self.sigma_ceiling),
             high_open=False)
        real("weight_scale", 0.0, low_open=True)
        real("max_step", 0.0)
        real("divergence_factor", 1.0, low_open=True)
        integer("max_rollbacks", 0)
        boolean("warm_start")
        if self.seed is not None and not (_is_int(self.seed) and self.seed >= 0):
            raise ParameterError(f"seed must be None or an integer ≥ 0; got {self.seed!r}")

    def _check_fitted(self) -> None:
        if not hasattr(self, "weights_"):
            raise NotFittedError(
                "this RBM is not fitted yet; call fit, partial_fit or initialize first"
            )
        n_visible = self.n_features_in_
        for name, shape in (
            ("weights_", (n_visible, self.n_hidden)),
            ("visible_bias_", (n_visible,)),
            ("hidden_bias_", (self.n_hidden,)),
        ):
            value = getattr(self, name)
            if not (isinstance(value, np.ndarray) and value.dtype == _F32
                    and value.flags.c_contiguous):
                value = np.ascontiguousarray(value, dtype=_F32)
                setattr(self, name, value)
            if value.shape != shape:
                raise ParameterError(f"{name} must have shape {shape}; got {value.shape}")

    def _check_input(self, values: Any, *, name: str = "X", width: int | None = None,
                     what: str = "visible units") -> np.ndarray:
        array = _as_float32_matrix(values, name=name)
        expected = self.n_features_in_ if width is None else width
        if array.shape[1] != expected:
            raise ParameterError(
                f"{name} has {array.shape[1]} columns but the model has {expected} {what}"
            )
        return array

    # ---------------------------------------------------------------- variance plumbing

    @property
    def _n_groups(self) -> int:
        return self._group_shape[1] if self._tied else self.n_features_in_

    @property
    def _tied(self) -> bool:
        return (self.tie_variance == "band" and self.layout is not None
                and self.visible == "gaussian")

    @property
    def _group_shape(self) -> tuple[int, int]:
        if self.layout is None:
            return (1, self.n_features_in_)
        return (int(self.layout[0]), int(self.layout[1]))

    def _expand(self, grouped: np.ndarray) -> np.ndarray:
        if self._tied:
            return np.tile(grouped, self._group_shape[0])
        return grouped

    def _group_sum(self, full: np.ndarray) -> np.ndarray:
        if self._tied:
            return full.reshape(self._group_shape).sum(axis=0)
        return full

    def _sync_variance(self) -> None:
        log_var = self._expand(self._log_var).astype(_F32)
        self._sigma = np.exp(0.5 * log_var).astype(_F32)
        self._inv_var = np.exp(-log_var).astype(_F32)

    @property
    def sigma_(self) -> np.ndarray:
        if not hasattr(self, "_log_var"):
            raise NotFittedError("this RBM is not fitted yet; sigma_ is not available")
        view = self._sigma.view()
        view.flags.writeable = False
        return view

    @sigma_.setter
    def sigma_(self, value: Any) -> None:
        if not hasattr(self, "weights_"):
            raise NotFittedError("initialize or fit the RBM before setting sigma_")
        sigma = np.asarray(value, dtype=_F32).reshape(-1)
        if sigma.shape != (self.n_features_in_,):
            raise ParameterError(
                f"sigma_ must have shape ({self.n_features_in_},); got {np.shape(value)}"
            )
        if not (np.isfinite(sigma).all() and (sigma > 0).all()):
            raise ParameterError("sigma_ must be finite and positive")
        if self.visible == "binary" and not np.all(sigma == 1):
            raise ParameterError("binary visibles have sigma_ = 1; it cannot be changed")
        if self._tied:
            per_position = sigma.reshape(self._group_shape)
            if not np.all(per_position == per_position[0]):
                raise ParameterError(
                    "with tie_variance='band' every context position of a band must share "
                    "one sigma"
                )
            sigma = per_position[0]
        self._log_var = (2.0 * np.log(sigma)).astype(_F32)
        self._sync_variance()

    # ---------------------------------------------------------------- initialisation

    def initialize(self, n_visible: int, *, visible_mean: Any = None) -> RBM:
        """Create fresh parameters and optimiser state for ``n_visible`` inputs.

        Resets the generator from ``seed``, the history and the epoch counter.

        Parameters
        ----------
        n_visible : int
            Number of visible units, ≥ 1 (equal to n_positions × n_bands with a layout).
        visible_mean : array-like of shape (n_visible,) or None, default=None
            Data mean used to start the visible biases: the mean itself for Gaussian
            visibles, its clipped log-odds for binary ones (Hinton 2010, sec. 8).  None
            starts them at zero.

        Returns
        -------
        self : RBM
        """
        self._check_params()
        if not _is_int(n_visible) or n_visible < 1:
            raise ParameterError(f"n_visible must be an integer ≥ 1; got {n_visible!r}")
        n_visible = int(n_visible)
        if self.layout is not None and self.layout[0] * self.layout[1] != n_visible:
            raise ParameterError(
                f"layout {tuple(self.layout)} describes {self.layout[0] * self.layout[1]} "
                f"visible units but n_visible is {n_visible}"
            )
        self._rng = np.random.default_rng(self.seed)
        self.n_features_in_ = n_visible
        weights = self._rng.standard_normal((n_visible, self.n_hidden), dtype=_F32)
        weights *= _F32(self.weight_scale)
        self.weights_ = weights
        self.hidden_bias_ = np.zeros(self.n_hidden, _F32)
        if visible_mean is None:
            self.visible_bias_ = np.zeros(n_visible, _F32)
        else:
            mean = np.asarray(visible_mean, dtype=np.float64).reshape(-1)
            if mean.shape != (n_visible,) or not np.isfinite(mean).all():
                raise ParameterError(
                    f"visible_mean must be {n_visible} finite values; got shape {mean.shape}"
                )
            if self.visible == "binary":
                p = np.clip(mean, 1e-3, 1 - 1e-3)
                mean = np.log(p / (1 - p))
            self.visible_bias_ = mean.astype(_F32)
        n_groups = self._n_groups
        start = 0.0 if self.visible == "binary" else 2.0 * math.log(self.initial_sigma)
        self._log_var = np.full(n_groups, start, _F32)
        self._sync_variance()
        self._velocity = {
            "weights": np.zeros_like(self.weights_),
            "visible_bias": np.zeros_like(self.visible_bias_),
            "hidden_bias": np.zeros_like(self.hidden_bias_),
            "log_variance": np.zeros_like(self._log_var),
        }
        self._chain: np.ndarray | None = None
        self._chain_needs_start = False
        self._sparsity_estimate: np.ndarray | None = None
        self._reference_error: float | None = None
        self._workspace: _Workspace | None = None
        self.history_: list[dict[str, Any]] = []
        self.n_epochs_ = 0
        self.learning_rate_scale_ = 1.0
        return self

    def _ensure_training_state(self) -> None:
        """Fill in optimiser state missing after load or manual parameter assignment."""
        if not hasattr(self, "_rng") or self._rng is None:
            self._rng = np.random.default_rng(self.seed)
        if not hasattr(self, "_velocity"):
            self._velocity = {
                "weights": np.zeros_like(self.weights_),
                "visible_bias": np.zeros_like(self.visible_bias_),
                "hidden_bias": np.zeros_like(self.hidden_bias_),
                "log_variance": np.zeros_like(self._log_var),
            }
        for name, default in (("_chain", None), ("_sparsity_estimate", None),
                              ("_reference_error", None), ("_workspace", None),
                              ("n_epochs_", 0), ("learning_rate_scale_", 1.0)):
            if not hasattr(self, name):
                setattr(self, name, default)
        if not hasattr(self, "history_"):
            self.history_ = []

    def _get_workspace(self, n_rows: int, n_stack: int) -> _Workspace:
        ws = self._workspace
        if ws is None or ws.n_rows < n_rows or ws.n_stack < n_stack or \
                ws.grad_weights.shape != self.weights_.shape:
            ws = _Workspace(max(n_rows, getattr(ws, "n_rows", 0)),
                            max(n_stack, getattr(ws, "n_stack", 0)),
                            self.n_features_in_, self.n_hidden)
            self._workspace = ws
        return ws

    # ---------------------------------------------------------------- hidden kinds

    def _mean_hidden(self, x: np.ndarray, out: np.ndarray, tmp: np.ndarray) -> np.ndarray:
        if self.hidden == "relu":
            _relu(x, out)
        elif self.hidden == "binary":
            _sigmoid(x, out)
        else:
            np.subtract(x, 0.5, out=out)
            _sigmoid(out, out)
            for copy_index in range(2, self.n_copies + 1):
                np.subtract(x, copy_index - 0.5, out=tmp)
                out += _sigmoid(tmp, tmp)
        return out

    def _sample_hidden(self, x: np.ndarray, out: np.ndarray, tmp: np.ndarray,
                       tmp2: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        if self.hidden == "relu":
            # max(0, x + N(0, sigmoid(x))) with sigmoid(x) = (1 + tanh(x/2)) / 2: the 1/2
            # goes into the draws' variance, and tanh is one pass where sigmoid through
            # exp takes four (22 against 84 us per 128 x 1024 float32 pass)
            _standard_normal(rng, out, tmp2, variance=0.5)
            np.multiply(x, _F32(0.5), out=tmp)
            np.tanh(tmp, out=tmp)
            tmp += _F32(1.0)
            np.sqrt(tmp, out=tmp)
            out *= tmp
            out += x
            _relu(out, out)
        elif self.hidden == "binary":
            _sigmoid(x, tmp)
            _uniform_fill(rng, out)
            np.less(out, tmp, out=out)
        else:
            out.fill(0.0)
            for copy_index in range(1, self.n_copies + 1):
                np.subtract(x, copy_index - 0.5, out=tmp)
                _sigmoid(tmp, tmp)
                _uniform_fill(rng, tmp2)
                np.less(tmp2, tmp, out=tmp2)
                out += tmp2
        return out

    def _log_partial(self, x: np.ndarray) -> np.ndarray:
        """Σⱼ φ(xⱼ) per row, with φ the log of the hidden unit's partition sum."""
        out = np.empty_like(x)
        tmp = np.empty_like(x)
        if self.hidden == "binary":
            _softplus(x, out, tmp)
        elif self.hidden == "stepped":
            shifted = np.empty_like(x)
            term = np.empty_like(x)
            out.fill(0.0)
            for copy_index in range(1, self.n_copies + 1):
                np.subtract(x, copy_index - 0.5, out=shifted)
                out += _softplus(shifted, term, tmp)
        else:
            out = _relu_partial_sum(x, derivative=False)
        return out.sum(axis=1, dtype=np.float64).astype(_F32)

    def _log_partial_derivative(self, x: np.ndarray) -> np.ndarray:
        """dφ/dx, the exact conditional mean of the hidden unit under its free energy."""
        if self.hidden == "relu":
            return _relu_partial_sum(x, derivative=True)
        out = np.empty_like(x)
        return self._mean_hidden(x, out, np.empty_like(x))

    # ---------------------------------------------------------------- inference

    def _make_rng(self, rng: Any) -> np.random.Generator:
        if rng is None:
            return np.random.default_rng(self.seed)
        if isinstance(rng, np.random.Generator):
            return rng
        if _is_int(rng) and rng >= 0:
            return np.random.default_rng(int(rng))
        raise ParameterError(f"rng must be None, an integer ≥ 0 or a numpy Generator; got {rng!r}")

    def _hidden_input(self, v: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        scaled = v * self._inv_var if self.visible == "gaussian" else v
        out = np.matmul(scaled, self.weights_, out=out)
        out += self.hidden_bias_
        return out

    def transform(self, X: Any) -> np.ndarray:
        """Mean hidden activation for each row of X.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_visible)

        Returns
        -------
        H : ndarray of shape (n_samples, n_hidden), float32
            max(0, x) for relu, sigmoid(x) for binary, Σₙ sigmoid(x − n + 0.5) for stepped.
        """
        self._check_fitted()
        X = self._check_input(X)
        if self.visible == "gaussian":
            scaled_weights = self.weights_ * self._inv_var[:, None]
        else:
            scaled_weights = self.weights_
        out = np.empty((X.shape[0], self.n_hidden), _F32)
        rows = min(_TRANSFORM_CHUNK, X.shape[0])
        tmp = np.empty((rows, self.n_hidden), _F32)
        # the stepped mean reads x once per copy, so it needs x apart from the output
        inputs = np.empty((rows, self.n_hidden), _F32) if self.hidden == "stepped" else None
        for start in range(0, X.shape[0], _TRANSFORM_CHUNK):
            chunk = out[start:start + _TRANSFORM_CHUNK]
            x = chunk if inputs is None else inputs[: chunk.shape[0]]
            np.matmul(X[start:start + _TRANSFORM_CHUNK], scaled_weights, out=x)
            x += self.hidden_bias_
            self._mean_hidden(x, chunk, tmp[: chunk.shape[0]])
        return out

    def fit_transform(self, X: Any, y: Any = None) -> np.ndarray:
        """Fit to X, then return ``transform(X)``; see :meth:`fit` and :meth:`transform`."""
        return self.fit(X, y).transform(X)

    def mean_visible(self, H: Any) -> np.ndarray:
        """Conditional mean of the visibles given hidden states.

        Parameters
        ----------
        H : array-like of shape (n_samples, n_hidden)

        Returns
        -------
        V : ndarray of shape (n_samples, n_visible), float32
            b + H Wᵀ (Gaussian) or sigmoid(b + H Wᵀ) (binary).
        """
        self._check_fitted()
        H = self._check_input(H, name="H", width=self.n_hidden, what="hidden units")
        out = H @ self.weights_.T
        out += self.visible_bias_
        if self.visible == "binary":
            _sigmoid(out, out)
        return out

    def sample_hidden(self, X: Any, *, rng: Any = None) -> np.ndarray:
        """Draw hidden states given visibles.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_visible)
        rng : None, int or numpy.random.Generator, default=None
            None uses a new generator seeded from ``seed`` (so repeated calls repeat the
            draw); pass a Generator to continue one stream.  Training's generator is
            never touched.

        Returns
        -------
        H : ndarray of shape (n_samples, n_hidden), float32
        """
        self._check_fitted()
        X = self._check_input(X)
        gen = self._make_rng(rng)
        x = self._hidden_input(X)
        out = np.empty_like(x)
        return self._sample_hidden(x, out, np.empty_like(x), np.empty_like(x), gen)

    def sample_visible(self, H: Any, *, rng: Any = None) -> np.ndarray:
        """Draw visibles given hidden states: N(b + HWᵀ, σ²) or Bernoulli(sigmoid(b + HWᵀ)).

        Parameters
        ----------
        H : array-like of shape (n_samples, n_hidden)
        rng : None, int or numpy.random.Generator, default=None
            As for :meth:`sample_hidden`.

        Returns
        -------
        V : ndarray of shape (n_samples, n_visible), float32
        """
        gen = self._make_rng(rng)
        mean = self.mean_visible(H)
        noise = np.empty_like(mean)
        if self.visible == "gaussian":
            _standard_normal(gen, noise, np.empty(noise.size // 2 + 1, _F32))
            noise *= self._sigma
            mean += noise
            return mean
        gen.random(out=noise, dtype=_F32)
        np.less(noise, mean, out=noise)
        return noise

    def gibbs(self, X: Any, *, steps: int = 1, rng: Any = None) -> np.ndarray:
        """Run block Gibbs sampling v → h → v from X.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_visible)
            Starting visibles.
        steps : int, default=1
            Number of full v → h → v steps, ≥ 1.
        rng : None, int or numpy.random.Generator, default=None
            As for :meth:`sample_hidden`.

        Returns
        -------
        V : ndarray of shape (n_samples, n_visible), float32
            The visibles after the last step.
        """
        if not _is_int(steps) or steps < 1:
            raise ParameterError(f"steps must be an integer ≥ 1; got {steps!r}")
        self._check_fitted()
        v = self._check_input(X)
        gen = self._make_rng(rng)
        for _ in range(steps):
            v = self.sample_visible(self.sample_hidden(v, rng=gen), rng=gen)
        return v

    def free_energy(self, X: Any) -> np.ndarray:
        """Free energy F(v) = −log Σ_h exp(−E(v, h)) of each row.

        Gaussian: Σᵢ (vᵢ − bᵢ)²/(2σᵢ²) − Σⱼ φ(xⱼ); binary: −b·v − Σⱼ φ(xⱼ), with
        φ = softplus (binary), Σₙ₌₁ᴺ softplus(x − n + 0.5) (stepped) or the same sum
        to infinity within 1e-6 per unit (relu).  No additive constant is dropped:
        p(v) = exp(−F(v)) / Z with Z = ∫ Σ_h exp(−E).

        Parameters
        ----------
        X : array-like of shape (n_samples, n_visible)

        Returns
        -------
        F : ndarray of shape (n_samples,), float32
        """
        self._check_fitted()
        X = self._check_input(X)
        out = np.empty(X.shape[0], _F32)
        for start in range(0, X.shape[0], _TRANSFORM_CHUNK):
            v = X[start:start + _TRANSFORM_CHUNK]
            x = self._hidden_input(v)
            if self.visible == "gaussian":
                deviation = v - self.visible_bias_
                np.square(deviation, out=deviation)
                visible_term = 0.5 * (deviation @ self._inv_var)
            else:
                visible_term = -(v @ self.visible_bias_)
            out[start:start + v.shape[0]] = visible_term - self._log_partial(x)
        return out

    def reconstruction_error(self, X: Any) -> float:
        """Mean squared error of the mean-field reconstruction, in the units of X.

        The reconstruction is ``mean_visible(transform(X))``.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_visible)

        Returns
        -------
        error : float
        """
        self._check_fitted()
        X = self._check_input(X)
        total = 0.0
        for start in range(0, X.shape[0], _TRANSFORM_CHUNK):
            v = X[start:start + _TRANSFORM_CHUNK]
            difference = self.mean_visible(self.transform(v))
            difference -= v
            total += float(np.vdot(difference, difference))
        return total / X.size

    def exact_log_partition(self) -> float:
        """log Z by enumerating all 2^n_hidden hidden states (binary hiddens, n_hidden ≤ 24).

        Gaussian visibles integrate in closed form:
        log Z = Σᵢ ½ log(2πσᵢ²) + log Σ_h exp(c·h + Σᵢ ((bᵢ + (Wh)ᵢ)² − bᵢ²)/(2σᵢ²));
        binary visibles: log Z = log Σ_h exp(c·h + Σᵢ softplus(bᵢ + (Wh)ᵢ)).
        Computed in float64.

        Returns
        -------
        log_z : float
        """
        self._check_fitted()
        if self.hidden != "binary" or self.n_hidden > _MAX_EXACT_HIDDEN:
            raise ParameterError(
                f"exact_log_partition needs binary hiddens and n_hidden ≤ {_MAX_EXACT_HIDDEN}; "
                f"got hidden={self.hidden!r}, n_hidden={self.n_hidden}"
            )
        weights = self.weights_.astype(np.float64)
        b = self.visible_bias_.astype(np.float64)
        c = self.hidden_bias_.astype(np.float64)
        var = self._sigma.astype(np.float64) ** 2
        n_states = 1 << self.n_hidden
        bits = np.arange(self.n_hidden)
        log_terms = []
        for start in range(0, n_states, 1 << 16):
            codes = np.arange(start, min(start + (1 << 16), n_states))
            states = ((codes[:, None] >> bits) & 1).astype(np.float64)
            mean = states @ weights.T + b
            if self.visible == "gaussian":
                term = states @ c + ((mean**2 - b**2) / (2 * var)).sum(axis=1)
            else:
                term = states @ c + np.logaddexp(0.0, mean).sum(axis=1)
            log_terms.append(term)
        stacked = np.concatenate(log_terms)
        top = stacked.max()
        log_z = float(top + np.log(np.exp(stacked - top).sum()))
        if self.visible == "gaussian":
            log_z += float(0.5 * np.log(2 * np.pi * var).sum())
        return log_z

    # ---------------------------------------------------------------- gradients

    def _combine_phases(
        self, vis_stack: np.ndarray, hid_stack: np.ndarray, out_weights: np.ndarray, *,
        n_pos: int, pos_sum: np.ndarray, pos_sq: np.ndarray | None,
        n_neg: int, neg_sum: np.ndarray | None, neg_sq: np.ndarray | None,
        rate: float, with_variance: bool,
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        """Turn stacked phase statistics into (scaled) gradients.

        ``vis_stack`` holds the phases' visibles divided by σ², ``hid_stack`` their
        hidden expectations already multiplied by +rate/n_pos (data) and −rate/n_neg
        (model), plus any extra rank-one rows.  Fills ``out_weights`` with
        rate·∂logL/∂W and returns rate·∂/∂b, rate·∂/∂c and the grouped ∂/∂z (unscaled).
        """
        np.matmul(vis_stack.T, hid_stack, out=out_weights)
        grad_hidden = hid_stack.sum(axis=0)
        neg_mean = neg_sum / n_neg if n_neg and neg_sum is not None else self.visible_bias_
        grad_visible = pos_sum / n_pos - neg_mean
        if self.visible == "gaussian":
            grad_visible *= self._inv_var
        grad_visible *= rate
        grad_log_var = None
        if with_variance and pos_sq is not None:
            # Σⱼ Wᵢⱼ Gᵢⱼ = rate · (⟨e^{−zᵢ} vᵢ Σⱼ Wᵢⱼ hⱼ⟩_data − ⟨…⟩_model)
            coupling = np.einsum("ij,ij->i", self.weights_, out_weights)
            spread = pos_sq / n_pos
            if n_neg and neg_sq is not None:
                spread = spread - neg_sq / n_neg
            grad_full = 0.5 * self._inv_var * spread - coupling / rate
            grad_log_var = self._group_sum(grad_full.astype(_F32))
        return grad_visible.astype(_F32), grad_hidden.astype(_F32), grad_log_var

    def _contrastive_step(
        self, v0: np.ndarray, *, rate: float, rng: np.random.Generator,
        tally: _EpochTally | None, use_chain: bool, use_sparsity: bool, n_steps: int,
        with_variance: bool,
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
        """One CD-k / PCD-k gradient estimate on the minibatch ``v0`` (not applied)."""
        weights, b, c = self.weights_, self.visible_bias_, self.hidden_bias_
        gaussian = self.visible == "gaussian"
        n = v0.shape[0]
        chain = None
        if use_chain:
            if self._chain is None:
                self._chain = np.empty((self.batch_size, self.n_hidden), _F32)
                self._chain_needs_start = True
            chain = self._chain
        n_neg = chain.shape[0] if chain is not None else n
        n_rows = max(n, n_neg)
        n_stack = n + n_neg + (1 if use_sparsity else 0)
        ws = self._get_workspace(n_rows, n_stack)
        vis_stack, hid_stack = ws.vis_stack[:n_stack], ws.hid_stack[:n_stack]
        vis_pos, vis_neg = vis_stack[:n], vis_stack[n:n + n_neg]
        h_pos, h_neg = hid_stack[:n], hid_stack[n:n + n_neg]
        x = ws.hidden_input[:n]
        deviation = ws.visible_tmp[:n]

        # positive phase
        if gaussian:
            np.multiply(v0, self._inv_var, out=vis_pos)
        else:
            np.copyto(vis_pos, v0)
        np.matmul(vis_pos, weights, out=x)
        x += c
        self._mean_hidden(x, h_pos, ws.hidden_tmp[:n])
        pos_sum = v0.sum(axis=0)
        np.subtract(v0, b, out=deviation)
        np.square(deviation, out=deviation)
        pos_sq = deviation.sum(axis=0)
        if tally is not None:
            np.maximum(tally.max_input, x.max(axis=0), out=tally.max_input)
            tally.activity += float(h_pos.sum(axis=0).sum(dtype=np.float64))
            spread = float(pos_sq.sum(dtype=np.float64)) - float(
                np.square(pos_sum.astype(np.float64) - n * b).sum()) / n
            tally.total_spread += spread

        if chain is None:
            drive = ws.hidden_sample[:n]
            self._sample_hidden(x, drive, ws.hidden_tmp[:n], ws.hidden_tmp2[:n], rng)
        else:
            if getattr(self, "_chain_needs_start", False):
                # start the chains from the first minibatch's hidden samples
                start = ws.hidden_sample[:n]
                self._sample_hidden(x, start, ws.hidden_tmp[:n], ws.hidden_tmp2[:n], rng)
                chain[:] = np.resize(start, chain.shape)
                self._chain_needs_start = False
            drive = chain
            if tally is not None:
                # PCD's chains do not reconstruct the data: one extra product for the monitor
                recon = ws.visible_mean[:n]
                np.matmul(h_pos, weights.T, out=recon)
                recon += b
                if not gaussian:
                    _sigmoid(recon, recon)
                np.subtract(v0, recon, out=deviation)
                self._tally_error(tally, float(np.vdot(deviation, deviation)), n, spread)

        # negative phase
        x_neg = ws.hidden_input[:n_neg]
        noise = ws.visible_tmp[:n_neg]
        for step in range(n_steps):
            v_mean = ws.visible_mean[:n_neg]
            np.matmul(drive, weights.T, out=v_mean)
            v_mean += b
            if not gaussian:
                _sigmoid(v_mean, v_mean)
            if step == 0 and chain is None and tally is not None:
                np.subtract(v0, v_mean, out=deviation)
                self._tally_error(tally, float(np.vdot(deviation, deviation)), n, spread)
            if gaussian:
                _standard_normal(rng, noise, ws.visible_scratch)
                noise *= self._sigma
                v_mean += noise
                v_neg = v_mean
                np.multiply(v_neg, self._inv_var, out=vis_neg)
            else:
                _uniform_fill(rng, noise)
                np.less(noise, v_mean, out=vis_neg)
                v_neg = vis_neg
            np.matmul(vis_neg, weights, out=x_neg)
            x_neg += c
            if step < n_steps - 1 or chain is not None:
                target = chain if (chain is not None and step == n_steps - 1) \
                    else ws.hidden_sample[:n_neg]
                self._sample_hidden(x_neg, target, ws.hidden_tmp[:n_neg],
                                    ws.hidden_tmp2[:n_neg], rng)
                drive = target
        self._mean_hidden(x_neg, h_neg, ws.hidden_tmp[:n_neg])
        neg_sum = v_neg.sum(axis=0)
        neg_sq = None
        if with_variance:
            neg_deviation = ws.visible_tmp[:n_neg]
            np.subtract(v_neg, b, out=neg_deviation)
            np.square(neg_deviation, out=neg_deviation)
            neg_sq = neg_deviation.sum(axis=0)

        if use_sparsity:
            batch_activity = h_pos.mean(axis=0)
            estimate = self._sparsity_estimate
            if estimate is None:
                estimate = batch_activity
            else:
                decay = self.sparsity_decay
                estimate = decay * estimate + (1 - decay) * batch_activity
            self._sparsity_estimate = estimate.astype(_F32)
            # rank-one row: mean(v/σ²) ⊗ −cost·(q − p) reaches W, c and z via the product
            vis_stack[n_stack - 1] = vis_pos.mean(axis=0)
            hid_stack[n_stack - 1] = -rate * self.sparsity_cost * (
                self._sparsity_estimate - self.sparsity_target)

        h_pos *= _F32(rate / n)
        h_neg *= _F32(-rate / n_neg)
        grad_visible, grad_hidden, grad_log_var = self._combine_phases(
            vis_stack, hid_stack, ws.grad_weights, n_pos=n, pos_sum=pos_sum, pos_sq=pos_sq,
            n_neg=n_neg, neg_sum=neg_sum, neg_sq=neg_sq, rate=rate,
            with_variance=with_variance,
        )
        return ws.grad_weights, grad_visible, grad_hidden, grad_log_var

    @staticmethod
    def _tally_error(tally: _EpochTally, squared_error: float, n: int, spread: float) -> None:
        tally.squared_error += squared_error
        tally.rows += n
        if tally.first_relative_error is None:
            tally.first_relative_error = squared_error / spread if spread > 0 else math.inf

    def cd_gradient(self, X: Any, *, n_steps: int | None = None,
                    rng: Any = None) -> dict[str, np.ndarray]:
        """Contrastive-divergence estimate of the log-likelihood gradient at X.

        Runs the same code as a training update (chains start at the rows of X;
        ``persistent`` is ignored), without applying it, without weight decay and
        without the sparsity cost.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_visible)
            Data; one negative chain per row.
        n_steps : int or None, default=None
            Gibbs steps; None uses the ``n_steps`` hyperparameter.
        rng : None, int or numpy.random.Generator, default=None
            As for :meth:`sample_hidden`.

        Returns
        -------
        gradient : dict of str to ndarray
            Ascent directions ``weights`` (n_visible, n_hidden), ``visible_bias``
            (n_visible,), ``hidden_bias`` (n_hidden,) and, for Gaussian visibles,
            ``log_variance`` with respect to the independent z parameters: (n_bands,)
            with ``tie_variance="band"`` and a layout, (n_visible,) otherwise.
        """
        self._check_fitted()
        X = self._check_input(X)
        steps = self.n_steps if n_steps is None else n_steps
        if not _is_int(steps) or steps < 1:
            raise ParameterError(f"n_steps must be an integer ≥ 1; got {steps!r}")
        gen = self._make_rng(rng)
        saved = getattr(self, "_workspace", None)
        self._workspace = None
        try:
            grad_weights, grad_visible, grad_hidden, grad_log_var = self._contrastive_step(
                X, rate=1.0, rng=gen, tally=None, use_chain=False, use_sparsity=False,
                n_steps=int(steps), with_variance=self.visible == "gaussian",
            )
        finally:
            self._workspace = saved
        result = {"weights": grad_weights.copy(), "visible_bias": grad_visible,
                  "hidden_bias": grad_hidden}
        if grad_log_var is not None:
            result["log_variance"] = grad_log_var
        return result

    def free_energy_gradient(self, X: Any) -> dict[str, np.ndarray]:
        """Mean over rows of the analytic derivatives of :meth:`free_energy`.

        Uses the same phase-combination code as training, with the exact conditional
        mean dφ/dx of the free energy as hidden expectation (for relu:
        Σₙ sigmoid(x − n + 0.5) over the same copies as the free energy).

        Parameters
        ----------
        X : array-like of shape (n_samples, n_visible)

        Returns
        -------
        gradient : dict of str to ndarray
            ∂F/∂W (n_visible, n_hidden), ∂F/∂b, ∂F/∂c and, for Gaussian visibles,
            ∂F/∂z grouped as in :meth:`cd_gradient`.
        """
        self._check_fitted()
        X = self._check_input(X)
        n = X.shape[0]
        scaled = X * self._inv_var if self.visible == "gaussian" else X.copy()
        x = scaled @ self.weights_
        x += self.hidden_bias_
        expectation = self._log_partial_derivative(x)
        expectation *= _F32(1.0 / n)
        deviation = X - self.visible_bias_
        np.square(deviation, out=deviation)
        grad_weights = np.empty_like(self.weights_)
        gaussian = self.visible == "gaussian"
        grad_visible, grad_hidden, grad_log_var = self._combine_phases(
            scaled, expectation, grad_weights, n_pos=n, pos_sum=X.sum(axis=0),
            pos_sq=deviation.sum(axis=0), n_neg=0, neg_sum=None, neg_sq=None, rate=1.0,
            with_variance=gaussian,
        )
        # the phase statistics are −∂F/∂θ
        result = {"weights": -grad_weights, "visible_bias": -grad_visible,
                  "hidden_bias": -grad_hidden}
        if grad_log_var is not None:
            result["log_variance"] = -grad_log_var
        return result

    # ---------------------------------------------------------------- training

    def _schedule(self, epoch: int) -> float:
        """Factor on both learning rates in ``epoch`` (see ``learning_rate_decay``)."""
        return 1.0 / (1.0 + float(self.learning_rate_decay) * epoch)

    def _momentum(self, epoch: int) -> float:
        if epoch < self.momentum_switch_epoch:
            return float(self.initial_momentum)
        return float(self.final_momentum)

    def _apply_update(self, grad_weights: np.ndarray, grad_visible: np.ndarray,
                      grad_hidden: np.ndarray, grad_log_var: np.ndarray | None, *,
                      momentum: float, variance_rate: float) -> None:
        velocity = self._velocity
        weights = self.weights_
        velocity_weights = velocity["weights"]
        velocity_weights *= _F32(momentum)
        velocity_weights += grad_weights
        weights += velocity_weights
        for name, param, grad in (("visible_bias", self.visible_bias_, grad_visible),
                                  ("hidden_bias", self.hidden_bias_, grad_hidden)):
            vel = velocity[name]
            vel *= _F32(momentum)
            vel += grad
            param += vel
        if grad_log_var is not None and variance_rate > 0:
            vel = velocity["log_variance"]
            vel *= _F32(momentum)
            vel += _F32(variance_rate) * grad_log_var
            self._log_var += vel
            low = 2.0 * math.log(self.sigma_floor)
            high = 2.0 * math.log(self.sigma_ceiling)
            clipped = (self._log_var < low) | (self._log_var > high)
            if clipped.any():
                np.clip(self._log_var, low, high, out=self._log_var)
                vel[clipped] = 0.0  # no momentum pushing against a bound
            self._sync_variance()

    def _parameters_finite(self) -> bool:
        return bool(
            np.isfinite(self.weights_).all() and np.isfinite(self.visible_bias_).all()
            and np.isfinite(self.hidden_bias_).all() and np.isfinite(self._log_var).all()
        )

    def _snapshot(self) -> dict[str, Any]:
        return {
            "weights": self.weights_.copy(),
            "visible_bias": self.visible_bias_.copy(),
            "hidden_bias": self.hidden_bias_.copy(),
            "log_var": self._log_var.copy(),
            "velocity": {k: v.copy() for k, v in self._velocity.items()},
            "chain": None if self._chain is None else self._chain.copy(),
            "chain_needs_start": getattr(self, "_chain_needs_start", False),
            "sparsity": None if self._sparsity_estimate is None
            else self._sparsity_estimate.copy(),
            "rng": self._rng.bit_generator.state,
        }

    def _restore(self, snap: dict[str, Any]) -> None:
        np.copyto(self.weights_, snap["weights"])
        np.copyto(self.visible_bias_, snap["visible_bias"])
        np.copyto(self.hidden_bias_, snap["hidden_bias"])
        self._log_var = snap["log_var"].copy()
        self._sync_variance()
        for name, value in snap["velocity"].items():
            np.copyto(self._velocity[name], value)
        self._chain = None if snap["chain"] is None else snap["chain"].copy()
        self._chain_needs_start = snap["chain_needs_start"]
        self._sparsity_estimate = None if snap["sparsity"] is None else snap["sparsity"].copy()
        self._rng.bit_generator.state = snap["rng"]

    def _run_epoch(self, make_batches: Callable[[], Iterable[Any]], momentum: float,
                   schedule: float = 1.0) -> tuple[_EpochTally, str | None]:
        rate = self.learning_rate * self.learning_rate_scale_ * schedule
        variance_rate = self.variance_learning_rate * self.learning_rate_scale_ * schedule
        learn_z = (self.visible == "gaussian" and self.learn_variance
                   and self.variance_learning_rate > 0)
        use_sparsity = self.sparsity_target is not None and self.sparsity_cost > 0
        tally = _EpochTally(self.n_hidden)
        # Overflow while diverging is expected and handled by the guard (rollback), so
        # numpy's floating-point warnings would only repeat it less clearly.
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            return self._run_batches(make_batches, tally, rate, variance_rate, learn_z,
                                     use_sparsity, momentum)

    def _run_batches(self, make_batches: Callable[[], Iterable[Any]], tally: _EpochTally,
                     rate: float, variance_rate: float, learn_z: bool, use_sparsity: bool,
                     momentum: float) -> tuple[_EpochTally, str | None]:
        shrink = 1.0  # weight decay of the updates since it was last applied (float64)
        for index, batch in enumerate(make_batches()):
            v0 = self._check_input(batch, name=f"minibatch {index}")
            grads = self._contrastive_step(
                v0, rate=rate, rng=self._rng, tally=tally, use_chain=self.persistent,
                use_sparsity=use_sparsity, n_steps=self.n_steps, with_variance=learn_z,
            )
            if not math.isfinite(tally.squared_error):
                return tally, f"non-finite reconstruction error at minibatch {index}"
            if self.max_step > 0:
                grads = self._limit_step(grads, tally)
            self._apply_update(*grads, momentum=momentum, variance_rate=variance_rate)
            shrink *= 1.0 - rate * float(self.weight_decay)
            if shrink <= 1.0 - _DECAY_STEP:
                self.weights_ *= _F32(shrink)
                shrink = 1.0
        if shrink != 1.0:
            self.weights_ *= _F32(shrink)
        if tally.rows == 0:
            raise ParameterError("make_batches() yielded no minibatches")
        return tally, None

    def _limit_step(self, grads: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None],
                    tally: _EpochTally
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
        """Scale one minibatch's gradients so the weight step stays below ``max_step``."""
        grad_weights = grads[0]
        floor = self.weight_scale * math.sqrt(grad_weights.size)
        limit = float(self.max_step) * max(float(np.linalg.norm(self.weights_)), floor)
        norm = float(np.linalg.norm(grad_weights))
        if not norm > limit:  # also passes NaN on, for the guard to catch
            return grads
        tally.limited_steps += 1
        shrink = _F32(limit / norm)
        grad_weights *= shrink
        grad_visible, grad_hidden, grad_log_var = grads[1:]
        return (grad_weights, grad_visible * shrink, grad_hidden * shrink,
                None if grad_log_var is None else grad_log_var * shrink)

    def _epoch_failure(self, tally: _EpochTally) -> str | None:
        if not self._parameters_finite():
            return "a parameter became NaN or infinite"
        relative = tally.squared_error / tally.total_spread if tally.total_spread > 0 \
            else 0.0
        if not math.isfinite(relative):
            return "non-finite reconstruction error"
        # The first minibatch is measured before any update of this epoch, so data that
        # are harder from the start (a new recording, a level shift) raise the reference
        # rather than passing for divergence.
        candidates = [r for r in (self._reference_error, tally.first_relative_error)
                      if r is not None]
        reference = max(candidates) if candidates else None
        if reference is not None and relative > 1.0 and relative > self.divergence_factor * \
                reference:
            return (f"relative reconstruction error jumped to {relative:.3g} "
                    f"(reference {reference:.3g}, limit ×{self.divergence_factor:g})")
        return None

    def fit_epoch(self, make_batches: Callable[[], Iterable[Any]], *, epoch: int
                  ) -> dict[str, Any]:
        """Train one epoch, guarded against divergence.

        Snapshots all training state, runs one CD update per minibatch, and checks the
        result.  The epoch counts as diverged when a parameter or the reconstruction
        error is non-finite, or when the relative reconstruction error (squared error
        over the minibatches' squared deviation from their column means) exceeds both 1
        and ``divergence_factor`` times a reference: the larger of the previous epoch's
        and this epoch's first minibatch's (measured before any update, so data that are
        harder from the start do not count as divergence).  A diverged epoch is
        rolled back to the snapshot (including the generator), all learning rates are
        halved (``learning_rate_scale_``), a :class:`DivergenceWarning` is issued and the
        epoch is retried; after ``max_rollbacks`` retries :class:`DivergenceError` is
        raised with the model restored.  Any other exception also restores the
        snapshot.  The model never holds a NaN when this method returns.

        Parameters
        ----------
        make_batches : callable
            Zero-argument callable returning an iterable of minibatches, each a
            float32 array of shape (n_rows, n_visible); called again for each retry.
            The model is initialised from the first minibatch if needed.
        epoch : int
            Index of this epoch, ≥ 0; sets the momentum and ``n_epochs_ = epoch + 1``.

        Returns
        -------
        stats : dict
            ``epoch``, ``recon_error`` (mean squared error of the reconstruction from
            sampled hiddens, units of X), ``relative_error``, ``mean_hidden_activity``,
            ``dead_fraction`` (share of hidden units whose input was never positive),
            ``sigma_min``, ``sigma_max``, ``rollbacks``, ``rollback_reasons``,
            ``learning_rate_scale``, ``momentum``, ``n_rows``, ``seconds``.
        """
        self._check_params()
        if not callable(make_batches):
            raise ParameterError(f"make_batches must be a zero-argument callable; got "
                                 f"{type(make_batches).__name__}")
        if not _is_int(epoch) or epoch < 0:
            raise ParameterError(f"epoch must be an integer ≥ 0; got {epoch!r}")
        if not hasattr(self, "weights_"):
            first = next(iter(make_batches()), None)
            if first is None:
                raise ParameterError("make_batches() yielded no minibatches")
            first = _as_float32_matrix(first, name="minibatch 0")
            self.initialize(first.shape[1], visible_mean=first.mean(axis=0))
        self._check_fitted()
        self._ensure_training_state()
        momentum = self._momentum(int(epoch))
        began = time.perf_counter()
        snapshot = self._snapshot()
        reasons: list[str] = []
        while True:
            try:
                tally, failure = self._run_epoch(make_batches, momentum,
                                                 self._schedule(int(epoch)))
            except BaseException:
                self._restore(snapshot)
                raise
            if failure is None:
                failure = self._epoch_failure(tally)
            if failure is None:
                break
            self._restore(snapshot)
            if len(reasons) >= self.max_rollbacks:
                raise DivergenceError(
                    f"training diverged in epoch {epoch} ({failure}) on "
                    f"{len(reasons) + 1} attempt(s) in a row, the last at learning-rate "
                    f"scale {self.learning_rate_scale_:g}; the model keeps its parameters "
                    f"from before the epoch. Lower learning_rate or variance_learning_rate, "
                    f"or raise sigma_floor."
                )
            reasons.append(failure)
            self.learning_rate_scale_ *= 0.5
            warnings.warn(
                f"RBM epoch {epoch} diverged ({failure}); rolled back to the parameters "
                f"before the epoch and halved the learning rates (scale now "
                f"{self.learning_rate_scale_:g}); retrying",
                DivergenceWarning,
                stacklevel=2,
            )
        relative = tally.squared_error / tally.total_spread if tally.total_spread > 0 else 0.0
        stats = {
            "epoch": int(epoch),
            "recon_error": tally.squared_error / (tally.rows * self.n_features_in_),
            "relative_error": relative,
            "mean_hidden_activity": tally.activity / (tally.rows * self.n_hidden),
            "dead_fraction": float(np.mean(tally.max_input <= 0)),
            "sigma_min": float(self._sigma.min()),
            "sigma_max": float(self._sigma.max()),
            "rollbacks": len(reasons),
            "rollback_reasons": reasons,
            "limited_steps": tally.limited_steps,
            "learning_rate_scale": float(self.learning_rate_scale_),
            "learning_rate": float(self.learning_rate * self.learning_rate_scale_
                                   * self._schedule(int(epoch))),
            "momentum": momentum,
            "n_rows": tally.rows,
            "seconds": time.perf_counter() - began,
        }
        self._reference_error = relative
        self.n_epochs_ = int(epoch) + 1
        self.history_.append(stats)
        return dict(stats)

    def fit(self, X: Any, y: Any = None) -> RBM:
        """Train for ``epochs`` epochs on the rows of X, shuffled each epoch.

        Re-initialises the model (generator from ``seed``, visible biases from the data
        mean) unless ``warm_start`` is set and the model is already initialised.  Each
        epoch goes through :meth:`fit_epoch`.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_visible)
            Training data, used as given (standardise beforehand).
        y : ignored

        Returns
        -------
        self : RBM
        """
        self._check_params()
        X = _as_float32_matrix(X, name="X")
        if not (self.warm_start and hasattr(self, "weights_")):
            self.initialize(X.shape[1], visible_mean=X.mean(axis=0, dtype=np.float64))
        else:
            self._check_fitted()
            X = self._check_input(X)
            self._ensure_training_state()
        n_rows, size = X.shape[0], self.batch_size
        buffer = np.empty((min(size, n_rows), X.shape[1]), _F32)
        for _ in range(self.epochs):
            order = self._rng.permutation(n_rows)

            def make_batches(order: np.ndarray = order) -> Iterable[np.ndarray]:
                for start in range(0, n_rows, size):
                    index = order[start:start + size]
                    yield np.take(X, index, axis=0, out=buffer[: index.shape[0]])

            self.fit_epoch(make_batches, epoch=self.n_epochs_)
        return self

    def partial_fit(self, X: Any, y: Any = None) -> RBM:
        """One CD update per minibatch of X, in the given order (one guarded epoch).

        Initialises the model from X on the first call.  Each call counts as one epoch
        for the momentum schedule and the history.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_visible)
        y : ignored

        Returns
        -------
        self : RBM
        """
        self._check_params()
        X = _as_float32_matrix(X, name="X")
        if not hasattr(self, "weights_"):
            self.initialize(X.shape[1], visible_mean=X.mean(axis=0, dtype=np.float64))
        X = self._check_input(X)
        size = self.batch_size

        def make_batches() -> Iterable[np.ndarray]:
            for start in range(0, X.shape[0], size):
                yield X[start:start + size]

        self._ensure_training_state()
        self.fit_epoch(make_batches, epoch=self.n_epochs_)
        return self

    # ---------------------------------------------------------------- checkpoints

    def get_state(self) -> dict[str, Any]:
        """Everything needed to resume training bit for bit.

        Returns
        -------
        state : dict
            Arrays ``weights``, ``visible_bias``, ``hidden_bias``, ``log_variance``
            (grouped z), ``velocity_weights``, ``velocity_visible_bias``,
            ``velocity_hidden_bias``, ``velocity_log_variance``, and when present
            ``chain`` (persistent hidden states) and ``sparsity_estimate``; plus ``rng``
            (JSON-able ``bit_generator.state``), ``epoch``, ``learning_rate_scale``,
            ``reference_error``, ``chain_needs_start`` and ``history`` (JSON-able).
        """
        self._check_fitted()
        self._ensure_training_state()
        state: dict[str, Any] = {
            "weights": self.weights_.copy(),
            "visible_bias": self.visible_bias_.copy(),
            "hidden_bias": self.hidden_bias_.copy(),
            "log_variance": self._log_var.copy(),
        }
        for name, value in self._velocity.items():
            state[f"velocity_{name}"] = value.copy()
        if self._chain is not None:
            state["chain"] = self._chain.copy()
        if self._sparsity_estimate is not None:
            state["sparsity_estimate"] = self._sparsity_estimate.copy()
        state["rng"] = _json_safe(self._rng.bit_generator.state)
        state["epoch"] = int(self.n_epochs_)
        state["learning_rate_scale"] = float(self.learning_rate_scale_)
        state["reference_error"] = self._reference_error
        state["chain_needs_start"] = bool(getattr(self, "_chain_needs_start", False))
        state["history"] = _json_safe(self.history_)
        return state

    def set_state(self, state: Mapping[str, Any]) -> RBM:
        """Restore a state from :meth:`get_state` (hyperparameters must match its shapes).

        Parameters
        ----------
        state : mapping
            As returned by :meth:`get_state`, possibly after a round trip through
            ``np.savez`` (arrays) and JSON (the rest).

        Returns
        -------
        self : RBM
        """
        self._check_params()
        required = ("weights", "visible_bias", "hidden_bias", "log_variance", "rng", "epoch",
                    "velocity_weights", "velocity_visible_bias", "velocity_hidden_bias",
                    "velocity_log_variance")
        missing = [k for k in required if k not in state]
        if missing:
            raise ParameterError(f"state is missing {', '.join(missing)}")
        weights = np.array(state["weights"], dtype=_F32, order="C")
        if weights.ndim != 2 or weights.shape[1] != self.n_hidden:
            raise ParameterError(
                f"state weights have shape {weights.shape}; this RBM has n_hidden="
                f"{self.n_hidden}"
            )
        self.initialize(weights.shape[0])
        arrays = {
            "weights": weights,
            "visible_bias": np.array(state["visible_bias"], dtype=_F32),
            "hidden_bias": np.array(state["hidden_bias"], dtype=_F32),
            "log_variance": np.array(state["log_variance"], dtype=_F32),
        }
        expected = {"weights": self.weights_.shape, "visible_bias": self.visible_bias_.shape,
                    "hidden_bias": self.hidden_bias_.shape, "log_variance": self._log_var.shape}
        for name, shape in expected.items():
            for key in (name, f"velocity_{name}"):
                value = np.asarray(state[key], dtype=_F32)
                if value.shape != shape:
                    raise ParameterError(f"state[{key!r}] has shape {value.shape}; expected "
                                         f"{shape}")
                if not np.isfinite(value).all():
                    raise ParameterError(f"state[{key!r}] holds NaN or infinite values")
        self.weights_ = arrays["weights"]
        self.visible_bias_ = arrays["visible_bias"]
        self.hidden_bias_ = arrays["hidden_bias"]
        self._log_var = arrays["log_variance"]
        self._sync_variance()
        for name in self._velocity:
            self._velocity[name] = np.array(state[f"velocity_{name}"], dtype=_F32, order="C")
        chain = state.get("chain")
        if chain is not None:
            chain = np.array(chain, dtype=_F32, order="C")
            if chain.shape != (self.batch_size, self.n_hidden):
                raise ParameterError(f"state['chain'] has shape {chain.shape}; expected "
                                     f"{(self.batch_size, self.n_hidden)}")
        self._chain = chain
        self._chain_needs_start = bool(state.get("chain_needs_start", False))
        estimate = state.get("sparsity_estimate")
        self._sparsity_estimate = None if estimate is None else np.array(estimate, dtype=_F32)
        try:
            self._rng.bit_generator.state = dict(state["rng"])
        except (TypeError, ValueError, KeyError) as exc:
            raise ParameterError(f"state['rng'] is not a generator state for "
                                 f"{type(self._rng.bit_generator).__name__}: {exc}") from None
        self.n_epochs_ = int(state["epoch"])
        self.learning_rate_scale_ = float(state.get("learning_rate_scale", 1.0))
        reference = state.get("reference_error")
        self._reference_error = None if reference is None else float(reference)
        self.history_ = [dict(entry) for entry in state.get("history", [])]
        return self

    # ---------------------------------------------------------------- model files

    def save(self, path: str | os.PathLike[str], *, metadata: Mapping[str, Any] | None = None,
             arrays: Mapping[str, Any] | None = None) -> Path:
        """Write the fitted model to one ``.npz`` file, atomically.

        The file holds the parameter arrays, the user ``arrays`` and a JSON header
        (format name and version, hyperparameters, history, ``metadata``, array names
        and a SHA-256 checksum over the arrays and the rest of the header).  It is
        written without pickles to a temporary file in the same folder, then renamed
        over ``path``.  Optimiser state is not included (see :meth:`get_state`).

        Parameters
        ----------
        path : str or path-like
            Destination, used as given (``.npz`` recommended).
        metadata : mapping or None, default=None
            JSON-able dict stored with the model.
        arrays : mapping of str to array-like or None, default=None
            Extra numeric arrays (names of letters, digits, ``_.-``, ≤ 64 characters).

        Returns
        -------
        path : pathlib.Path
        """
        self._check_fitted()
        if not self._parameters_finite():
            raise ParameterError("refusing to save a model with NaN or infinite parameters")
        path = Path(path)
        meta = {} if metadata is None else metadata
        if not isinstance(meta, Mapping):
            raise ParameterError(f"metadata must be a dict; got {type(meta).__name__}")
        try:
            meta = json.loads(_canonical_json(dict(meta)))
        except (TypeError, ValueError) as exc:
            raise ParameterError(f"metadata must be JSON-serialisable: {exc}") from None
        user: dict[str, np.ndarray] = {}
        for name, value in (arrays or {}).items():
            if not isinstance(name, str) or not _USER_NAME.match(name):
                raise ParameterError(f"array name {name!r} must match {_USER_NAME.pattern}")
            array = np.asarray(value)
            if array.dtype.hasobject or array.dtype.kind not in "biuf":
                raise ParameterError(f"array {name!r} must be numeric; got dtype {array.dtype}")
            user[name] = np.ascontiguousarray(array)
        params = {
            "weights": self.weights_, "visible_bias": self.visible_bias_,
            "hidden_bias": self.hidden_bias_,
            # z is the learned parameter (grouped per band when tied); σ is stored too for
            # readers of the file, and must agree with z on loading
            "log_variance": np.ascontiguousarray(self._log_var, dtype=_F32),
            "sigma": np.ascontiguousarray(self._sigma),
        }
        ordered = [(f"param.{k}", params[k]) for k in _PARAM_ARRAYS]
        ordered += [(f"user.{k}", user[k]) for k in sorted(user)]
        hyper = self.get_params()
        if hyper["layout"] is not None:
            hyper["layout"] = [int(n) for n in hyper["layout"]]
        header = {
            "format": FORMAT_NAME,
            "format_version": FORMAT_VERSION,
            "hyperparameters": _json_safe(hyper),
            "n_features_in": int(self.n_features_in_),
            "n_epochs": int(getattr(self, "n_epochs_", 0)),
            "learning_rate_scale": float(getattr(self, "learning_rate_scale_", 1.0)),
            "history": _json_safe(getattr(self, "history_", [])),
            "metadata": meta,
            "param_arrays": [name for name, _ in ordered if name.startswith("param.")],
            "user_arrays": sorted(user),
        }
        header["checksum"] = _content_digest(ordered, header)
        header_bytes = np.frombuffer(_canonical_json(header).encode("utf-8"), dtype=np.uint8)
        contents = dict(ordered)
        contents["header"] = header_bytes
        folder = path.parent if str(path.parent) else Path(".")
        if not folder.is_dir():
            raise ParameterError(f"cannot save model to {path}: folder {folder} does not exist")
        # ".NAME.*.part", the temporary name every timbrel output uses, so the trainer
        # finds and removes one a killed run left behind
        try:
            handle, temp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part",
                                                 dir=folder)
        except OSError as exc:
            raise OutputError(path, os_reason(exc)) from None
        try:
            with os.fdopen(handle, "wb") as stream:
                np.savez(stream, allow_pickle=False, **contents)
                stream.flush()
                os.fsync(stream.fileno())
            os.chmod(temp_name, 0o644)
            os.replace(temp_name, path)
        except BaseException as exc:
            if os.path.exists(temp_name):
                os.unlink(temp_name)
            if isinstance(exc, OSError):  # disk full, I/O error: name the file, no traceback
                raise OutputError(path, os_reason(exc)) from None
            raise
        return path

    @classmethod
    def load(cls, path: str | os.PathLike[str]) -> RBM:
        """Read a model file written by :meth:`save`, verifying it fully.

        Parameters
        ----------
        path : str or path-like

        Returns
        -------
        rbm : RBM
            Fitted, with ``metadata_`` set.

        Raises
        ------
        ModelFileError
            Naming the file and the reason (see :func:`read_model_file`).
        """
        return read_model_file(path).rbm


# --------------------------------------------------------------------------------------
# reading model files
# --------------------------------------------------------------------------------------


def _refuse(path: Path, reason: str) -> ModelFileError:
    return ModelFileError(f"{path}: {reason}")


def read_model_file(path: str | os.PathLike[str]) -> ModelFile:
    """Read and verify a model file.

    Refuses, with :class:`ModelFileError` naming the file and the reason: a missing
    file; anything that is not a complete zip (``.npz``) archive (truncated files
    included); a damaged member (zip CRC); a missing or unreadable header; another
    format; a newer format version; missing or unlisted arrays; object (pickled)
    arrays; wrong dtypes or shapes; NaN/Inf parameters or non-positive σ; a checksum
    mismatch; invalid hyperparameters.  Always loads with ``allow_pickle=False``.

    Parameters
    ----------
    path : str or path-like

    Returns
    -------
    model_file : ModelFile
    """
    path = Path(path)
    if not path.exists():
        raise _refuse(path, "no such model file")
    if not path.is_file():
        raise _refuse(path, "not a regular file")
    try:
        with open(path, "rb") as stream:
            magic = stream.read(4)
    except OSError as exc:
        raise _refuse(path, f"cannot be read ({exc.strerror})") from None
    if not zipfile.is_zipfile(path):
        if magic == b"PK\x03\x04":
            raise _refuse(path, "truncated (the zip directory at the end of the .npz is missing)")
        raise _refuse(path, "not a model file (not an .npz zip archive)")
    try:
        with np.load(path, allow_pickle=False) as archive:
            return _read_archive(path, archive)
    except ModelFileError:
        raise
    except zipfile.BadZipFile as exc:
        raise _refuse(path, f"damaged ({exc})") from None
    except Exception as exc:  # numpy's .npy header parser (ast) and zip
        # reader raise SyntaxError, TypeError, MemoryError, ... on a damaged file
        raise _refuse(path, f"unreadable ({type(exc).__name__}: {exc})") from None


def _load_member(path: Path, archive: Any, name: str) -> np.ndarray:
    try:
        return archive[name]
    except ValueError as exc:
        if "pickle" in str(exc).lower() or "object arrays" in str(exc).lower():
            raise _refuse(path, f"array {name!r} is a pickled object array (refused)") from None
        raise _refuse(path, f"array {name!r} is unreadable ({exc})") from None
    except zipfile.BadZipFile as exc:
        raise _refuse(path, f"array {name!r} is damaged ({exc})") from None
    except Exception as exc:  # a damaged .npy header fails in many ways
        raise _refuse(path, f"array {name!r} is truncated or damaged "
                            f"({type(exc).__name__}: {exc})") from None


def _read_archive(path: Path, archive: Any) -> ModelFile:
    names = set(archive.files)
    if "header" not in names:
        raise _refuse(path, "missing the header array (not a timbrel model file)")
    raw = _load_member(path, archive, "header")
    if raw.dtype != np.uint8 or raw.ndim != 1:
        raise _refuse(path, f"header must be 1-D uint8; got {raw.dtype} {raw.shape}")
    try:
        header = json.loads(raw.tobytes().decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise _refuse(path, f"header is not UTF-8 JSON ({exc})") from None
    if not isinstance(header, dict):
        raise _refuse(path, "header is not a JSON object")
    if header.get("format") != FORMAT_NAME:
        raise _refuse(path, f"format {header.get('format')!r} is not {FORMAT_NAME!r}")
    version: Any = header.get("format_version")
    if not _is_int(version) or version < 1:
        raise _refuse(path, f"invalid format version {version!r}")
    if version > FORMAT_VERSION:
        raise _refuse(path, f"format version {version} is newer than this timbrel reads "
                            f"({FORMAT_VERSION}); upgrade timbrel")
    for key in ("hyperparameters", "n_features_in", "metadata", "param_arrays", "user_arrays",
                "checksum"):
        if key not in header:
            raise _refuse(path, f"header lacks {key!r}")
    user_names = header["user_arrays"]
    if not isinstance(user_names, list) or not all(
            isinstance(n, str) and _USER_NAME.match(n) for n in user_names):
        raise _refuse(path, "header lists invalid user array names")
    listed = [f"param.{k}" for k in _PARAM_ARRAYS] + [f"user.{k}" for k in user_names]
    if header["param_arrays"] != listed[: len(_PARAM_ARRAYS)]:
        raise _refuse(path, f"header lists parameter arrays {header['param_arrays']!r}")
    missing = [n for n in listed if n not in names]
    if missing:
        raise _refuse(path, f"missing array(s) {', '.join(missing)}")
    unlisted = sorted(names - set(listed) - {"header"})
    if unlisted:
        raise _refuse(path, f"holds array(s) not listed in its header: {', '.join(unlisted)}")
    loaded = [(name, _load_member(path, archive, name)) for name in listed]
    values = dict(loaded)

    n_visible = header["n_features_in"]
    hyper = dict(header["hyperparameters"]) if isinstance(header["hyperparameters"], dict) \
        else None
    if hyper is None or not _is_int(n_visible) or n_visible < 1:
        raise _refuse(path, "header holds invalid hyperparameters or n_features_in")
    if hyper.get("layout") is not None:
        hyper["layout"] = tuple(hyper["layout"])
    n_hidden = hyper.get("n_hidden")
    shapes = {"param.weights": (n_visible, n_hidden), "param.visible_bias": (n_visible,),
              "param.hidden_bias": (n_hidden,), "param.sigma": (n_visible,)}
    log_var = values["param.log_variance"]
    if log_var.ndim != 1:
        raise _refuse(path, f"array 'param.log_variance' must be 1-D; got shape {log_var.shape}")
    shapes["param.log_variance"] = log_var.shape
    for name, shape in shapes.items():
        array = values[name]
        if array.dtype != _F32:
            raise _refuse(path, f"array {name!r} must be float32; got {array.dtype}")
        if array.shape != shape:
            raise _refuse(path, f"array {name!r} has shape {array.shape}; expected {shape}")
        if not np.isfinite(array).all():
            raise _refuse(path, f"array {name!r} holds NaN or infinite values")
    if not (values["param.sigma"] > 0).all():
        raise _refuse(path, "array 'param.sigma' holds non-positive values")
    stated = header.pop("checksum")
    actual = _content_digest(loaded, header)
    if stated != actual:
        raise _refuse(path, "checksum mismatch (the file was modified or damaged)")

    try:
        rbm = RBM(**hyper)
        rbm._check_params()
        rbm.initialize(int(n_visible))
    except (ParameterError, TypeError) as exc:
        raise _refuse(path, f"invalid hyperparameters ({exc})") from None
    rbm.weights_ = np.ascontiguousarray(values["param.weights"])
    rbm.visible_bias_ = np.ascontiguousarray(values["param.visible_bias"])
    rbm.hidden_bias_ = np.ascontiguousarray(values["param.hidden_bias"])
    if log_var.shape != rbm._log_var.shape:
        raise _refuse(path, f"array 'param.log_variance' has shape {log_var.shape}; expected "
                            f"{rbm._log_var.shape} for these hyperparameters")
    rbm._log_var = log_var.copy()
    rbm._sync_variance()
    if not np.array_equal(rbm._sigma, values["param.sigma"]):
        raise _refuse(path, "arrays 'param.sigma' and 'param.log_variance' disagree")
    rbm._velocity = {k: np.zeros_like(v) for k, v in (
        ("weights", rbm.weights_), ("visible_bias", rbm.visible_bias_),
        ("hidden_bias", rbm.hidden_bias_), ("log_variance", rbm._log_var))}
    rbm.n_epochs_ = int(header.get("n_epochs", 0))
    rbm.learning_rate_scale_ = float(header.get("learning_rate_scale", 1.0))
    rbm.history_ = list(header.get("history", []))
    metadata = header["metadata"] if isinstance(header["metadata"], dict) else {}
    rbm.metadata_ = metadata
    user_arrays = {n: values[f"user.{n}"] for n in user_names}
    return ModelFile(rbm=rbm, metadata=metadata, arrays=user_arrays, checksum=stated)
