"""timbrel: learn per-frame features from sound.

Audio -> log-mel frames -> a Gaussian-visible restricted Boltzmann machine with
rectified hidden units, trained by contrastive divergence -> per-frame hidden
activations in a Parquet dataset.
"""

from __future__ import annotations

__version__ = "0.1.0"

from ._errors import (AudioReadError, CacheError, ConfigError, DivergenceError, ExportError,
                      ModelFileError, NotFittedError, OutputError, ParameterError,
                      TimbrelError)
from .config import Config, FrontEndConfig, TrainingConfig, load_config
from .frontend import BandStats, FrontEnd, mel_filter_bank, stack_context

__all__ = [
    "AudioReadError",
    "BandStats",
    "CacheError",
    "Config",
    "ConfigError",
    "DivergenceError",
    "ExportError",
    "FrontEnd",
    "FrontEndConfig",
    "ModelFileError",
    "NotFittedError",
    "OutputError",
    "ParameterError",
    "TimbrelError",
    "TrainingConfig",
    "__version__",
    "load_config",
    "mel_filter_bank",
    "stack_context",
]
