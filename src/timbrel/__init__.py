"""timbrel: learn per-frame features from sound.

Audio -> log-mel frames -> a Gaussian-visible restricted Boltzmann machine with
rectified hidden units, trained by contrastive divergence -> per-frame hidden
activations in a Parquet dataset.

The public names below are imported on first use (PEP 562), so ``import timbrel`` and
the ``timbrel`` command start without loading numpy, scipy or pyarrow until a command
needs them.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

from ._errors import (
    AudioReadError,
    CacheError,
    ConfigError,
    DivergenceError,
    ExportError,
    ModelFileError,
    NotFittedError,
    OutputError,
    ParameterError,
    TimbrelError,
    WorkerError,
)

if TYPE_CHECKING:
    from .config import Config, FrontEndConfig, TrainingConfig, load_config
    from .extractor import Extractor, load
    from .frontend import BandStats, FrontEnd, mel_filter_bank, stack_context
    from .model import RBM

#: public name -> the stage module that defines it, imported on first access
_LAZY = {
    "Config": "config", "FrontEndConfig": "config", "TrainingConfig": "config",
    "load_config": "config",
    "BandStats": "frontend", "FrontEnd": "frontend", "mel_filter_bank": "frontend",
    "stack_context": "frontend",
    "RBM": "model",
    "Extractor": "extractor", "load": "extractor",
}


def __getattr__(name: str) -> Any:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'timbrel' has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY))


__all__ = [
    "RBM",
    "AudioReadError",
    "BandStats",
    "CacheError",
    "Config",
    "ConfigError",
    "DivergenceError",
    "ExportError",
    "Extractor",
    "FrontEnd",
    "FrontEndConfig",
    "ModelFileError",
    "NotFittedError",
    "OutputError",
    "ParameterError",
    "TimbrelError",
    "TrainingConfig",
    "WorkerError",
    "__version__",
    "load",
    "load_config",
    "mel_filter_bank",
    "stack_context",
]
