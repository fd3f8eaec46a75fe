"""Typed configuration: one object from the TOML file to the model file and the dataset.

A configuration has three tables:

``[frontend]``
    How audio becomes log-mel frames (:class:`FrontEndConfig`). Changing any key
    changes the frames, so the frame cache keys its clips on these values.
``[model]``
    Keyword arguments of :class:`timbrel.model.RBM`; checked against the
    estimator's own signature when training starts.
``[training]``
    How the trainer feeds the model from a frame cache (:class:`TrainingConfig`).

The same :class:`Config` is snapshotted into the frame cache, the model file and
the Parquet schema metadata, so provenance is never typed twice.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import tomllib
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

from ._errors import ConfigError

__all__ = [
    "Config",
    "FrontEndConfig",
    "TrainingConfig",
    "load_config",
    "parse_override",
]

WINDOWS = ("hann", "hamming", "blackman")
MEL_SCALES = ("slaney", "htk")
FILTER_NORMS = ("slaney", "none")
WHITENINGS = ("none", "zca")


def _field(default: Any, help: str, *, low: float | None = None, high: float | None = None,
           choices: tuple[Any, ...] | None = None, optional: bool = False) -> Any:
    """A dataclass field carrying its own allowed range, so validation and docs share one source."""
    return dataclasses.field(
        default=default,
        metadata={"help": help, "low": low, "high": high, "choices": choices, "optional": optional},
    )


def _check_fields(obj: Any, section: str) -> None:
    for f in dataclasses.fields(obj):
        value = getattr(obj, f.name)
        meta = f.metadata
        key = f"{section}.{f.name}"
        if value is None:
            if meta.get("optional"):
                continue
            raise ConfigError(f"{key} must be set")
        choices = meta.get("choices")
        if choices is not None:
            if value not in choices:
                allowed = ", ".join(repr(c) for c in choices)
                raise ConfigError(f"{key} = {value!r} is not one of {allowed}")
            continue
        expected = f.type if isinstance(f.type, str) else getattr(f.type, "__name__", "")
        if "bool" in expected:
            if not isinstance(value, bool):
                raise ConfigError(f"{key} = {value!r} must be true or false")
            continue
        if "int" in expected and "float" not in expected:
            if isinstance(value, bool) or not isinstance(value, int):
                raise ConfigError(f"{key} = {value!r} must be a whole number")
        elif isinstance(value, bool) or not isinstance(value, int | float):
            raise ConfigError(f"{key} = {value!r} must be a number")
        if isinstance(value, float) and not math.isfinite(value):
            raise ConfigError(f"{key} = {value!r} must be finite")
        low, high = meta.get("low"), meta.get("high")
        if (low is not None and value < low) or (high is not None and value > high):
            raise ConfigError(f"{key} = {value!r} is outside the allowed range [{low}, {high}]")


@dataclasses.dataclass(frozen=True)
class FrontEndConfig:
    """Settings of the log-mel front end.

    Frame ``i`` covers samples ``[i * hop_length, i * hop_length + n_fft)`` of the
    resampled clip, with the analysis window of ``win_length`` samples centred in
    it; its start time is ``i * hop_length / sample_rate`` seconds. A clip of ``n``
    samples gives ``1 + (n - n_fft) // hop_length`` frames (none if ``n < n_fft``).
    """

    sample_rate: int = _field(16000, "rate every clip is resampled to, Hz", low=1000, high=384000)
    window_ms: float = _field(25.0, "analysis window length, milliseconds", low=1.0, high=1000.0)
    hop_ms: float = _field(10.0, "hop between frame starts, milliseconds", low=0.5, high=1000.0)
    n_fft: int | None = _field(None, "FFT length in samples; default: next power of two "
                               "at or above the window", low=16, high=65536, optional=True)
    window: str = _field("hann", "window function", choices=WINDOWS)
    n_mels: int = _field(64, "number of mel bands", low=1, high=512)
    fmin: float = _field(0.0, "lowest filter edge, Hz", low=0.0, high=192000.0)
    fmax: float | None = _field(None, "highest filter edge, Hz; default: sample_rate / 2",
                                low=1.0, high=192000.0, optional=True)
    mel_scale: str = _field("slaney", "mel formula: 'slaney' (linear below 1 kHz, log above) "
                            "or 'htk' (2595 log10(1 + f/700))", choices=MEL_SCALES)
    filter_norm: str = _field("slaney", "filter normalisation: 'slaney' (equal area) or 'none'",
                              choices=FILTER_NORMS)
    log_offset: float = _field(1e-6, "frames are log(mel power + log_offset)", low=1e-20, high=1e3)
    context: int = _field(5, "neighbouring frames stacked on each side into one visible vector",
                          low=0, high=50)
    channel: int = _field(-1, "channel to keep: -1 mixes all channels down to mono, "
                          "k >= 0 keeps channel k", low=-1, high=255)

    def __post_init__(self) -> None:
        _check_fields(self, "frontend")
        if self.n_fft is not None and self.n_fft < self.win_length:
            raise ConfigError(
                f"frontend.n_fft = {self.n_fft} is shorter than the window "
                f"({self.win_length} samples = {self.window_ms} ms at {self.sample_rate} Hz)")
        nyquist = self.sample_rate / 2
        if self.fmax is not None and self.fmax > nyquist:
            raise ConfigError(f"frontend.fmax = {self.fmax} is above the Nyquist frequency "
                              f"{nyquist} Hz of sample_rate {self.sample_rate}")
        if self.fmin >= self.upper_frequency:
            raise ConfigError(f"frontend.fmin = {self.fmin} must be below fmax "
                              f"({self.upper_frequency} Hz)")
        if self.hop_length < 1:
            raise ConfigError(f"frontend.hop_ms = {self.hop_ms} is under one sample")

    @property
    def win_length(self) -> int:
        """Window length in samples."""
        return max(1, round(self.window_ms * self.sample_rate / 1000.0))

    @property
    def hop_length(self) -> int:
        """Hop in samples."""
        return round(self.hop_ms * self.sample_rate / 1000.0)

    @property
    def fft_length(self) -> int:
        """``n_fft`` or, when unset, the next power of two at or above the window."""
        if self.n_fft is not None:
            return self.n_fft
        return 1 << (self.win_length - 1).bit_length()

    @property
    def upper_frequency(self) -> float:
        """``fmax`` or, when unset, the Nyquist frequency."""
        return float(self.fmax) if self.fmax is not None else self.sample_rate / 2

    @property
    def n_positions(self) -> int:
        """Frames stacked into one visible vector: ``2 * context + 1``."""
        return 2 * self.context + 1

    @property
    def n_visible(self) -> int:
        """Length of one visible vector: ``n_positions * n_mels``."""
        return self.n_positions * self.n_mels

    def frame_differences(self, other: FrontEndConfig, *, ours: str = "config",
                          theirs: str = "cache") -> list[str]:
        """The frame settings (all but ``context``) in which ``other`` differs, each as
        ``"name: OURS value, THEIRS value"``; empty when both make the same frames."""
        return [f"{f.name}: {ours} {getattr(self, f.name)!r}, {theirs} {getattr(other, f.name)!r}"
                for f in dataclasses.fields(self)
                if f.name != "context" and getattr(self, f.name) != getattr(other, f.name)]

    def frame_key(self) -> str:
        """Hash of every key that changes the frames (context does not)."""
        d = dataclasses.asdict(self)
        d.pop("context")
        return _digest(d)


@dataclasses.dataclass(frozen=True)
class TrainingConfig:
    """How the trainer feeds the model from a frame cache."""

    validation_fraction: float = _field(
        0.1, "share of clips (never frames of a training clip) held out", low=0.0, high=0.5)
    chunk_frames: int = _field(
        65536, "frames read into memory at once and shuffled together", low=256, high=1 << 26)
    max_frames: int = _field(
        0, "train on at most this many frames per epoch (0: all)", low=0, high=1 << 40)
    whiten: str = _field(
        "none", "decorrelate the context windows before the model: 'none' or 'zca'",
        choices=WHITENINGS)
    # on by default: chosen on the validation splits of bench/domains.py (DEVELOPERS.md)
    window_contrast: bool = _field(
        True, "subtract each context window's mean and divide by its spread, before "
        "whitening and the model (false keeps a likelihood for `timbrel score`)")
    whiten_epsilon: float = _field(
        0.1, "added to each eigenvalue of the windows' covariance before whitening",
        low=1e-6, high=100.0)

    def __post_init__(self) -> None:
        _check_fields(self, "training")


#: Settings added with a default other than what files written before them did:
#: ``(table, key) -> value`` those files were trained with (see :meth:`Config.from_stored`).
EARLIER_VALUES: dict[tuple[str, str], Any] = {
    # added off, later on by default (chosen on validation, DEVELOPERS.md): files that
    # lack it were fitted without normalising their windows
    ("training", "window_contrast"): False,
}


@dataclasses.dataclass(frozen=True)
class Config:
    """The whole configuration: front end, model keywords, training."""

    frontend: FrontEndConfig = dataclasses.field(default_factory=FrontEndConfig)
    model: Mapping[str, Any] = dataclasses.field(default_factory=dict)
    training: TrainingConfig = dataclasses.field(default_factory=TrainingConfig)

    def to_dict(self) -> dict[str, Any]:
        """Plain, JSON-able dictionary with the three tables."""
        return {
            "frontend": dataclasses.asdict(self.frontend),
            "model": dict(self.model),
            "training": dataclasses.asdict(self.training),
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any], *, source: str = "config") -> Config:
        """Build and validate from a dictionary shaped like the TOML file."""
        unknown = set(data) - {"frontend", "model", "training"}
        if unknown:
            raise ConfigError(f"{source}: unknown table(s) {sorted(unknown)}; "
                              "expected frontend, model, training")
        tables = {}
        for name, kind in (("frontend", FrontEndConfig), ("training", TrainingConfig)):
            table = data.get(name, {})
            if not isinstance(table, Mapping):
                raise ConfigError(f"{source}: [{name}] must be a table")
            allowed = {f.name for f in dataclasses.fields(kind)}
            bad = set(table) - allowed
            if bad:
                raise ConfigError(f"{source}: unknown key(s) {sorted(bad)} in [{name}]; "
                                  f"allowed: {', '.join(sorted(allowed))}")
            tables[name] = kind(**table)
        model = data.get("model", {})
        if not isinstance(model, Mapping):
            raise ConfigError(f"{source}: [model] must be a table")
        frontend, training = tables["frontend"], tables["training"]
        assert isinstance(frontend, FrontEndConfig) and isinstance(training, TrainingConfig)
        return cls(frontend=frontend, model=dict(model), training=training)

    @classmethod
    def from_stored(cls, data: Mapping[str, Any], *, source: str = "config") -> Config:
        """Build the configuration a model file or checkpoint was trained with.

        A setting added after the file was written is absent from it; the file was trained
        as that setting's earlier value (:data:`EARLIER_VALUES`) says, not as today's
        default. A user's configuration file, or a frame cache starting a new fit, reads
        with :meth:`from_dict` and gets today's defaults.
        """
        stored = {name: dict(table) if isinstance(table, Mapping) else table
                  for name, table in data.items()}
        for (table, key), value in EARLIER_VALUES.items():
            if isinstance(stored.get(table, {}), Mapping):
                stored.setdefault(table, {}).setdefault(key, value)
        return cls.from_dict(stored, source=source)

    def with_overrides(self, overrides: Iterable[str]) -> Config:
        """Return a copy with ``table.key=value`` strings applied (values parsed as TOML)."""
        data = self.to_dict()
        for text in overrides:
            table, key, value = parse_override(text)
            data.setdefault(table, {})[key] = value
        return Config.from_dict(data, source="override")


def parse_override(text: str) -> tuple[str, str, Any]:
    """Split ``"frontend.n_mels=64"`` into ``("frontend", "n_mels", 64)``.

    The value is parsed as a TOML value, so ``64`` is an integer, ``1e-3`` a float,
    ``true`` a boolean and ``"htk"`` or a bare ``htk`` a string. A key without a
    table is looked up in ``[frontend]``, then ``[training]``, else ``[model]``.
    """
    if "=" not in text:
        raise ConfigError(f"override {text!r} must look like table.key=value")
    name, raw = (part.strip() for part in text.split("=", 1))
    if not name:
        raise ConfigError(f"override {text!r} has no key")
    if "." in name:
        table, key = name.split(".", 1)
    else:
        key = name
        if key in {f.name for f in dataclasses.fields(FrontEndConfig)}:
            table = "frontend"
        elif key in {f.name for f in dataclasses.fields(TrainingConfig)}:
            table = "training"
        else:
            table = "model"
    try:
        value = tomllib.loads(f"v = {raw}")["v"]
    except tomllib.TOMLDecodeError:
        value = raw  # a bare word such as htk
    return table, key, value


def load_config(path: str | Path | None = None, *, overrides: Iterable[str] = ()) -> Config:
    """Read a TOML configuration file and apply ``table.key=value`` overrides.

    Parameters
    ----------
    path : str or Path, optional
        TOML file with ``[frontend]``, ``[model]`` and ``[training]`` tables. Missing
        keys take the defaults of :class:`FrontEndConfig` and :class:`TrainingConfig`.
        ``None`` uses the defaults alone.
    overrides : iterable of str, default ()
        Single keys to change, e.g. ``["frontend.n_mels=64", "model.n_hidden=512"]``.

    Returns
    -------
    Config

    Raises
    ------
    ConfigError
        If the file is missing or not TOML, or a key is unknown or out of range;
        the message names the file, the key, the value and the allowed range.
    """
    data: dict[str, Any] = {}
    source = "defaults"
    if path is not None:
        source = str(path)
        try:
            with open(path, "rb") as fh:
                data = tomllib.load(fh)
        except FileNotFoundError:
            raise ConfigError(f"{path}: no such configuration file") from None
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
            raise ConfigError(f"{path}: not valid TOML ({exc})") from None
        except OSError as exc:
            raise ConfigError(f"{path}: cannot read ({exc.strerror})") from None
    try:
        config = Config.from_dict(data, source=source)
    except ConfigError as exc:
        msg = str(exc)
        raise ConfigError(msg if msg.startswith(source) else f"{source}: {msg}") from None
    except TypeError as exc:  # pragma: no cover - guarded by the key checks above
        raise ConfigError(f"{source}: {exc}") from None
    return config.with_overrides(overrides)


def _digest(obj: Any) -> str:
    text = json.dumps(obj, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()[:16]
