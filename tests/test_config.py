"""Tests of timbrel.config: TOML loading, defaults, validation, overrides."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from timbrel import ConfigError
from timbrel.config import Config, FrontEndConfig, TrainingConfig, load_config, parse_override

CONFIGS = Path(__file__).resolve().parents[1] / "configs"


def test_default_toml_equals_builtin_defaults():
    # configs/default.toml documents the defaults; it must not drift from the code.
    loaded = load_config(CONFIGS / "default.toml")
    assert loaded.frontend == FrontEndConfig()
    assert loaded.training == TrainingConfig()
    # every [model] value shown equals the estimator's own default
    import inspect

    from timbrel.model import RBM

    defaults = {k: p.default for k, p in inspect.signature(RBM).parameters.items()}
    assert loaded.model and {k: defaults[k] for k in loaded.model} == dict(loaded.model)


@pytest.mark.parametrize("name", ["default.toml", "events.toml"])
def test_shipped_configs_load(name):
    config = load_config(CONFIGS / name)
    assert config.frontend.n_visible == config.frontend.n_positions * config.frontend.n_mels


@pytest.mark.parametrize(
    ("sr", "window_ms", "hop_ms", "win", "hop", "n_fft"),
    [(16000, 25.0, 10.0, 400, 160, 512), (22050, 40.0, 20.0, 882, 441, 1024),
     (44100, 23.22, 11.61, 1024, 512, 1024), (8000, 32.0, 16.0, 256, 128, 256)],
)
def test_derived_lengths(sr, window_ms, hop_ms, win, hop, n_fft):
    c = FrontEndConfig(sample_rate=sr, window_ms=window_ms, hop_ms=hop_ms)
    assert (c.win_length, c.hop_length, c.fft_length) == (win, hop, n_fft)
    assert c.upper_frequency == sr / 2


@pytest.mark.parametrize(
    ("override", "fragment"),
    [("frontend.n_mels=0", "frontend.n_mels = 0 is outside the allowed range [1, 512]"),
     ("frontend.window=triangle", "frontend.window = 'triangle' is not one of"),
     ("frontend.fmax=9000.0", "above the Nyquist frequency 8000.0"),
     ("frontend.n_fft=256", "shorter than the window (400 samples"),
     ("frontend.n_mels=2.5", "must be a whole number"),
     ("frontend.fmin=8000.0", "must be below fmax"),
     ("frontend.log_offset=0.0", "log_offset = 0.0 is outside"),
     ("training.validation_fraction=0.9", "validation_fraction = 0.9 is outside"),
     ("frontend.sample_rate=true", "must be a whole number"),
     ("frontend.nmels=40", "unknown key(s) ['nmels'] in [frontend]"),
     ("n_mels", "must look like table.key=value")],
)
def test_invalid_values_name_key_value_and_range(override, fragment):
    with pytest.raises(ConfigError) as info:
        load_config(overrides=[override])
    assert fragment in str(info.value)


def test_file_errors_name_the_file(tmp_path):
    with pytest.raises(ConfigError, match="no such configuration file"):
        load_config(tmp_path / "missing.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[frontend\nn_mels = 3\n")
    with pytest.raises(ConfigError, match=r"bad\.toml: not valid TOML"):
        load_config(bad)
    table = tmp_path / "table.toml"
    table.write_text("[frontend]\nn_mels = 0\n")
    with pytest.raises(ConfigError, match=r"table\.toml: frontend\.n_mels = 0"):
        load_config(table)
    unknown = tmp_path / "unknown.toml"
    unknown.write_text("[front]\nn_mels = 3\n")
    with pytest.raises(ConfigError, match="unknown table"):
        load_config(unknown)


def test_overrides_find_their_table():
    config = load_config(overrides=["n_mels=64", "validation_fraction=0.2", "n_hidden=99",
                                    "mel_scale=htk", "model.hidden=\"binary\""])
    assert config.frontend.n_mels == 64
    assert config.frontend.mel_scale == "htk"
    assert config.training.validation_fraction == 0.2
    assert config.model == {"n_hidden": 99, "hidden": "binary"}


def test_round_trip_through_dict():
    config = load_config(overrides=["n_mels=64", "model.n_hidden=128"])
    again = Config.from_dict(config.to_dict())
    assert again == config
    assert again != Config()


def test_stored_configs_lacking_a_later_setting_read_as_they_were_fitted():
    # a model file or checkpoint without training.window_contrast was fitted before the
    # setting existed (off); a user's file or a cache starting a new fit gets the default
    stored = Config().to_dict()
    del stored["training"]["window_contrast"]
    assert Config.from_dict(stored).training.window_contrast is True
    assert Config.from_stored(stored).training.window_contrast is False
    assert "window_contrast" not in stored["training"]  # the caller's dict is left alone
    # a stored value, and every other setting, are kept as written
    on = Config().with_overrides(["training.window_contrast=true", "model.n_hidden=7"])
    assert Config.from_stored(on.to_dict()) == on
    with pytest.raises(ConfigError, match="unknown key"):
        Config.from_stored({"training": {"nope": 1}})


def test_frame_key_ignores_context_only():
    base = FrontEndConfig()
    assert dataclasses.replace(base, context=2).frame_key() == base.frame_key()
    assert dataclasses.replace(base, n_mels=41).frame_key() != base.frame_key()


@given(st.one_of(st.integers(-10**6, 10**6), st.floats(allow_nan=False, allow_infinity=False,
                                                          width=32),
                 st.booleans(), st.text(alphabet="abcdefghij_", min_size=1, max_size=8)))
def test_parse_override_reads_toml_values(value):
    # the override parser takes TOML literals; a bare word stays a string (hypothesis)
    if isinstance(value, bool):
        raw = "true" if value else "false"
    elif isinstance(value, str):
        raw = value
    else:
        raw = repr(value)
    table, key, parsed = parse_override(f"model.k={raw}")
    assert (table, key) == ("model", "k")
    if isinstance(value, str) and value not in ("inf", "nan"):
        assert parsed == value
    elif not isinstance(value, str):
        assert parsed == value


@settings(max_examples=200, deadline=None)
@given(st.text(max_size=200))
def test_arbitrary_text_gives_config_error_or_config(tmp_path_factory, text):
    # whatever the file holds, loading either works or raises ConfigError (hypothesis fuzz)
    path = tmp_path_factory.mktemp("cfg") / "any.toml"
    path.write_text(text, encoding="utf-8")
    try:
        config = load_config(path)
    except ConfigError:
        return
    assert isinstance(config, Config)


@settings(max_examples=100, deadline=None)
@given(st.dictionaries(st.sampled_from(["sample_rate", "n_mels", "fmin", "fmax", "hop_ms",
                                        "window_ms", "context", "n_fft"]),
                       st.one_of(st.integers(-5, 100000), st.floats(-10, 1e5),
                                 st.text(max_size=4)), max_size=4))
def test_frontend_tables_validate_or_refuse(table):
    try:
        config = Config.from_dict({"frontend": table})
    except ConfigError:
        return
    fe = config.frontend
    assert fe.fft_length >= fe.win_length >= 1
    assert 0 <= fe.fmin < fe.upper_frequency <= fe.sample_rate / 2
