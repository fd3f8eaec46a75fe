# ruff: noqa: RUF002  (docstrings and messages use math notation: σ, −, ×)
"""The estimator: a restricted Boltzmann machine for real-valued frames, scikit-learn style.

Energy, with σᵢ the *standard deviation* of visible unit i (Cho, Ilin & Raiko 2011)::

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

import inspect
import json
import math
import os
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .._errors import ParameterError
from ._core import as_float32_matrix
from ._files import (
    canonical_json,
    json_safe,
    read_model_archive,
    refuse,
    write_model_archive,
)
from ._guard import guarded_epoch
from ._kernels import F32
from ._params import is_int
from ._queries import EXACT_MAX_HIDDEN, RBMQueries
from ._state import PARAMETER_NAMES, TrainingState, check_array

__all__ = ["EXACT_MAX_HIDDEN", "RBM", "ModelFile", "rbm_from_parameters", "read_model_file"]

_TRANSFORM_CHUNK = 8192


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


class RBM(RBMQueries):
    r"""Restricted Boltzmann machine with Gaussian (or binary) visibles, trained by CD-k.

    ``__init__`` only stores the hyperparameters; they are validated by ``fit``,
    ``partial_fit``, ``fit_epoch`` and ``initialize``.  The estimator models the
    visible vectors exactly as given (no standardisation inside; that is the
    pipeline's job), so ``sigma_floor``, ``sigma_ceiling`` and ``initial_sigma`` are in
    the units of X.  float32 in, float32 out; float64 input is converted.

    Parameters
    ----------
    n_hidden : int, default=1024
        Number of hidden units, ≥ 1.  Many hidden units help (Nair & Hinton 2010).
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
    learning_rate : float, default=3e-3
        Step size for weights and biases, > 0.  Gaussian visibles need a small rate
        (Hinton 2010 suggests 1–2 orders below the binary case); 0.01–0.1 suits binary
        visibles.
    variance_learning_rate : float, default=3e-4
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
        differ from 1 by ``1e-5`` (and at the end of each epoch), since a single update's
        factor is within float32's rounding of 1.
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
    Learning ascends the log-likelihood with CD-k (:mod:`timbrel.model._step` holds the
    gradient, :mod:`timbrel.model._update` the update rule, :mod:`timbrel.model._guard`
    the guarded epoch); the unit kinds are the objects of :mod:`timbrel.model.units`.

    Examples
    --------
    >>> import numpy as np
    >>> from timbrel import RBM
    >>> X = np.random.default_rng(0).standard_normal((256, 12)).astype(np.float32)
    >>> rbm = RBM(n_hidden=16, epochs=2, seed=0).fit(X)
    >>> rbm.transform(X[:3]).shape
    (3, 16)
    >>> rbm.sigma_.shape
    (12,)
    """

    metadata_: dict[str, Any]  # set only by load/read_model_file, as documented above
    _state: TrainingState | None  # optimiser state; see _training_state

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
        learning_rate: float = 3e-3,
        variance_learning_rate: float = 3e-4,
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
        if not is_int(n_visible) or n_visible < 1:
            raise ParameterError(f"n_visible must be an integer ≥ 1; got {n_visible!r}")
        n_visible = int(n_visible)
        if self.layout is not None and self.layout[0] * self.layout[1] != n_visible:
            raise ParameterError(
                f"layout {tuple(self.layout)} describes {self.layout[0] * self.layout[1]} "
                f"visible units but n_visible is {n_visible}"
            )
        rng = np.random.default_rng(self.seed)
        self.n_features_in_ = n_visible
        weights = rng.standard_normal((n_visible, self.n_hidden), dtype=F32)
        weights *= F32(self.weight_scale)
        self.weights_ = weights
        self.hidden_bias_ = np.zeros(self.n_hidden, F32)
        self.visible_bias_ = self._start_visible_bias(n_visible, visible_mean)
        start = 2.0 * math.log(self.initial_sigma) if self._visible_units.has_variance else 0.0
        self._log_variance = np.full(self._n_groups, start, F32)
        self._sync_variance()
        self._state = TrainingState.fresh(rng, self._params())
        self.history_: list[dict[str, Any]] = []
        self.n_epochs_ = 0
        self.learning_rate_scale_ = 1.0
        return self

    def _start_visible_bias(self, n_visible: int, visible_mean: Any) -> np.ndarray:
        if visible_mean is None:
            return np.zeros(n_visible, F32)
        mean = np.asarray(visible_mean, dtype=np.float64).reshape(-1)
        if mean.shape != (n_visible,) or not np.isfinite(mean).all():
            raise ParameterError(
                f"visible_mean must be {n_visible} finite values; got shape {mean.shape}"
            )
        return self._visible_units.start_bias(mean).astype(F32)

    def _training_state(self) -> TrainingState:
        """The optimiser state, made fresh after load or manual parameter assignment."""
        state = getattr(self, "_state", None)
        if state is None:
            state = self._state = TrainingState.fresh(np.random.default_rng(self.seed),
                                                      self._params())
        for name, default in (("n_epochs_", 0), ("learning_rate_scale_", 1.0)):
            if not hasattr(self, name):
                setattr(self, name, default)
        if not hasattr(self, "history_"):
            self.history_ = []
        return state

    # ---------------------------------------------------------------- inference

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
        hidden = self._hidden_units
        scaled_weights = self._visible_units.scale(self.weights_, self._inv_var[:, None])
        out = np.empty((X.shape[0], self.n_hidden), F32)
        rows = min(_TRANSFORM_CHUNK, X.shape[0])
        tmp = np.empty((rows, self.n_hidden), F32)
        inputs = np.empty((rows, self.n_hidden), F32) if hidden.mean_rereads_input else None
        for start in range(0, X.shape[0], _TRANSFORM_CHUNK):
            chunk = out[start:start + _TRANSFORM_CHUNK]
            x = chunk if inputs is None else inputs[: chunk.shape[0]]
            np.matmul(X[start:start + _TRANSFORM_CHUNK], scaled_weights, out=x)
            x += self.hidden_bias_
            hidden.mean(x, chunk, tmp[: chunk.shape[0]])
        return out

    def fit_transform(self, X: Any, y: Any = None) -> np.ndarray:
        """Fit to X, then return ``transform(X)``; see :meth:`fit` and :meth:`transform`."""
        return self.fit(X, y).transform(X)

    # ---------------------------------------------------------------- training

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
            ``epoch`` (epochs completed: ``epoch + 1``), ``recon_error`` (mean squared
            error of the reconstruction from
            sampled hiddens, units of X), ``relative_error``, ``mean_hidden_activity``,
            ``dead_fraction`` (share of hidden units whose input was never positive),
            ``sigma_min``, ``sigma_max``, ``rollbacks``, ``rollback_reasons``,
            ``limited_steps``, ``learning_rate_scale``, ``learning_rate``, ``momentum``,
            ``n_rows``, ``seconds`` (this epoch's).
        """
        self._check_params()
        if not callable(make_batches):
            raise ParameterError(f"make_batches must be a zero-argument callable; got "
                                 f"{type(make_batches).__name__}")
        if not is_int(epoch) or epoch < 0:
            raise ParameterError(f"epoch must be an integer ≥ 0; got {epoch!r}")
        if not hasattr(self, "weights_"):
            first = next(iter(make_batches()), None)
            if first is None:
                raise ParameterError("make_batches() yielded no minibatches")
            first = as_float32_matrix(first, name="minibatch 0")
            self.initialize(first.shape[1], visible_mean=first.mean(axis=0))
        self._check_fitted()
        self._training_state()
        stats = guarded_epoch(self, make_batches, int(epoch))
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
        X = self._training_rows(X, restart=not self.warm_start)
        state = self._training_state()
        n_rows, size = X.shape[0], self.batch_size
        buffer = np.empty((min(size, n_rows), X.shape[1]), F32)
        for _ in range(self.epochs):
            order = state.rng.permutation(n_rows)

            def make_batches(order: np.ndarray = order) -> Iterable[np.ndarray]:
                for start in range(0, n_rows, size):
                    index = order[start:start + size]
                    yield np.take(X, index, axis=0, out=buffer[: index.shape[0]])

            self.fit_epoch(make_batches, epoch=self.n_epochs_)
        return self

    def _training_rows(self, X: Any, *, restart: bool) -> np.ndarray:
        """X as float32 rows of the model's width; the model initialised from X first when
        ``restart`` or not yet fitted (visible biases from the data mean)."""
        self._check_params()
        X = as_float32_matrix(X, name="X")
        if restart or not hasattr(self, "weights_"):
            self.initialize(X.shape[1], visible_mean=X.mean(axis=0, dtype=np.float64))
        return self._check_input(X)

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
        X = self._training_rows(X, restart=False)
        size = self.batch_size

        def make_batches() -> Iterable[np.ndarray]:
            for start in range(0, X.shape[0], size):
                yield X[start:start + size]

        self._training_state()
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
        train = self._training_state()
        state: dict[str, Any] = {k: v.copy() for k, v in self._params().items()}
        state.update(train.to_dict(json_safe))
        state["epoch"] = int(self.n_epochs_)
        state["learning_rate_scale"] = float(self.learning_rate_scale_)
        state["history"] = json_safe(self.history_)
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
        required = (*PARAMETER_NAMES, "rng", "epoch",
                    *(f"velocity_{name}" for name in PARAMETER_NAMES))
        missing = [k for k in required if k not in state]
        if missing:
            raise ParameterError(f"state is missing {', '.join(missing)}")
        weights = np.array(state["weights"], dtype=F32, order="C")
        if weights.ndim != 2 or weights.shape[1] != self.n_hidden:
            raise ParameterError(
                f"state weights have shape {weights.shape}; this RBM has n_hidden="
                f"{self.n_hidden}"
            )
        self.initialize(weights.shape[0])
        params = {name: check_array(state[name], name, current.shape)
                  for name, current in self._params().items()}
        train = self._training_state()
        train.load(state, chain_shape=(self.batch_size, self.n_hidden))
        self.weights_, self.visible_bias_ = params["weights"], params["visible_bias"]
        self.hidden_bias_, self._log_variance = params["hidden_bias"], params["log_variance"]
        self._sync_variance()
        self.n_epochs_ = int(state["epoch"])
        self.learning_rate_scale_ = float(state.get("learning_rate_scale", 1.0))
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
        meta = {} if metadata is None else metadata
        if not isinstance(meta, Mapping):
            raise ParameterError(f"metadata must be a dict; got {type(meta).__name__}")
        try:
            meta = json.loads(canonical_json(dict(meta)))
        except (TypeError, ValueError) as exc:
            raise ParameterError(f"metadata must be JSON-serialisable: {exc}") from None
        params = self.parameter_arrays()
        hyper = self.get_params()
        if hyper["layout"] is not None:
            hyper["layout"] = [int(n) for n in hyper["layout"]]
        header = {
            "hyperparameters": json_safe(hyper),
            "n_features_in": int(self.n_features_in_),
            "n_epochs": int(getattr(self, "n_epochs_", 0)),
            "learning_rate_scale": float(getattr(self, "learning_rate_scale_", 1.0)),
            "history": json_safe(getattr(self, "history_", [])),
            "metadata": meta,
        }
        return write_model_archive(path, params, header, arrays)

    def parameter_arrays(self) -> dict[str, np.ndarray]:
        """The fitted parameters as a model file stores them.

        Returns
        -------
        dict of str to ndarray
            ``weights`` (n_visible, n_hidden), ``visible_bias``, ``hidden_bias``,
            ``log_variance`` (z = log σ², grouped per band when tied: the learned
            parameter) and ``sigma`` (n_visible,), all float32 (views, not copies).
        """
        self._check_fitted()
        return {**self._params(),
                "log_variance": np.ascontiguousarray(self._log_variance, dtype=F32),
                "sigma": np.ascontiguousarray(self._sigma)}

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

    Examples
    --------
    >>> import numpy as np, tempfile, os
    >>> from timbrel import RBM
    >>> from timbrel.model import read_model_file
    >>> X = np.random.default_rng(0).standard_normal((64, 4)).astype(np.float32)
    >>> path = os.path.join(tempfile.mkdtemp(), "m.npz")
    >>> _ = RBM(n_hidden=3, epochs=1, seed=0).fit(X).save(path, metadata={"note": "x"})
    >>> read_model_file(path).metadata
    {'note': 'x'}
    """
    archive = read_model_archive(path)
    header = archive.header
    rbm = rbm_from_parameters(archive.hyperparameters, int(header["n_features_in"]),
                              archive.params, source=path, prefix="param.")
    rbm.n_epochs_ = int(header.get("n_epochs", 0))
    rbm.learning_rate_scale_ = float(header.get("learning_rate_scale", 1.0))
    rbm.history_ = list(header.get("history", []))
    metadata = header["metadata"] if isinstance(header["metadata"], dict) else {}
    rbm.metadata_ = metadata
    return ModelFile(rbm=rbm, metadata=metadata, arrays=dict(archive.user),
                     checksum=archive.checksum)


def rbm_from_parameters(hyperparameters: Mapping[str, Any], n_features_in: int,
                        params: Mapping[str, np.ndarray], *, source: str | os.PathLike[str],
                        prefix: str = "") -> RBM:
    """A fitted :class:`RBM` from its hyperparameters and stored parameter arrays.

    Parameters
    ----------
    hyperparameters : mapping
        Keywords of :class:`RBM` (as :meth:`RBM.get_params` gives them).
    n_features_in : int
    params : mapping of str to ndarray
        ``weights``, ``visible_bias``, ``hidden_bias``, ``log_variance`` and ``sigma``
        (as :meth:`RBM.parameter_arrays` gives them), float32, checked by the caller.
    source : str or path-like
        The file they come from, named in errors.
    prefix : str, default ""
        How the file names the arrays (in errors).

    Raises
    ------
    ModelFileError
        Invalid hyperparameters, a variance array of the wrong size, or σ that
        disagrees with the log-variances.
    """
    path = Path(source)
    try:
        rbm = RBM(**hyperparameters)
        rbm.initialize(int(n_features_in))
    except (ParameterError, TypeError) as exc:
        raise refuse(path, f"invalid hyperparameters ({exc})") from None
    rbm.weights_ = np.ascontiguousarray(params["weights"])
    rbm.visible_bias_ = np.ascontiguousarray(params["visible_bias"])
    rbm.hidden_bias_ = np.ascontiguousarray(params["hidden_bias"])
    log_var = params["log_variance"]
    if log_var.shape != rbm._log_variance.shape:
        raise refuse(path, f"array '{prefix}log_variance' has shape {log_var.shape}; expected "
                           f"{rbm._log_variance.shape} for these hyperparameters")
    rbm._log_variance = log_var.copy()
    rbm._sync_variance()
    if not np.array_equal(rbm._sigma, params["sigma"]):
        raise refuse(path, f"arrays '{prefix}sigma' and '{prefix}log_variance' disagree")
    rbm._state = None  # made fresh, from the seed, if training goes on
    return rbm
