"""Training state that is not a model parameter: optimiser velocities, persistent chains,
the running sparsity estimate, the generator, and the buffers one minibatch reuses.

One :class:`TrainingState` per estimator; :meth:`snapshot` and :meth:`restore` let the
guarded epoch roll back, and :meth:`to_arrays` / :meth:`from_arrays` carry it through a
checkpoint.
"""

from __future__ import annotations

import copy
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._errors import ParameterError
from ._kernels import F32

__all__ = ["PARAMETER_NAMES", "TrainingState", "Workspace", "check_array"]

#: The learned arrays, by the names the velocities, checkpoints and gradients use.
PARAMETER_NAMES = ("weights", "visible_bias", "hidden_bias", "log_variance")


class Workspace:
    """Preallocated float32 buffers for one minibatch size (reused across minibatches)."""

    def __init__(self, n_rows: int, n_stack: int, n_visible: int, n_hidden: int) -> None:
        self.n_rows = n_rows
        self.n_stack = n_stack
        self.vis_stack = np.empty((n_stack, n_visible), F32)
        self.hid_stack = np.empty((n_stack, n_hidden), F32)
        self.hidden_input = np.empty((n_rows, n_hidden), F32)
        self.hidden_sample = np.empty((n_rows, n_hidden), F32)
        self.hidden_tmp = np.empty((n_rows, n_hidden), F32)
        self.hidden_tmp2 = np.empty((n_rows, n_hidden), F32)
        self.visible_mean = np.empty((n_rows, n_visible), F32)
        self.visible_tmp = np.empty((n_rows, n_visible), F32)
        self.visible_scratch = np.empty((n_rows * n_visible + 1) // 2, F32)
        self.grad_weights = np.empty((n_visible, n_hidden), F32)

    def fits(self, n_rows: int, n_stack: int, shape: tuple[int, int]) -> bool:
        """Whether these buffers serve a minibatch of that size for weights of ``shape``."""
        return self.n_rows >= n_rows and self.n_stack >= n_stack and \
            self.grad_weights.shape == shape


@dataclass
class TrainingState:
    """Everything besides the parameters that training carries from minibatch to minibatch.

    Attributes
    ----------
    rng : numpy.random.Generator
        Training's generator (seeded from the estimator's ``seed``).
    velocity : dict of str to ndarray
        Momentum of each parameter in :data:`PARAMETER_NAMES`.
    chain : ndarray of shape (batch_size, n_hidden) or None
        Persistent chains' hidden states (persistent CD).
    chain_needs_start : bool
        The chains start from the next minibatch's hidden samples.
    sparsity_estimate : ndarray of shape (n_hidden,) or None
        Running mean hidden activation q.
    reference_error : float or None
        The last epoch's relative reconstruction error (the divergence guard's reference).
    workspace : Workspace or None
        Buffers of the current minibatch size (not part of a snapshot).
    """

    rng: np.random.Generator
    velocity: dict[str, np.ndarray]
    chain: np.ndarray | None = None
    chain_needs_start: bool = False
    sparsity_estimate: np.ndarray | None = None
    reference_error: float | None = None
    workspace: Workspace | None = field(default=None, repr=False)

    @classmethod
    def fresh(cls, rng: np.random.Generator, params: dict[str, np.ndarray]) -> TrainingState:
        """Zero velocities for ``params`` (named as :data:`PARAMETER_NAMES`) and ``rng``."""
        return cls(rng=rng,
                   velocity={name: np.zeros_like(params[name]) for name in PARAMETER_NAMES})

    def buffers(self, n_rows: int, n_stack: int, n_visible: int, n_hidden: int) -> Workspace:
        """The workspace, grown when a minibatch needs more rows than it has."""
        ws = self.workspace
        if ws is None or not ws.fits(n_rows, n_stack, (n_visible, n_hidden)):
            ws = Workspace(max(n_rows, getattr(ws, "n_rows", 0)),
                           max(n_stack, getattr(ws, "n_stack", 0)), n_visible, n_hidden)
            self.workspace = ws
        return ws

    def snapshot(self) -> dict[str, Any]:
        """A deep copy of the state (without the workspace) for :meth:`restore`."""
        return {"velocity": {k: v.copy() for k, v in self.velocity.items()},
                "chain": None if self.chain is None else self.chain.copy(),
                "chain_needs_start": self.chain_needs_start,
                "sparsity_estimate": None if self.sparsity_estimate is None
                else self.sparsity_estimate.copy(),
                "rng": self.rng.bit_generator.state}

    def restore(self, snap: dict[str, Any]) -> None:
        """Go back to a :meth:`snapshot` (the reference error is left as it is)."""
        for name, value in snap["velocity"].items():
            np.copyto(self.velocity[name], value)
        self.chain = None if snap["chain"] is None else snap["chain"].copy()
        self.chain_needs_start = snap["chain_needs_start"]
        self.sparsity_estimate = None if snap["sparsity_estimate"] is None \
            else snap["sparsity_estimate"].copy()
        self.rng.bit_generator.state = copy.deepcopy(snap["rng"])

    def to_dict(self, json_safe: Any) -> dict[str, Any]:
        """The state as :meth:`RBM.get_state` stores it (``json_safe`` makes the
        generator's state JSON-able)."""
        state: dict[str, Any] = {f"velocity_{k}": v.copy() for k, v in self.velocity.items()}
        if self.chain is not None:
            state["chain"] = self.chain.copy()
        if self.sparsity_estimate is not None:
            state["sparsity_estimate"] = self.sparsity_estimate.copy()
        state["rng"] = json_safe(self.rng.bit_generator.state)
        state["reference_error"] = self.reference_error
        state["chain_needs_start"] = bool(self.chain_needs_start)
        return state

    def load(self, state: Mapping[str, Any], *, chain_shape: tuple[int, int]) -> None:
        """Take velocities, chains, estimate, generator and reference from ``state``
        (as :meth:`to_dict` wrote it); the velocities must have their present shapes."""
        velocity = {}
        for name, current in self.velocity.items():
            key = f"velocity_{name}"
            velocity[name] = check_array(state[key], key, current.shape)
        chain = state.get("chain")
        if chain is not None:
            chain = np.array(chain, dtype=F32, order="C")
            if chain.shape != chain_shape:
                raise ParameterError(f"state['chain'] has shape {chain.shape}; expected "
                                     f"{chain_shape}")
        self.velocity = velocity
        self.chain = chain
        self.chain_needs_start = bool(state.get("chain_needs_start", False))
        estimate = state.get("sparsity_estimate")
        self.sparsity_estimate = None if estimate is None else np.array(estimate, dtype=F32)
        try:
            self.rng.bit_generator.state = dict(state["rng"])
        except (TypeError, ValueError, KeyError) as exc:
            raise ParameterError(f"state['rng'] is not a generator state for "
                                 f"{type(self.rng.bit_generator).__name__}: {exc}") from None
        reference = state.get("reference_error")
        self.reference_error = None if reference is None else float(reference)


def check_array(value: Any, key: str, shape: tuple[int, ...]) -> np.ndarray:
    """``state[key]`` as a C-contiguous float32 array of ``shape`` with finite values."""
    array = np.array(value, dtype=F32, order="C")
    if array.shape != shape:
        raise ParameterError(f"state[{key!r}] has shape {array.shape}; expected {shape}")
    if not np.isfinite(array).all():
        raise ParameterError(f"state[{key!r}] holds NaN or infinite values")
    return array
