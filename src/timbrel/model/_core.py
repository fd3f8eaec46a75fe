
"""What every RBM method stands on: input checks, the unit kinds, the visible variances.

:class:`RBMCore` holds no hyperparameters of its own; :class:`timbrel.model.RBM`
declares them in its ``__init__`` and inherits these helpers.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .._errors import NotFittedError, ParameterError
from ._kernels import F32
from ._params import check_params, is_int
from .units import HiddenUnits, VisibleUnits, hidden_units, visible_units

__all__ = ["RBMCore", "as_float32_matrix"]


def as_float32_matrix(values: Any, *, name: str) -> np.ndarray:
    """Validate and convert to a C-contiguous float32 (n, d) array; the input is not modified."""
    if np.iscomplexobj(values):
        raise ParameterError(f"{name} must be real-valued; got a complex array")
    try:
        with np.errstate(over="ignore"):  # overflow to inf is reported below
            array = np.asarray(values, dtype=F32)
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


class RBMCore:
    """Checks, unit kinds and variance plumbing shared by the estimator's methods."""

    # hyperparameters (set by RBM.__init__) and fitted state that these helpers read
    n_hidden: int
    hidden: str
    n_copies: int
    visible: str
    tie_variance: str
    layout: tuple[int, int] | None
    seed: int | None
    n_features_in_: int
    weights_: np.ndarray
    visible_bias_: np.ndarray
    hidden_bias_: np.ndarray
    _log_variance: np.ndarray
    _sigma: np.ndarray
    _inv_var: np.ndarray

    def get_params(self, deep: bool = True) -> dict[str, Any]:
        raise NotImplementedError

    # ---------------------------------------------------------------- validation

    def _check_params(self) -> None:
        check_params(self.get_params())

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
            if not (isinstance(value, np.ndarray) and value.dtype == F32
                    and value.flags.c_contiguous):
                value = np.ascontiguousarray(value, dtype=F32)
                setattr(self, name, value)
            if value.shape != shape:
                raise ParameterError(f"{name} must have shape {shape}; got {value.shape}")

    def _check_input(self, values: Any, *, name: str = "X", width: int | None = None,
                     what: str = "visible units") -> np.ndarray:
        array = as_float32_matrix(values, name=name)
        expected = self.n_features_in_ if width is None else width
        if array.shape[1] != expected:
            raise ParameterError(
                f"{name} has {array.shape[1]} columns but the model has {expected} {what}"
            )
        return array

    # ---------------------------------------------------------------- unit kinds

    @property
    def _hidden_units(self) -> HiddenUnits:
        return hidden_units(self.hidden, self.n_copies)

    @property
    def _visible_units(self) -> VisibleUnits:
        return visible_units(self.visible)

    # ---------------------------------------------------------------- variance plumbing

    @property
    def _tied(self) -> bool:
        return (self.tie_variance == "band" and self.layout is not None
                and self.visible == "gaussian")

    @property
    def _group_shape(self) -> tuple[int, int]:
        if self.layout is None:
            return (1, self.n_features_in_)
        return (int(self.layout[0]), int(self.layout[1]))

    @property
    def _n_groups(self) -> int:
        return self._group_shape[1] if self._tied else self.n_features_in_

    def _expand(self, grouped: np.ndarray) -> np.ndarray:
        return np.tile(grouped, self._group_shape[0]) if self._tied else grouped

    def _group_sum(self, full: np.ndarray) -> np.ndarray:
        return full.reshape(self._group_shape).sum(axis=0) if self._tied else full

    def _sync_variance(self) -> None:
        log_var = self._expand(self._log_variance).astype(F32)
        self._sigma = np.exp(0.5 * log_var).astype(F32)
        self._inv_var = np.exp(-log_var).astype(F32)

    @property
    def sigma_(self) -> np.ndarray:
        if not hasattr(self, "_log_variance"):
            raise NotFittedError("this RBM is not fitted yet; sigma_ is not available")
        view = self._sigma.view()
        view.flags.writeable = False
        return view

    @sigma_.setter
    def sigma_(self, value: Any) -> None:
        if not hasattr(self, "weights_"):
            raise NotFittedError("initialize or fit the RBM before setting sigma_")
        sigma = np.asarray(value, dtype=F32).reshape(-1)
        if sigma.shape != (self.n_features_in_,):
            raise ParameterError(
                f"sigma_ must have shape ({self.n_features_in_},); got {np.shape(value)}"
            )
        if not (np.isfinite(sigma).all() and (sigma > 0).all()):
            raise ParameterError("sigma_ must be finite and positive")
        if not self._visible_units.has_variance and not np.all(sigma == 1):
            raise ParameterError("binary visibles have sigma_ = 1; it cannot be changed")
        if self._tied:
            per_position = sigma.reshape(self._group_shape)
            if not np.all(per_position == per_position[0]):
                raise ParameterError(
                    "with tie_variance='band' every context position of a band must share "
                    "one sigma"
                )
            sigma = per_position[0]
        self._log_variance = (2.0 * np.log(sigma)).astype(F32)
        self._sync_variance()

    def _params(self) -> dict[str, np.ndarray]:
        """The learned arrays by their state names (z grouped as learned)."""
        return {"weights": self.weights_, "visible_bias": self.visible_bias_,
                "hidden_bias": self.hidden_bias_, "log_variance": self._log_variance}

    def _parameters_finite(self) -> bool:
        return all(bool(np.isfinite(a).all()) for a in self._params().values())

    def _make_rng(self, rng: Any) -> np.random.Generator:
        if rng is None:
            return np.random.default_rng(self.seed)
        if isinstance(rng, np.random.Generator):
            return rng
        if is_int(rng) and rng >= 0:
            return np.random.default_rng(int(rng))
        raise ParameterError(f"rng must be None, an integer ≥ 0 or a numpy Generator; got {rng!r}")

    def _hidden_input(self, v: np.ndarray) -> np.ndarray:
        out = self._visible_units.scale(v, self._inv_var) @ self.weights_
        out += self.hidden_bias_
        return out
