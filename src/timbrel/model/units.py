
"""Unit kinds of the RBM: each a small object with the same few methods.

Hidden kinds (:class:`BinaryHidden`, :class:`SteppedHidden`, :class:`RectifiedHidden`)
give, for the hidden input x = c + Σᵢ Wᵢⱼ vᵢ/σᵢ², the mean used as the feature, a
sample, the free-energy term φ(x) = log Σ_h e^{x h} and its derivative, the exact
conditional mean.  Visible kinds (:class:`GaussianVisible`, :class:`BinaryVisible`)
give the scaling of the data before the product with W, the mean and sample given the
top-down input, and the visible part of the free energy.  The estimator, the
contrastive-divergence step and the likelihood all use these, so each formula is
written once.

References
----------
Nair, V. & Hinton, G. E. (2010). Rectified linear units improve restricted Boltzmann
machines. ICML.  (Stepped sigmoid units and noisy rectified units.)
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np

from ._kernels import (
    F32,
    rectified_sum,
    relu,
    sigmoid,
    softplus,
    standard_normal,
    stepped_softplus_sum,
    uniform_fill,
)

__all__ = ["HIDDEN_KINDS", "VISIBLE_KINDS", "BinaryHidden", "BinaryVisible", "GaussianVisible",
           "HiddenUnits", "RectifiedHidden", "SteppedHidden", "VisibleUnits", "hidden_units",
           "visible_units"]

HIDDEN_KINDS = ("relu", "binary", "stepped")
VISIBLE_KINDS = ("gaussian", "binary")


def _bernoulli(x: np.ndarray, out: np.ndarray, p: np.ndarray, rng: np.random.Generator
               ) -> np.ndarray:
    """Draws of 1 with probability sigmoid(x), else 0, into ``out`` (``p`` may alias x)."""
    sigmoid(x, p)
    uniform_fill(rng, out)
    return np.less(out, p, out=out)


class HiddenUnits:
    """What every hidden kind provides (float32 arrays of shape (n, n_hidden))."""

    name: ClassVar[str]
    #: True when :meth:`mean` reads x again after writing part of ``out`` (so the two
    #: must not alias)
    mean_rereads_input: ClassVar[bool] = False

    def mean(self, x: np.ndarray, out: np.ndarray, tmp: np.ndarray) -> np.ndarray:
        """The feature: E-like activation of input x, into ``out``."""
        raise NotImplementedError

    def sample(self, x: np.ndarray, out: np.ndarray, tmp: np.ndarray, tmp2: np.ndarray,
               rng: np.random.Generator) -> np.ndarray:
        """A draw of the hidden states given input x, into ``out``."""
        raise NotImplementedError

    def log_partial(self, x: np.ndarray) -> np.ndarray:
        """φ(x) = log Σ_h e^{x h} per element (the hidden part of −F)."""
        raise NotImplementedError

    def expectation(self, x: np.ndarray) -> np.ndarray:
        """dφ/dx per element: the exact conditional mean under the free energy."""
        return self.mean(x, np.empty_like(x), np.empty_like(x))

    def __repr__(self) -> str:
        return f"{type(self).__name__}()"


class BinaryHidden(HiddenUnits):
    """Logistic units: mean sigmoid(x), sample Bernoulli(sigmoid(x)), φ = softplus.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.array([[0.0, 2.0]], np.float32)
    >>> BinaryHidden().mean(x, np.empty_like(x), np.empty_like(x)).round(3)
    array([[0.5  , 0.881]], dtype=float32)
    """

    name = "binary"

    def mean(self, x: np.ndarray, out: np.ndarray, tmp: np.ndarray) -> np.ndarray:
        return sigmoid(x, out)

    def sample(self, x: np.ndarray, out: np.ndarray, tmp: np.ndarray, tmp2: np.ndarray,
               rng: np.random.Generator) -> np.ndarray:
        return _bernoulli(x, out, tmp, rng)

    def log_partial(self, x: np.ndarray) -> np.ndarray:
        return softplus(x, np.empty_like(x), np.empty_like(x))


class SteppedHidden(HiddenUnits):
    """``n_copies`` binary copies sharing weights and bias, with offsets −0.5, −1.5, …

    Mean Σₙ sigmoid(x − n + 0.5), sample the number of copies on, φ = Σₙ softplus(x − n + 0.5).

    Examples
    --------
    >>> import numpy as np
    >>> x = np.array([[3.0]], np.float32)
    >>> SteppedHidden(10).mean(x, np.empty_like(x), np.empty_like(x)).round(2)  # ≈ log(1 + e³)
    array([[3.05]], dtype=float32)
    """

    name = "stepped"
    mean_rereads_input = True

    def __init__(self, n_copies: int) -> None:
        self.n_copies = int(n_copies)

    def __repr__(self) -> str:
        return f"SteppedHidden(n_copies={self.n_copies})"

    def mean(self, x: np.ndarray, out: np.ndarray, tmp: np.ndarray) -> np.ndarray:
        np.subtract(x, 0.5, out=out)
        sigmoid(out, out)
        for copy_index in range(2, self.n_copies + 1):
            np.subtract(x, copy_index - 0.5, out=tmp)
            out += sigmoid(tmp, tmp)
        return out

    def sample(self, x: np.ndarray, out: np.ndarray, tmp: np.ndarray, tmp2: np.ndarray,
               rng: np.random.Generator) -> np.ndarray:
        out.fill(0.0)
        for copy_index in range(1, self.n_copies + 1):
            np.subtract(x, copy_index - 0.5, out=tmp)
            out += _bernoulli(tmp, tmp2, tmp, rng)
        return out

    def log_partial(self, x: np.ndarray) -> np.ndarray:
        return stepped_softplus_sum(x, self.n_copies)


class RectifiedHidden(HiddenUnits):
    """Noisy rectified units: mean max(0, x), sample max(0, x + N(0, sigmoid(x))).

    φ is the stepped one with infinitely many copies, evaluated to within 1e-6 per unit
    (see ``RELU_WINDOW_COPIES``); its derivative Σₙ sigmoid(x − n + 0.5) ≈ softplus(x)
    is the exact conditional mean, of which max(0, x) is the usual approximation.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.array([[-1.0, 2.0]], np.float32)
    >>> RectifiedHidden().mean(x, np.empty_like(x), np.empty_like(x))
    array([[0., 2.]], dtype=float32)
    """

    name = "relu"

    def mean(self, x: np.ndarray, out: np.ndarray, tmp: np.ndarray) -> np.ndarray:
        return relu(x, out)

    def sample(self, x: np.ndarray, out: np.ndarray, tmp: np.ndarray, tmp2: np.ndarray,
               rng: np.random.Generator) -> np.ndarray:
        # max(0, x + N(0, sigmoid(x))) with sigmoid(x) = (1 + tanh(x/2)) / 2: the 1/2
        # goes into the draws' variance, and tanh is one pass where sigmoid through
        # exp takes four (22 against 84 us per 128 x 1024 float32 pass)
        standard_normal(rng, out, tmp2, variance=0.5)
        np.multiply(x, F32(0.5), out=tmp)
        np.tanh(tmp, out=tmp)
        tmp += F32(1.0)
        np.sqrt(tmp, out=tmp)
        out *= tmp
        out += x
        return relu(out, out)

    def log_partial(self, x: np.ndarray) -> np.ndarray:
        return rectified_sum(x, derivative=False)

    def expectation(self, x: np.ndarray) -> np.ndarray:
        return rectified_sum(x, derivative=True)


def hidden_units(kind: str, n_copies: int = 10) -> HiddenUnits:
    """The hidden-unit object of a kind name (``"relu"``, ``"binary"``, ``"stepped"``)."""
    if kind == "relu":
        return RectifiedHidden()
    if kind == "binary":
        return BinaryHidden()
    if kind == "stepped":
        return SteppedHidden(n_copies)
    raise ValueError(f"hidden unit kind must be one of {HIDDEN_KINDS}; got {kind!r}")


class VisibleUnits:
    """What every visible kind provides (float32 arrays of shape (n, n_visible))."""

    name: ClassVar[str]
    #: whether σ is a parameter of this kind (binary visibles have σ = 1)
    has_variance: ClassVar[bool]

    def scale(self, v: np.ndarray, inv_var: np.ndarray, out: np.ndarray | None = None
              ) -> np.ndarray:
        """The data as the product with W sees it: v/σ² (Gaussian) or v."""
        raise NotImplementedError

    def mean(self, top_down: np.ndarray) -> np.ndarray:
        """Conditional mean given b + W h, in place."""
        raise NotImplementedError

    def sample(self, mean: np.ndarray, sigma: np.ndarray, rng: np.random.Generator,
               noise: np.ndarray, scratch: np.ndarray, out: np.ndarray) -> np.ndarray:
        """A draw given the conditional mean; may overwrite ``mean``, ``noise``, ``out``."""
        raise NotImplementedError

    def energy(self, v: np.ndarray, bias: np.ndarray, inv_var: np.ndarray) -> np.ndarray:
        """The visible part of the free energy per row."""
        raise NotImplementedError

    def start_bias(self, mean: np.ndarray) -> np.ndarray:
        """Visible biases that start the model at the data mean (Hinton 2010, sec. 8)."""
        raise NotImplementedError

    def __repr__(self) -> str:
        return f"{type(self).__name__}()"


class GaussianVisible(VisibleUnits):
    """p(vᵢ | h) = N(bᵢ + Σⱼ Wᵢⱼ hⱼ, σᵢ²); energy Σᵢ (vᵢ − bᵢ)²/(2σᵢ²)."""

    name = "gaussian"
    has_variance = True

    def scale(self, v: np.ndarray, inv_var: np.ndarray, out: np.ndarray | None = None
              ) -> np.ndarray:
        return np.multiply(v, inv_var, out=out)

    def mean(self, top_down: np.ndarray) -> np.ndarray:
        return top_down

    def sample(self, mean: np.ndarray, sigma: np.ndarray, rng: np.random.Generator,
               noise: np.ndarray, scratch: np.ndarray, out: np.ndarray) -> np.ndarray:
        standard_normal(rng, noise, scratch)
        noise *= sigma
        mean += noise
        return mean

    def energy(self, v: np.ndarray, bias: np.ndarray, inv_var: np.ndarray) -> np.ndarray:
        deviation = v - bias
        np.square(deviation, out=deviation)
        return 0.5 * (deviation @ inv_var)

    def start_bias(self, mean: np.ndarray) -> np.ndarray:
        return mean


class BinaryVisible(VisibleUnits):
    """p(vᵢ = 1 | h) = sigmoid(bᵢ + Σⱼ Wᵢⱼ hⱼ); energy −b·v; σ = 1."""

    name = "binary"
    has_variance = False

    def scale(self, v: np.ndarray, inv_var: np.ndarray, out: np.ndarray | None = None
              ) -> np.ndarray:
        if out is None:
            return v.copy()
        np.copyto(out, v)
        return out

    def mean(self, top_down: np.ndarray) -> np.ndarray:
        return sigmoid(top_down, top_down)

    def sample(self, mean: np.ndarray, sigma: np.ndarray, rng: np.random.Generator,
               noise: np.ndarray, scratch: np.ndarray, out: np.ndarray) -> np.ndarray:
        uniform_fill(rng, noise)
        return np.less(noise, mean, out=out)

    def energy(self, v: np.ndarray, bias: np.ndarray, inv_var: np.ndarray) -> np.ndarray:
        return -(v @ bias)

    def start_bias(self, mean: np.ndarray) -> np.ndarray:
        p = np.clip(mean, 1e-3, 1 - 1e-3)
        return np.log(p / (1 - p))


def visible_units(kind: str) -> VisibleUnits:
    """The visible-unit object of a kind name (``"gaussian"``, ``"binary"``)."""
    if kind == "gaussian":
        return GaussianVisible()
    if kind == "binary":
        return BinaryVisible()
    raise ValueError(f"visible unit kind must be one of {VISIBLE_KINDS}; got {kind!r}")
