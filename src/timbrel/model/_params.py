"""The estimator's hyperparameters and their allowed values, as one declarative table.

:data:`CONSTRAINTS` is read by :meth:`RBM._check_params` and by the ``[model]`` table of a
configuration file, so a bad value gets the same message from both.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from .._errors import ParameterError
from .units import HIDDEN_KINDS, VISIBLE_KINDS

__all__ = ["CONSTRAINTS", "check_params", "is_int", "is_real"]

TIE_KINDS = ("band", "unit")


def is_int(value: Any) -> bool:
    """An integer that is not a bool."""
    return isinstance(value, numbers.Integral) and not isinstance(value, (bool, np.bool_))


def is_real(value: Any) -> bool:
    """A real number that is not a bool."""
    return isinstance(value, numbers.Real) and not isinstance(value, (bool, np.bool_))


@dataclass(frozen=True)
class Integer:
    low: int

    def check(self, name: str, value: Any, params: Mapping[str, Any]) -> None:
        if not is_int(value) or value < self.low:
            raise ParameterError(f"{name} must be an integer ≥ {self.low}; got {value!r}")


@dataclass(frozen=True)
class Real:
    """A finite number in a range; a bound given as a name is that parameter's value."""

    low: float | str = 0.0
    high: float | str = math.inf
    low_open: bool = False
    high_open: bool = True
    optional: bool = False

    def _bound(self, bound: float | str, params: Mapping[str, Any]) -> float:
        if isinstance(bound, str):
            value = params[bound]
            return float(value) if is_real(value) else 0.0
        return bound

    def check(self, name: str, value: Any, params: Mapping[str, Any]) -> None:
        if value is None and self.optional:
            return
        low, high = self._bound(self.low, params), self._bound(self.high, params)
        ok = is_real(value) and math.isfinite(value)
        if ok:
            ok = (value > low if self.low_open else value >= low) and (
                value < high if self.high_open else value <= high)
        if not ok:
            left = "(" if self.low_open else "["
            right = ")" if self.high_open else "]"
            raise ParameterError(
                f"{name} must be a finite number in {left}{low}, {high}{right}; got {value!r}"
            )


@dataclass(frozen=True)
class Choice:
    options: tuple[str, ...]

    def check(self, name: str, value: Any, params: Mapping[str, Any]) -> None:
        if value not in self.options:
            raise ParameterError(f"{name} must be one of {self.options}; got {value!r}")


@dataclass(frozen=True)
class Boolean:
    def check(self, name: str, value: Any, params: Mapping[str, Any]) -> None:
        if not isinstance(value, (bool, np.bool_)):
            raise ParameterError(f"{name} must be True or False; got {value!r}")


@dataclass(frozen=True)
class Layout:
    def check(self, name: str, value: Any, params: Mapping[str, Any]) -> None:
        if value is not None and not (
            isinstance(value, (tuple, list)) and len(value) == 2
            and all(is_int(n) and n >= 1 for n in value)
        ):
            raise ParameterError(
                f"{name} must be None or (n_positions, n_bands) with positive integers; "
                f"got {value!r}"
            )


@dataclass(frozen=True)
class Seed:
    def check(self, name: str, value: Any, params: Mapping[str, Any]) -> None:
        if value is not None and not (is_int(value) and value >= 0):
            raise ParameterError(f"{name} must be None or an integer ≥ 0; got {value!r}")


#: Every hyperparameter of :class:`RBM` and the values it may take, in checking order.
CONSTRAINTS: dict[str, Integer | Real | Choice | Boolean | Layout | Seed] = {
    "n_hidden": Integer(1),
    "hidden": Choice(HIDDEN_KINDS),
    "n_copies": Integer(1),
    "visible": Choice(VISIBLE_KINDS),
    "learn_variance": Boolean(),
    "tie_variance": Choice(TIE_KINDS),
    "layout": Layout(),
    "n_steps": Integer(1),
    "persistent": Boolean(),
    "learning_rate": Real(0.0, low_open=True),
    "variance_learning_rate": Real(0.0),
    "initial_momentum": Real(0.0, 1.0),
    "final_momentum": Real(0.0, 1.0),
    "momentum_switch_epoch": Integer(0),
    "learning_rate_decay": Real(0.0),
    "weight_decay": Real(0.0),
    "sparsity_target": Real(0.0, low_open=True, optional=True),
    "sparsity_cost": Real(0.0),
    "sparsity_decay": Real(0.0, 1.0),
    "batch_size": Integer(1),
    "epochs": Integer(1),
    "sigma_floor": Real(0.0, low_open=True),
    "sigma_ceiling": Real("sigma_floor", low_open=True),
    "initial_sigma": Real("sigma_floor", "sigma_ceiling", high_open=False),
    "weight_scale": Real(0.0, low_open=True),
    "max_step": Real(0.0),
    "divergence_factor": Real(1.0, low_open=True),
    "max_rollbacks": Integer(0),
    "warm_start": Boolean(),
    "seed": Seed(),
}


def check_params(params: Mapping[str, Any]) -> None:
    """Raise :class:`ParameterError` naming the first hyperparameter out of its range.

    Parameters
    ----------
    params : mapping
        Every name of :data:`CONSTRAINTS` with its value.

    Examples
    --------
    >>> from timbrel.model import RBM
    >>> check_params(RBM(n_hidden=0).get_params())
    Traceback (most recent call last):
    ...
    timbrel._errors.ParameterError: n_hidden must be an integer ≥ 1; got 0
    """
    for name, rule in CONSTRAINTS.items():
        rule.check(name, params[name], params)
