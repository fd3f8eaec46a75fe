# ruff: noqa: RUF002  (docstrings and messages use math notation: σ, −, β, ×)
"""How likely the data is under a trained model: log Z by annealed importance sampling.

The RBM's free energy F(v) gives each visible vector's density up to the partition function
Z: log p(v) = −F(v) − log Z.  :func:`log_partition` computes log Z exactly when the hidden
units are binary and few (≤ ``EXACT_MAX_HIDDEN``), by enumerating hidden states with the
Gaussian visibles integrated in closed form (:meth:`RBM.exact_log_partition`), and
estimates it otherwise by annealed importance sampling (AIS; Neal 2001, as applied to RBMs
by Salakhutdinov & Murray 2008).  :func:`score` does this for a model file and a frame
cache, on exactly the standardised context windows the trainer feeds the model.

The annealing path
------------------
Write a hidden unit as K binary copies with bias offsets oₖ: one copy with o = 0 for binary
units; oₖ = −k + ½, k = 1 … K, for stepped units (K = ``n_copies``) and for rectified ones
(see below).  The target's energy, with hₖⱼ the copies and hⱼ = Σₖ hₖⱼ, is

    E_B(v, h) = V_B(v) − Σⱼₖ (cⱼ + oₖ) hₖⱼ − Σⱼ aⱼ(v) hⱼ,

with aⱼ(v) = Σᵢ Wᵢⱼ vᵢ / σᵢ² and V_B(v) = Σᵢ (vᵢ − bᵢ)² / (2σᵢ²) for Gaussian visibles,
aⱼ(v) = Σᵢ Wᵢⱼ vᵢ and V_B(v) = −b·v for binary ones.  The base-rate model A has no
weights: its visibles are independent, Gaussian with the data's per-unit mean μᵢ and
variance sᵢ² (V_A(v) = Σᵢ (vᵢ − μᵢ)² / (2sᵢ²)) or Bernoulli with the data's marginals
(V_A(v) = −b_A·v, b_A the clipped log-odds), and its hidden copies keep the target's own
biases cⱼ + oₖ, so that at β = 0 the copies are on as often as the model's biases say and
not half the time (which for many copies would put thousands of nats of entropy at the
start of the path).  The intermediate distributions mix the energies (Salakhutdinov &
Murray 2008, eq. 11 with both models sharing the hidden copies):

    E_β = (1 − β) E_A + β E_B,
    log p*_β(v) = −(1 − β) V_A(v) − β V_B(v) + Σⱼₖ softplus(cⱼ + oₖ + β aⱼ(v)),

log Z_0 = log Z_A + Σⱼₖ softplus(cⱼ + oₖ) with log Z_A = Σᵢ ½ log(2π sᵢ²) (Gaussian) or
Σᵢ softplus(b_A,ᵢ) (binary), and p*_1 = exp(−F).

The transition at β is one sweep of block Gibbs sampling, which leaves p_β invariant:

    hₖⱼ | v ~ Bernoulli(sigmoid(cⱼ + oₖ + β aⱼ(v))), independently;
    vᵢ | h ~ N(mᵢ, 1/λᵢ), λᵢ = (1 − β)/sᵢ² + β/σᵢ²,
              mᵢ = [(1 − β) μᵢ/sᵢ² + β (bᵢ + (W h)ᵢ)/σᵢ²] / λᵢ            (Gaussian),
    vᵢ | h ~ Bernoulli(sigmoid((1 − β) b_A,ᵢ + β (bᵢ + (W h)ᵢ)))         (binary).

A chain starts with v drawn exactly from the base, then for β₁ < … < β_T = 1 adds
log p*_βₜ(v) − log p*_βₜ₋₁(v) to its log weight and, before the next temperature, applies the
transition at βₜ.  log Z = log Z_0 + log mean exp(log weights) over the chains.  The spread
reported is the standard deviation of that estimate over bootstrap resamples of the
chains; it says how much the chains disagree and does not include AIS's tendency to
under-estimate log Z when the path is too short (compare a run with more temperatures).

Rectified hidden units
----------------------
The model defines a rectified unit's free energy as the stepped one with infinitely many
copies (``model.RELU_WINDOW_COPIES``); its noisy-rectified sampler max(0, x + N(0,
sigmoid(x))) only approximates that unit's conditional, so it is not an exact transition
for any p_β.  AIS therefore anneals to the *stepped* model with K copies per unit, sampled
exactly copy by copy.  :func:`score` picks K = ⌈max x + ``RELU_COPY_MARGIN``⌉ over every
scored window, so on every scored window the stepped free energy equals the model's
rectified one to within 5e-7 per unit (the neglected copies have input below −15;
Σₙ e^(−15−n) < 4.9e-7).  Note that the infinite-copy model's own Z is at least this one and
can be infinite: its log-density grows like |z|²(Σⱼ relu(w̃ⱼ·u)² − 1)/2 along a direction u
of z = (v − b)/σ, with w̃ⱼ the j-th column of W/σ, so Z is infinite when some column has
norm > 1 and finite when the spectral norm of W/σ is below 1 (:func:`relu_partition_bound`
tells which holds).

References
----------
Neal, R. M. (2001). Annealed importance sampling. Statistics and Computing 11, 125–139.
Salakhutdinov, R. & Murray, I. (2008). On the quantitative analysis of deep belief
networks. ICML.
"""

from __future__ import annotations

import dataclasses
import math
import time
from pathlib import Path
from typing import Any

import numpy as np
from scipy.special import expit, logsumexp

from ._errors import ParameterError
from ._progress import progress_bar
from .cache import FrameCache
from .model import EXACT_MAX_HIDDEN, RBM
from .model.units import BinaryHidden, HiddenUnits, SteppedHidden
from .pipeline import FeaturePipeline, load_pipeline
from .windows import WindowBatches, check_config_against_cache, split_seed, window_sets

__all__ = ["DEFAULT_CHAINS", "DEFAULT_TEMPERATURES", "EXACT_MAX_HIDDEN", "RELU_COPY_MARGIN",
           "PartitionEstimate", "ScoreResult", "SetScore", "ais_log_partition",
           "log_partition", "relu_partition_bound", "score", "temperature_schedule"]

DEFAULT_CHAINS = 100
"""AIS chains (independent runs) by default."""

DEFAULT_TEMPERATURES = 1000
"""Intermediate distributions (inverse temperatures after β = 0) by default."""

RELU_COPY_MARGIN = 15.5
"""Copies of a rectified unit beyond its largest scored input: K = ⌈max x + 15.5⌉."""

BOOTSTRAP_RESAMPLES = 1000
"""Resamples of the chains for the spread of the log Z estimate."""

#: Smallest base-rate variance and the clip of base-rate marginals (constant units).
_VARIANCE_FLOOR = 1e-6
_MARGINAL_CLIP = 1e-3
#: Frames of the training windows drawn (at most) for the base-rate statistics.
_BASE_FRAMES = 65536


def temperature_schedule(n_temperatures: int) -> np.ndarray:
    """Inverse temperatures 0 = β₀ < β₁ < … < β_T = 1 for AIS.

    Spaced like the schedule of Salakhutdinov & Murray (2008) (from memory: 1,000 steps
    from 0 to 0.5, 4,000 from 0.5 to 0.9, 10,000 from 0.9 to 1), scaled to T steps: a
    fifteenth of the steps cover [0, 0.5], four fifteenths [0.5, 0.9], the rest [0.9, 1].

    Parameters
    ----------
    n_temperatures : int
        T ≥ 1, the number of intermediate distributions after β = 0 (the last is the model).

    Returns
    -------
    betas : ndarray of shape (T + 1,), float64
    """
    if isinstance(n_temperatures, bool) or not isinstance(n_temperatures, (int, np.integer)) \
            or n_temperatures < 1:
        raise ParameterError(f"n_temperatures must be an integer ≥ 1; got {n_temperatures!r}")
    steps = np.linspace(0.0, 1.0, int(n_temperatures) + 1)
    betas = np.interp(steps, [0.0, 1 / 15, 5 / 15, 1.0], [0.0, 0.5, 0.9, 1.0])
    betas[0], betas[-1] = 0.0, 1.0
    return betas


@dataclasses.dataclass(frozen=True)
class PartitionEstimate:
    """log Z of a model, exact or by AIS.

    Attributes
    ----------
    log_z : float
    log_z_std : float
        Bootstrap standard deviation over the chains (0 when exact).
    method : {"exact", "ais"}
    n_chains, n_temperatures : int
        0 when exact.
    copies : int
        Binary copies per hidden unit of the annealed model (1 for binary units).
    seed : int or None
    log_z_base : float or None
        log Z_0 of the start of the path (AIS only).
    log_weights : ndarray of shape (n_chains,), float64
        Each chain's final log importance weight (empty when exact).
    effective_chains : float
        (Σw)² / Σw², between 1 and n_chains; few effective chains mean a rough estimate.
    """

    log_z: float
    log_z_std: float
    method: str
    n_chains: int = 0
    n_temperatures: int = 0
    copies: int = 1
    seed: int | None = None
    log_z_base: float | None = None
    log_weights: np.ndarray = dataclasses.field(default_factory=lambda: np.empty(0))
    effective_chains: float = 0.0


@dataclasses.dataclass(frozen=True)
class _Path:
    """The model's parameters in float64 and the base rate, as the annealing uses them."""

    gaussian: bool
    weights: np.ndarray         # (V, H)
    input_weights: np.ndarray   # (V, H): W/σ² per row (Gaussian) or W
    visible_bias: np.ndarray    # (V,)
    inv_var: np.ndarray         # (V,) 1/σ² (ones for binary)
    hidden_bias: np.ndarray     # (H,)
    offsets: np.ndarray         # (K,)
    units: HiddenUnits          # the hidden units in their annealed (binary copies) form
    base_mean: np.ndarray       # (V,) μ (Gaussian) or b_A (binary)
    base_inv_var: np.ndarray    # (V,) 1/s² (Gaussian; ones for binary)

    def hidden_term(self, a: np.ndarray, beta: float) -> np.ndarray:
        """Σⱼₖ softplus(cⱼ + oₖ + β aⱼ) per row of a (n, H)."""
        return self.units.log_partial(self.hidden_bias + beta * a).sum(axis=1)

    def visible_terms(self, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(−V_A(v), −V_B(v)) per row."""
        if self.gaussian:
            base = -0.5 * (np.square(v - self.base_mean) @ self.base_inv_var)
            model = -0.5 * (np.square(v - self.visible_bias) @ self.inv_var)
        else:
            base, model = v @ self.base_mean, v @ self.visible_bias
        return base, model

    def log_z_base(self) -> float:
        if self.gaussian:
            visible = 0.5 * float(np.sum(np.log(2 * np.pi / self.base_inv_var)))
        else:
            visible = float(np.logaddexp(0.0, self.base_mean).sum())
        return visible + float(self.hidden_term(np.zeros((1, len(self.hidden_bias))), 0.0)[0])

    def sample_base(self, n: int, rng: np.random.Generator) -> np.ndarray:
        shape = (n, len(self.base_mean))
        if self.gaussian:
            return self.base_mean + rng.standard_normal(shape) / np.sqrt(self.base_inv_var)
        return (rng.random(shape) < expit(self.base_mean)).astype(np.float64)

    def sample_hidden(self, a: np.ndarray, beta: float, rng: np.random.Generator) -> np.ndarray:
        x = self.hidden_bias + beta * a
        h = np.zeros_like(x)
        for offset in self.offsets:
            h += rng.random(x.shape) < expit(x + offset)
        return h

    def sample_visible(self, h: np.ndarray, beta: float, rng: np.random.Generator
                       ) -> np.ndarray:
        top_down = self.visible_bias + h @ self.weights.T
        if self.gaussian:
            precision = (1 - beta) * self.base_inv_var + beta * self.inv_var
            mean = ((1 - beta) * self.base_mean * self.base_inv_var
                    + beta * top_down * self.inv_var) / precision
            return mean + rng.standard_normal(mean.shape) / np.sqrt(precision)
        p = expit((1 - beta) * self.base_mean + beta * top_down)
        return (rng.random(p.shape) < p).astype(np.float64)


def _check_rbm(rbm: Any) -> RBM:
    if not isinstance(rbm, RBM) or not hasattr(rbm, "weights_"):
        raise ParameterError("log Z needs a fitted timbrel RBM")
    return rbm


def _annealing_path(rbm: RBM, visible_mean: Any, visible_var: Any, copies: int | None) -> _Path:
    n_visible = rbm.n_features_in_
    gaussian = rbm.visible == "gaussian"
    mean = np.asarray(visible_mean, np.float64).reshape(-1)
    if mean.shape != (n_visible,) or not np.isfinite(mean).all():
        raise ParameterError(f"visible_mean must be {n_visible} finite values; got shape "
                             f"{np.shape(visible_mean)}")
    if gaussian:
        if visible_var is None:
            raise ParameterError("Gaussian visibles need visible_var for the base rate")
        var = np.asarray(visible_var, np.float64).reshape(-1)
        if var.shape != (n_visible,) or not np.isfinite(var).all() or (var < 0).any():
            raise ParameterError(f"visible_var must be {n_visible} finite values ≥ 0")
        base_mean, base_inv_var = mean, 1.0 / np.maximum(var, _VARIANCE_FLOOR)
    else:
        p = np.clip(mean, _MARGINAL_CLIP, 1 - _MARGINAL_CLIP)
        base_mean, base_inv_var = np.log(p / (1 - p)), np.ones(n_visible)
    units: HiddenUnits
    if rbm.hidden == "binary":
        offsets, units = np.zeros(1), BinaryHidden()
    else:
        n = rbm.n_copies if rbm.hidden == "stepped" else copies
        if n is None:
            raise ParameterError("rectified hidden units are annealed in their stepped form: "
                                 "give copies (score() derives it from the data)")
        if rbm.hidden == "stepped" and copies is not None and copies != rbm.n_copies:
            raise ParameterError(f"a stepped model has {rbm.n_copies} copies per unit; "
                                 f"got copies={copies}")
        if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
            raise ParameterError(f"copies must be an integer ≥ 1; got {n!r}")
        offsets, units = 0.5 - np.arange(1, int(n) + 1, dtype=np.float64), SteppedHidden(n)
    weights = np.asarray(rbm.weights_, np.float64)
    inv_var = (1.0 / np.square(np.asarray(rbm.sigma_, np.float64)) if gaussian
               else np.ones(n_visible))
    return _Path(gaussian=gaussian, weights=weights, input_weights=weights * inv_var[:, None],
                 visible_bias=np.asarray(rbm.visible_bias_, np.float64), inv_var=inv_var,
                 hidden_bias=np.asarray(rbm.hidden_bias_, np.float64), offsets=offsets, units=units,
                 base_mean=base_mean, base_inv_var=base_inv_var)


def ais_log_partition(
    rbm: RBM,
    *,
    visible_mean: Any,
    visible_var: Any = None,
    copies: int | None = None,
    n_chains: int = DEFAULT_CHAINS,
    n_temperatures: int = DEFAULT_TEMPERATURES,
    seed: int = 0,
    progress: bool = False,
) -> PartitionEstimate:
    """Estimate log Z of a fitted RBM by annealed importance sampling.

    The path, the base rate and the transitions are those of the module docstring.  All
    chains run together (arrays of shape (n_chains, ·)); weights accumulate in float64.

    Parameters
    ----------
    rbm : RBM
        Fitted; any visible and hidden kind.
    visible_mean : array-like of shape (n_visible,)
        The data's per-unit mean: the base rate's mean (Gaussian visibles) or marginal
        probabilities (binary visibles, clipped to [0.001, 0.999]).
    visible_var : array-like of shape (n_visible,) or None, default=None
        The data's per-unit variance (floored at 1e-6); needed for Gaussian visibles.
    copies : int or None, default=None
        Copies per rectified unit in the annealed stepped form (required for relu); for a
        stepped model it must be None or ``n_copies``; ignored for binary units.
    n_chains : int, default=100
        Independent AIS runs, ≥ 2.
    n_temperatures : int, default=1000
        Intermediate distributions, ≥ 1 (see :func:`temperature_schedule`).
    seed : int, default=0
        Seed of the chains' generator and of the bootstrap.
    progress : bool, default=False
        Show a progress bar over the temperatures.

    Returns
    -------
    PartitionEstimate
        ``method == "ais"``.
    """
    rbm = _check_rbm(rbm)
    if isinstance(n_chains, bool) or not isinstance(n_chains, (int, np.integer)) or n_chains < 2:
        raise ParameterError(f"n_chains must be an integer ≥ 2; got {n_chains!r}")
    betas = temperature_schedule(n_temperatures)
    path = _annealing_path(rbm, visible_mean, visible_var, copies)
    rng = np.random.default_rng([seed, 0xA15])
    v = path.sample_base(int(n_chains), rng)
    log_weights = np.zeros(int(n_chains))
    n_steps = len(betas) - 1
    with progress_bar(progress) as bar:
        task = bar.add_task("AIS", total=n_steps, info=f"{n_chains} chains")
        for step in range(1, n_steps + 1):
            previous, beta = betas[step - 1], betas[step]
            a = v @ path.input_weights
            base_term, model_term = path.visible_terms(v)
            log_weights += ((beta - previous) * (model_term - base_term)
                            + path.hidden_term(a, beta) - path.hidden_term(a, previous))
            if step < n_steps:
                v = path.sample_visible(path.sample_hidden(a, beta, rng), beta, rng)
            if step % 50 == 0 or step == n_steps:
                bar.update(task, completed=step)
    log_z_base = path.log_z_base()
    log_mean = float(logsumexp(log_weights) - math.log(n_chains))
    boot_rng = np.random.default_rng([seed, 0xB00])
    picks = boot_rng.integers(0, n_chains, size=(BOOTSTRAP_RESAMPLES, n_chains))
    boot = logsumexp(log_weights[picks], axis=1) - math.log(n_chains)
    normalised = np.exp(log_weights - log_weights.max())
    return PartitionEstimate(
        log_z=log_z_base + log_mean, log_z_std=float(np.std(boot, ddof=1)), method="ais",
        n_chains=int(n_chains), n_temperatures=int(n_steps), copies=len(path.offsets),
        seed=seed, log_z_base=log_z_base, log_weights=log_weights,
        effective_chains=float(normalised.sum() ** 2 / np.square(normalised).sum()))


def log_partition(
    rbm: RBM,
    *,
    visible_mean: Any,
    visible_var: Any = None,
    copies: int | None = None,
    method: str = "auto",
    n_chains: int = DEFAULT_CHAINS,
    n_temperatures: int = DEFAULT_TEMPERATURES,
    seed: int = 0,
    progress: bool = False,
) -> PartitionEstimate:
    """log Z of a fitted RBM: exact for few binary hiddens, else AIS.

    Parameters
    ----------
    rbm : RBM
    method : {"auto", "exact", "ais"}, default="auto"
        ``"auto"`` enumerates when the hidden units are binary and at most
        ``EXACT_MAX_HIDDEN`` (20), and runs AIS otherwise.
    visible_mean, visible_var, copies, n_chains, n_temperatures, seed, progress
        As for :func:`ais_log_partition` (unused when exact).

    Returns
    -------
    PartitionEstimate
    """
    rbm = _check_rbm(rbm)
    if method not in ("auto", "exact", "ais"):
        raise ParameterError(f"method must be 'auto', 'exact' or 'ais'; got {method!r}")
    exact_possible = rbm.hidden == "binary" and rbm.n_hidden <= EXACT_MAX_HIDDEN
    if method == "exact" and not exact_possible:
        raise ParameterError(f"exact log Z needs binary hidden units, at most "
                             f"{EXACT_MAX_HIDDEN}; this model has {rbm.n_hidden} {rbm.hidden}")
    if method == "exact" or (method == "auto" and exact_possible):
        return PartitionEstimate(log_z=float(rbm.exact_log_partition()), log_z_std=0.0,
                                 method="exact")
    return ais_log_partition(rbm, visible_mean=visible_mean, visible_var=visible_var,
                             copies=copies, n_chains=n_chains, n_temperatures=n_temperatures,
                             seed=seed, progress=progress)


def relu_partition_bound(rbm: RBM, *, n_starts: int = 8, n_steps: int = 100) -> dict[str, Any]:
    """Whether a rectified-unit model's own (infinite-copy) partition function is finite.

    Along a unit direction u of z = (v − b)/σ the log-density grows like
    |z|² (q(u) − 1)/2 with q(u) = Σⱼ relu(w̃ⱼ·u)², w̃ⱼ the columns of W/σ (row i divided by
    σᵢ).  Z is infinite if q(u) > 1 for some u and finite if max q < 1, which the spectral
    norm ‖W/σ‖₂ < 1 guarantees.  q is convex and 2-homogeneous, so the iteration
    u ← ∇q(u)/‖∇q(u)‖ never decreases it; it is run from the leading singular directions
    (both signs) and the largest columns to look for a witness u with q(u) > 1.

    Parameters
    ----------
    rbm : RBM
    n_starts : int, default=8
        Starting directions of each kind (singular vectors, columns), each with both signs.
    n_steps : int, default=100
        Ascent steps from each start.

    Returns
    -------
    dict
        ``max_column_norm`` and ``spectral_norm`` of W/σ; ``largest_q``, the largest q(u)
        found; ``finite``: False when a witness has q(u) > 1, True when the spectral norm
        is below 1, None when neither decides.
    """
    rbm = _check_rbm(rbm)
    scaled = np.asarray(rbm.weights_, np.float64) / np.asarray(rbm.sigma_, np.float64)[:, None]
    column_norms = np.linalg.norm(scaled, axis=0)
    left, singular, _ = np.linalg.svd(scaled, full_matrices=False)
    spectral = float(singular[0])
    largest_columns = np.argsort(column_norms)[::-1][:n_starts]
    starts = [left[:, k] for k in range(min(n_starts, left.shape[1]))]
    starts += [scaled[:, j] / column_norms[j] for j in largest_columns if column_norms[j] > 0]
    largest_q = 0.0
    for start in starts:
        for u in (start, -start):
            for _ in range(n_steps):
                gradient = scaled @ np.maximum(scaled.T @ u, 0.0)
                norm = float(np.linalg.norm(gradient))
                if norm == 0.0:
                    break
                u = gradient / norm
            largest_q = max(largest_q, float(np.square(np.maximum(scaled.T @ u, 0.0)).sum()))
    finite = False if largest_q > 1.0 + 1e-9 else (True if spectral < 1.0 else None)
    return {"max_column_norm": float(column_norms.max()), "spectral_norm": spectral,
            "largest_q": largest_q, "finite": finite}


# --------------------------------------------------------------------------------------
# scoring a model file on a frame cache
# --------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class SetScore:
    """Mean log-likelihood of one set of clips' context windows.

    Attributes
    ----------
    name : str
        ``"train"``, ``"validation"`` (the trainer's split) or ``"all clips"``.
    n_clips, n_windows : int
        Clips in the set and context windows scored (one per frame).
    mean_free_energy : float
        Mean of the model's free energy over the scored windows (standardised units).
    free_energy_sem : float
        Standard error of that mean over windows.
    log_likelihood : float
        −mean F − log Z: nats per standardised context window.
    log_likelihood_logmel : float or None
        The same density in the units of the raw log-mel values: plus the log-Jacobian of
        standardisation (None for binary visibles, which are not standardised values).
    """

    name: str
    n_clips: int
    n_windows: int
    mean_free_energy: float
    free_energy_sem: float
    log_likelihood: float
    log_likelihood_logmel: float | None


@dataclasses.dataclass(frozen=True)
class ScoreResult:
    """What :func:`score` measured."""

    model: str
    cache: str
    training_cache: bool
    partition: PartitionEstimate
    sets: list[SetScore]
    n_visible: int
    layout: tuple[int, int]
    hidden: str
    n_hidden: int
    log_jacobian: float | None
    relu_bound: dict[str, Any] | None
    seconds: float

    def to_dict(self) -> dict[str, Any]:
        """JSON-able form (the chains' log weights left out)."""
        p = self.partition
        return {
            "model": self.model, "cache": self.cache, "training_cache": self.training_cache,
            "method": p.method, "log_z": p.log_z, "log_z_std": p.log_z_std,
            "n_chains": p.n_chains, "n_temperatures": p.n_temperatures, "copies": p.copies,
            "seed": p.seed, "effective_chains": p.effective_chains,
            "n_visible": self.n_visible, "layout": list(self.layout), "hidden": self.hidden,
            "n_hidden": self.n_hidden, "log_jacobian": self.log_jacobian,
            "relu_bound": self.relu_bound, "seconds": self.seconds,
            "units": "nats per context window (one window per frame)",
            "sets": [dataclasses.asdict(s) for s in self.sets],
        }

    def table(self) -> str:
        """A short table for a person."""
        p = self.partition
        positions, bands = self.layout
        if p.method == "exact":
            how = f"exact (enumerated 2^{self.n_hidden} binary hidden states)"
        else:
            how = (f"AIS, {p.n_chains} chains x {p.n_temperatures} temperatures, seed {p.seed}; "
                   f"{p.effective_chains:.1f} effective chains")
        lines = [f"model    {self.model}",
                 f"cache    {self.cache}" + ("  (the training cache: trainer's clip split)"
                                             if self.training_cache else
                                             "  (not the training cache: every clip scored)"),
                 f"method   {how}",
                 f"log Z    {p.log_z:.3f} +/- {p.log_z_std:.3f}"
                 + ("  (bootstrap std over chains)" if p.method == "ais" else "")]
        if p.method == "ais" and p.effective_chains < max(2.0, 0.1 * p.n_chains):
            lines.append(f"WARNING  only {p.effective_chains:.1f} effective chains of "
                         f"{p.n_chains}: one chain dominates, the spread understates the error "
                         f"and log Z is likely too low (so the log-likelihoods too high); "
                         f"raise --temperatures")
        if self.hidden == "relu" and p.method == "ais":
            bound = self.relu_bound or {}
            lines.append(f"relu     annealed as stepped units with {p.copies} copies each (equal "
                         f"to the relu free energy within 5e-7 per unit on every scored window)")
            q = bound.get("largest_q", float("nan"))
            if bound.get("finite") is False:
                lines.append(f"WARNING  the rectified model's own Z is infinite (a direction u "
                             f"with sum_j relu(w_j.u)^2 = {q:.3f} > 1, w_j the columns of "
                             f"W/sigma): its log-likelihood is -inf; the figures are for the "
                             f"stepped model with {p.copies} copies, whose Z grows with the "
                             f"copies")
            else:
                verdict = "finite" if bound.get("finite") else "undecided"
                lines.append(f"         the rectified model's own Z is {verdict} (spectral norm "
                             f"of W/sigma {bound.get('spectral_norm', float('nan')):.3f}, "
                             f"largest sum_j relu(w_j.u)^2 found {q:.3f})")
        lines.append(f"{'set':<12}{'clips':>6}{'windows':>9}{'log-lik standardised':>26}"
                     f"{'log-lik log-mel':>22}{'frames SE':>11}")
        for s in self.sets:
            raw = (f"{s.log_likelihood_logmel:.3f} +/- {p.log_z_std:.3f}"
                   if s.log_likelihood_logmel is not None else "n/a")
            lines.append(f"{s.name:<12}{s.n_clips:>6}{s.n_windows:>9}"
                         f"{f'{s.log_likelihood:.3f} +/- {p.log_z_std:.3f}':>26}{raw:>22}"
                         f"{s.free_energy_sem:>11.3f}")
        jacobian = ("" if self.log_jacobian is None else
                    f"; log-mel = standardised + log-Jacobian {self.log_jacobian:+.3f} "
                    f"(minus the sum of log std over the {self.n_visible} visible values)")
        lines.append(f"units    nats per context window ({positions} frames x {bands} bands = "
                     f"{self.n_visible} values, one window per frame){jacobian}; +/- is the "
                     f"log Z spread, 'frames SE' the standard error of the mean over windows")
        lines.append(f"time     {self.seconds:.1f} s")
        return "\n".join(lines)


class _Tally:
    """Streaming sums over scored windows: free energy, visible moments, largest input."""

    def __init__(self, n_visible: int) -> None:
        self.n = 0
        self.f_sum = 0.0
        self.f_sq = 0.0
        self.v_sum = np.zeros(n_visible)
        self.v_sq = np.zeros(n_visible)
        self.max_input = -math.inf

    def add(self, rbm: RBM, path: _Path, rows: np.ndarray) -> None:
        if len(rows) == 0:
            return
        free = rbm.free_energy(rows).astype(np.float64)
        self.n += len(rows)
        self.f_sum += float(free.sum())
        self.f_sq += float(np.square(free).sum())
        wide = rows.astype(np.float64)
        self.v_sum += wide.sum(axis=0)
        self.v_sq += np.square(wide).sum(axis=0)
        self.max_input = max(self.max_input,
                             float((wide @ path.input_weights + path.hidden_bias).max()))

    def mean_sem(self) -> tuple[float, float]:
        mean = self.f_sum / self.n
        var = max(self.f_sq / self.n - mean * mean, 0.0)
        return mean, math.sqrt(var / max(self.n - 1, 1))


def _score_set(pipe: FeaturePipeline, path: _Path, batches: WindowBatches, max_windows: int,
               rng: np.random.Generator) -> _Tally:
    """Free energies of a set's windows, as the first layer sees them (whitened or not)."""
    rbm = pipe.rbm
    tally = _Tally(rbm.n_features_in_)
    if max_windows and batches.n_frames > max_windows:
        tally.add(rbm, path, pipe.prepare(batches.sample(max_windows, rng)))
        return tally
    for segment in batches.segments:
        tally.add(rbm, path, pipe.prepare(batches.rows(*segment)))
    return tally


def _is_training_cache(pipe: FeaturePipeline, frames: FrameCache) -> bool:
    """Whether ``frames`` is the cache the model was trained on (same clip and frame
    counts and band statistics as the model file records)."""
    recorded = pipe.metadata.get("cache", {})
    stats = frames.band_stats
    return (recorded.get("n_clips") == len(frames)
            and recorded.get("n_frames") == frames.n_frames
            and np.allclose(stats.mean, pipe.band_mean, rtol=1e-6, atol=1e-6)
            and np.allclose(stats.scale, pipe.band_scale, rtol=1e-6, atol=1e-6))


def _window_sets(pipe: FeaturePipeline, frames: FrameCache, training_cache: bool
                 ) -> list[tuple[str, WindowBatches]]:
    """The trainer's training and validation windows, or every clip of another cache."""
    rbm = pipe.rbm
    if training_cache:
        train_set, val_set = window_sets(frames, pipe.config, frames.band_stats,
                                         seed=split_seed(rbm), batch_size=rbm.batch_size)
        return [("train", train_set), ("validation", val_set)]
    every = np.arange(len(frames))
    return [("all clips", WindowBatches(frames, every, pipe, context=pipe.config.frontend.context,
                                        batch_size=rbm.batch_size, chunk_frames=0,
                                        max_frames=0))]


def score(
    model: str | Path,
    cache: str | Path,
    *,
    n_chains: int = DEFAULT_CHAINS,
    n_temperatures: int = DEFAULT_TEMPERATURES,
    seed: int = 0,
    max_windows: int = 0,
    method: str = "auto",
    progress: bool = False,
) -> ScoreResult:
    """Average log-likelihood per frame of a model file on a frame cache.

    Each frame is scored as the model sees it: its standardised context window, made by
    the trainer's own window code (:func:`timbrel.training.window_sets`).  On the training
    cache (same clip and frame counts and band statistics as recorded in the model file)
    the trainer's clip split is reproduced and the training and validation clips are
    reported apart, standardised with the cache's band statistics exactly as in training;
    on any other cache every clip is scored, standardised with the model's statistics.

    log Z comes from :func:`log_partition`: exact for ≤ 20 binary hidden units, else AIS
    from a base rate with the training windows' per-unit mean and variance.  Rectified
    units are annealed in their stepped form with ⌈max x + 15.5⌉ copies, x the hidden
    inputs over every scored window.

    Parameters
    ----------
    model : str or Path
        Model file written by :func:`timbrel.training.train`.
    cache : str or Path
        Frame cache with the model's frame settings.
    n_chains : int, default=100
        AIS chains, ≥ 2.
    n_temperatures : int, default=1000
        AIS intermediate distributions, ≥ 1.
    seed : int, default=0
    max_windows : int, default=0
        At most this many windows per set, drawn evenly across its clips; 0 scores all.
    method : {"auto", "exact", "ais"}, default="auto"
    progress : bool, default=False

    Returns
    -------
    ScoreResult
        Log-likelihoods in nats per standardised context window of n_visible values, and
        in the raw log-mel units: log p_logmel(x) = log p(z) − Σᵢ log scaleᵢ for the
        standardisation z = (x − mean) / scale of each visible value.
    """
    t0 = time.perf_counter()
    if isinstance(max_windows, bool) or not isinstance(max_windows, (int, np.integer)) \
            or max_windows < 0:
        raise ParameterError(f"max_windows must be an integer ≥ 0; got {max_windows!r}")
    pipe = load_pipeline(model)
    if pipe.config.training.window_contrast:
        raise ParameterError(f"{model}: trained on contrast-normalised windows "
                             "(training.window_contrast), a map with no inverse, so the "
                             "model gives no likelihood of the windows themselves; fit "
                             "with --set training.window_contrast=false to score")
    frames = FrameCache.open(cache)
    check_config_against_cache(pipe.config, frames)
    rbm = pipe.rbm
    fe = pipe.config.frontend
    training_cache = _is_training_cache(pipe, frames)
    named = _window_sets(pipe, frames, training_cache)
    # the base rate and copies do not enter the free energy, so a provisional path serves
    provisional = _annealing_path(rbm, np.zeros(rbm.n_features_in_), np.ones(rbm.n_features_in_),
                                  copies=1)
    rng = np.random.default_rng([seed, 0x5C0])
    tallies = [(name, batches, _score_set(pipe, provisional, batches, max_windows, rng))
               for name, batches in named if batches.n_frames > 0]
    base = tallies[0][2]
    mean = base.v_sum / base.n
    var = np.maximum(base.v_sq / base.n - mean * mean, 0.0)
    max_input = max(t.max_input for _, _, t in tallies)
    copies = max(1, math.ceil(max_input + RELU_COPY_MARGIN)) if rbm.hidden == "relu" else None
    partition = log_partition(rbm, visible_mean=mean, visible_var=var, copies=copies,
                              method=method, n_chains=n_chains, n_temperatures=n_temperatures,
                              seed=seed, progress=progress)
    gaussian = rbm.visible == "gaussian"
    scale = np.asarray(frames.band_stats.scale if training_cache else pipe.band_scale,
                       np.float64)
    log_jacobian = -fe.n_positions * float(np.log(scale).sum()) if gaussian else None
    sets = []
    for name, batches, tally in tallies:
        mean_f, sem = tally.mean_sem()
        # the first layer models whitened windows: p(window) = p(Wz) |det W|
        log_lik = -mean_f - partition.log_z + pipe.whitening_log_det()
        sets.append(SetScore(name=name, n_clips=len(batches.clips), n_windows=tally.n,
                             mean_free_energy=mean_f, free_energy_sem=sem,
                             log_likelihood=log_lik,
                             log_likelihood_logmel=(None if log_jacobian is None
                                                    else log_lik + log_jacobian)))
    return ScoreResult(model=str(model), cache=str(cache), training_cache=training_cache,
                       partition=partition, sets=sets, n_visible=rbm.n_features_in_,
                       layout=(fe.n_positions, fe.n_mels), hidden=rbm.hidden,
                       n_hidden=rbm.n_hidden, log_jacobian=log_jacobian,
                       relu_bound=relu_partition_bound(rbm) if rbm.hidden == "relu" else None,
                       seconds=time.perf_counter() - t0)
