"""The package's exception types.

Every error that timbrel expects (bad audio, bad configuration, a damaged
model file, ...) derives from :class:`TimbrelError`, so the command line can
catch the package's own errors once and print one clear line, while an
unexpected error still shows its traceback.
"""

from __future__ import annotations

__all__ = [
    "AudioReadError",
    "CacheError",
    "ConfigError",
    "DivergenceError",
    "ExportError",
    "ModelFileError",
    "NotFittedError",
    "OutputError",
    "ParameterError",
    "TimbrelError",
]


class TimbrelError(Exception):
    """Base class of every error timbrel raises on purpose."""


class ParameterError(TimbrelError, ValueError):
    """A function or estimator was given a value outside its allowed range."""


class ConfigError(ParameterError):
    """A configuration file or key is invalid; the message names key, value and range."""


class AudioReadError(TimbrelError):
    """An audio file could not be read or holds unusable samples.

    Parameters
    ----------
    path : str
        The file that failed.
    reason : str
        One short phrase saying why, e.g. ``"contains NaN or infinite samples"``.
    """

    def __init__(self, path: object, reason: str) -> None:
        self.path = str(path)
        self.reason = reason
        super().__init__(f"{self.path}: {reason}")


class CacheError(TimbrelError):
    """A frame cache is missing, incomplete or does not match the request."""


class ModelFileError(TimbrelError):
    """A model file is truncated, tampered with, of a newer format or otherwise unusable."""


class NotFittedError(TimbrelError, AttributeError):
    """An estimator method that needs fitted parameters was called before ``fit``."""


class DivergenceError(TimbrelError, ArithmeticError):
    """Training diverged repeatedly even after rolling back and lowering the learning rates."""


class OutputError(TimbrelError):
    """An output file or folder could not be written (disk full, I/O error, no permission).

    Raised instead of the bare ``OSError`` so that a write error is never mistaken for a
    bad input file, and the run stops with one line naming the path.

    Parameters
    ----------
    path : str
        The output that could not be written.
    reason : str
        The system's reason, e.g. ``"No space left on device"``.
    """

    def __init__(self, path: object, reason: str) -> None:
        self.path = str(path)
        self.reason = reason
        super().__init__(f"{self.path}: cannot write ({reason})")

    def __reduce__(self) -> tuple:
        # rebuilt from (path, reason) when it crosses from a worker process
        return (type(self), (self.path, self.reason))


class ExportError(TimbrelError):
    """An export could not start or finish (lock held, another model's dataset, ...)."""


class WorkerError(TimbrelError):
    """A worker process stopped abruptly (killed, or out of memory) in the middle of a task.

    What the finished tasks wrote is kept; running the same command again continues.
    """
