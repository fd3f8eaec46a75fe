
"""What a fitted RBM can tell besides its features: samples, free energies, gradients and
the exact partition function of small models.

These are the methods the likelihood stage and the tests of the maths use; training
runs through :mod:`timbrel.model._step` and :mod:`timbrel.model._guard`.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .._errors import ParameterError
from ._core import RBMCore
from ._kernels import F32
from ._params import is_int
from ._state import TrainingState
from ._step import Phases, StepPlan, combine_phases, contrastive_step

__all__ = ["EXACT_MAX_HIDDEN", "RBMQueries"]

EXACT_MAX_HIDDEN = 20
"""Binary-hidden models with at most this many hidden units have log Z by enumeration."""

_TRANSFORM_CHUNK = 8192


class RBMQueries(RBMCore):
    """Sampling, free energy, reconstruction, gradients and exact log Z of a fitted RBM."""

    n_steps: int

    def transform(self, X: Any) -> np.ndarray:
        raise NotImplementedError

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
        return self._visible_units.mean(out)

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
        return self._hidden_units.sample(x, out, np.empty_like(x), np.empty_like(x), gen)

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
        return self._visible_units.sample(mean, self._sigma, gen, noise,
                                          np.empty(noise.size // 2 + 1, F32), noise)

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
        if not is_int(steps) or steps < 1:
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
        out = np.empty(X.shape[0], F32)
        for start in range(0, X.shape[0], _TRANSFORM_CHUNK):
            v = X[start:start + _TRANSFORM_CHUNK]
            phi = self._hidden_units.log_partial(self._hidden_input(v))
            hidden_term = phi.sum(axis=1, dtype=np.float64).astype(F32)
            visible_term = self._visible_units.energy(v, self.visible_bias_, self._inv_var)
            out[start:start + v.shape[0]] = visible_term - hidden_term
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
        """log Z by enumerating all 2^n_hidden hidden states (binary hiddens, n_hidden ≤ 20).

        Gaussian visibles integrate in closed form:
        log Z = Σᵢ ½ log(2πσᵢ²) + log Σ_h exp(c·h + Σᵢ ((bᵢ + (Wh)ᵢ)² − bᵢ²)/(2σᵢ²));
        binary visibles: log Z = log Σ_h exp(c·h + Σᵢ softplus(bᵢ + (Wh)ᵢ)).
        Computed in float64.

        Returns
        -------
        log_z : float
        """
        self._check_fitted()
        if self.hidden != "binary" or self.n_hidden > EXACT_MAX_HIDDEN:
            raise ParameterError(
                f"exact_log_partition needs binary hiddens and n_hidden ≤ {EXACT_MAX_HIDDEN}; "
                f"got hidden={self.hidden!r}, n_hidden={self.n_hidden}"
            )
        weights = self.weights_.astype(np.float64)
        b = self.visible_bias_.astype(np.float64)
        c = self.hidden_bias_.astype(np.float64)
        var = self._sigma.astype(np.float64) ** 2
        gaussian = self._visible_units.has_variance
        n_states = 1 << self.n_hidden
        bits = np.arange(self.n_hidden)
        log_terms = []
        for start in range(0, n_states, 1 << 16):
            codes = np.arange(start, min(start + (1 << 16), n_states))
            states = ((codes[:, None] >> bits) & 1).astype(np.float64)
            mean = states @ weights.T + b
            if gaussian:
                term = states @ c + ((mean**2 - b**2) / (2 * var)).sum(axis=1)
            else:
                term = states @ c + np.logaddexp(0.0, mean).sum(axis=1)
            log_terms.append(term)
        stacked = np.concatenate(log_terms)
        top = stacked.max()
        log_z = float(top + np.log(np.exp(stacked - top).sum()))
        if gaussian:
            log_z += float(0.5 * np.log(2 * np.pi * var).sum())
        return log_z

    # ---------------------------------------------------------------- gradients

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
        if not is_int(steps) or steps < 1:
            raise ParameterError(f"n_steps must be an integer ≥ 1; got {steps!r}")
        # a state of its own: training's generator, chains and buffers stay untouched
        state = TrainingState.fresh(self._make_rng(rng), self._params())
        plan = StepPlan(rate=1.0, n_steps=int(steps),
                        variance=self._visible_units.has_variance)
        grads = contrastive_step(self, state, X, plan, tally=None)
        return self._gradient_dict(grads[0].copy(), *grads[1:])

    @staticmethod
    def _gradient_dict(weights: np.ndarray, visible: np.ndarray, hidden: np.ndarray,
                       log_variance: np.ndarray | None) -> dict[str, np.ndarray]:
        result = {"weights": weights, "visible_bias": visible, "hidden_bias": hidden}
        if log_variance is not None:
            result["log_variance"] = log_variance
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
        scaled = self._visible_units.scale(X, self._inv_var)
        x = scaled @ self.weights_
        x += self.hidden_bias_
        expectation = self._hidden_units.expectation(x)
        expectation *= F32(1.0 / n)
        deviation = X - self.visible_bias_
        np.square(deviation, out=deviation)
        grad_weights = np.empty_like(self.weights_)
        phases = Phases(scaled, expectation, n_pos=n, pos_sum=X.sum(axis=0),
                        pos_sq=deviation.sum(axis=0))
        grads = combine_phases(self, phases, grad_weights, rate=1.0,
                               variance=self._visible_units.has_variance)
        # the phase statistics are −∂F/∂θ
        grad_visible, grad_hidden, grad_log_var = grads
        return self._gradient_dict(-grad_weights, -grad_visible, -grad_hidden,
                                   None if grad_log_var is None else -grad_log_var)
