"""The model: a restricted Boltzmann machine with Gaussian visibles, pure numpy.

Read top-down, each module builds on the ones before it:

``_kernels``
    In-place float32 sigmoid, softplus, rectifier and the sums over stepped copies;
    bulk uniform and normal draws.
``units``
    The unit kinds as small objects: :class:`~timbrel.model.units.BinaryHidden`,
    :class:`~timbrel.model.units.SteppedHidden`,
    :class:`~timbrel.model.units.RectifiedHidden`,
    :class:`~timbrel.model.units.GaussianVisible`,
    :class:`~timbrel.model.units.BinaryVisible`.
``_params``
    The hyperparameters' allowed values, one declarative table.
``_state``
    Training state besides the parameters (velocities, chains, generator, buffers).
``_step``
    One contrastive-divergence gradient estimate.
``_update``
    The update rule: schedule, momentum, step limit, weight decay.
``_guard``
    The guarded epoch: snapshot, updates, divergence check, roll-back.
``_files``
    The model-file and checkpoint layouts, checksums, one atomic writer.
``_estimator``
    :class:`RBM`, the scikit-learn-style estimator, and :func:`read_model_file`.

The package imports nothing from timbrel but its error types and the atomic writer, so
the front end, trainer and exporter build on it freely.
"""

from ._estimator import EXACT_MAX_HIDDEN, RBM, ModelFile, rbm_from_parameters, read_model_file
from ._files import (
    CHECKPOINT_FORMAT,
    FORMAT_NAME,
    FORMAT_VERSION,
    read_checkpoint,
    write_checkpoint,
)
from ._guard import DivergenceWarning
from ._kernels import RELU_LINEAR_THRESHOLD, RELU_WINDOW_COPIES
from ._params import CONSTRAINTS

__all__ = [
    "CHECKPOINT_FORMAT",
    "CONSTRAINTS",
    "EXACT_MAX_HIDDEN",
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "RBM",
    "RELU_LINEAR_THRESHOLD",
    "RELU_WINDOW_COPIES",
    "DivergenceWarning",
    "ModelFile",
    "rbm_from_parameters",
    "read_checkpoint",
    "read_model_file",
    "write_checkpoint",
]
