"""Tests of the command line (typer's CliRunner): exit codes and the one-line errors."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
import soundfile as sf
from typer.testing import CliRunner

from timbrel import __version__
from timbrel.cli import EXIT_FAILED_FILES, app, main

runner = CliRunner()


@pytest.fixture
def audio_dir(tmp_path):
    folder = tmp_path / "audio"
    folder.mkdir()
    rng = np.random.default_rng(3)
    for i in range(3):
        sf.write(folder / f"a{i}.wav", 0.1 * rng.standard_normal(16000), 16000)
    (folder / "bad.wav").write_bytes(b"not audio at all")
    return folder


def test_version():
    result = runner.invoke(app, ["--version"])
    assert result.exit_code == 0
    assert result.output.strip() == f"timbrel {__version__}"


def test_frames_builds_a_cache_and_reports_failures(tmp_path, audio_dir):
    result = runner.invoke(app, ["frames", str(audio_dir), "--out", str(tmp_path / "c"), "-q",
                                 "-j", "1"])
    assert result.exit_code == 0, result.output
    assert "3 of 4 files cached" in result.output
    assert "failed: bad.wav: not readable as audio" in result.output
    assert (tmp_path / "c" / "cache.json").is_file()


def test_strict_exits_with_the_documented_code(tmp_path, audio_dir):
    result = runner.invoke(app, ["frames", str(audio_dir), "--out", str(tmp_path / "c"), "-q",
                                 "-j", "1", "--strict"])
    assert result.exit_code == EXIT_FAILED_FILES == 3


@pytest.mark.parametrize(("args", "fragment"), [
    (["--set", "frontend.n_mels=0"], "frontend.n_mels = 0 is outside the allowed range"),
    (["--set", "frontend.window=box"], "frontend.window = 'box' is not one of"),
])
def test_bad_config_is_one_clear_line(tmp_path, audio_dir, args, fragment):
    result = runner.invoke(app, ["frames", str(audio_dir), "--out", str(tmp_path / "c"), "-q",
                                 *args])
    assert result.exit_code == 1
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert lines == [f"timbrel: error: {lines[0].split('error: ', 1)[1]}"]
    assert fragment in lines[0]
    assert "Traceback" not in result.output


def test_missing_source_is_one_line(tmp_path):
    code = main(["frames", str(tmp_path / "nowhere"), "--out", str(tmp_path / "c"), "-q"])
    assert code == 1


def test_usage_error_exit_code(tmp_path, audio_dir):
    result = runner.invoke(app, ["frames", str(audio_dir), "--out", str(tmp_path / "c"),
                                 "--workers", "0"])
    assert result.exit_code == 2


def test_python_dash_m_runs_the_same_command():
    result = subprocess.run([sys.executable, "-m", "timbrel", "--help"], capture_output=True,
                            text=True, timeout=120)
    assert result.returncode == 0
    assert "frames" in result.stdout


def test_importing_the_cli_defers_the_heavy_libraries():
    # a property, not a timing: `timbrel --help` must not pay for the numeric stack,
    # which is imported when a command runs (bench/bench_startup.py measures the time)
    heavy = ["numpy", "scipy", "librosa", "pyarrow", "sklearn", "matplotlib", "dask",
             "soundfile"]
    code = ("import sys, timbrel, timbrel.cli; "
            f"print(','.join(m for m in {heavy!r} if m in sys.modules))")
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                            timeout=120)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == ""


def test_lazy_public_names_resolve_to_their_modules():
    import timbrel
    import timbrel.frontend

    assert timbrel.FrontEnd is timbrel.frontend.FrontEnd
    assert set(timbrel.__all__) <= set(dir(timbrel))
    with pytest.raises(AttributeError):
        timbrel.no_such_name  # noqa: B018


def test_probe_command_pools_as_the_library_does():
    # the command spells the default out so that --help stays light; it must not drift
    import inspect

    from timbrel.cli import probe_command
    from timbrel.evaluation import PROBE_POOLS, probe

    option = inspect.signature(probe_command).parameters["pool"].default
    assert tuple(option.split(",")) == PROBE_POOLS == inspect.signature(probe).parameters[
        "pools"].default


def test_fit_inspect_export_probe_chain(tmp_path):
    # the whole chain through the command line on a tiny labelled set
    rng = np.random.default_rng(8)
    rows = ["path,label,split"]
    t = np.arange(8000) / 16000
    for i in range(8):
        freq = 500.0 if i % 2 else 3000.0
        y = 0.3 * np.sin(2 * np.pi * freq * t) + 0.01 * rng.standard_normal(t.size)
        sf.write(tmp_path / f"c{i}.wav", y.astype(np.float32), 16000)
        rows.append(f"c{i}.wav,{'ab'[i % 2]},{'train' if i < 6 else 'test'}")
    (tmp_path / "m.csv").write_text("\n".join(rows) + "\n")
    cache, model, ds = tmp_path / "cache", tmp_path / "model.npz", tmp_path / "ds"
    sets = ["--set", "frontend.n_mels=12", "--set", "frontend.context=1"]
    assert runner.invoke(app, ["frames", str(tmp_path / "m.csv"), "--out", str(cache), "-q",
                               "-j", "1", *sets]).exit_code == 0
    result = runner.invoke(app, ["fit", str(cache), "--out", str(model), "--n-hidden", "8",
                                 "--epochs", "2", "--seed", "1", "-q"])
    assert result.exit_code == 0, result.output
    assert "trained 2 epochs" in result.output
    result = runner.invoke(app, ["inspect", str(model), "--json"])
    assert result.exit_code == 0
    import json

    summary = json.loads(result.output)
    assert summary["n_hidden"] == 8 and summary["hidden"] == "relu"
    result = runner.invoke(app, ["inspect", str(model)])
    assert "sigma per band" in result.output
    result = runner.invoke(app, ["export", str(tmp_path / "m.csv"), "--model", str(model),
                                 "--out", str(ds), "-q", "-j", "1"])
    assert result.exit_code == 0, result.output
    assert "8 of 8 files exported" in result.output
    result = runner.invoke(app, ["export", str(cache), "--model", str(model), "--out", str(ds),
                                 "-q", "-j", "1", "--columns", "wide"])
    assert result.exit_code == 1 and "columns" in result.output
    result = runner.invoke(app, ["probe", str(ds), "--baseline", "mfcc"])
    assert result.exit_code == 0, result.output
    assert "rbm-relu" in result.output and "mfcc" in result.output
    result = runner.invoke(app, ["inspect", str(tmp_path / "missing.npz")])
    assert result.exit_code == 1 and "timbrel: error:" in result.output


def test_probe_choose_by_is_refused_with_events(tmp_path):
    # the choice is of how clips are pooled; a frame probe has no clips to pool
    result = runner.invoke(app, ["probe", str(tmp_path), "--events", "--choose-by", "origin"])
    assert result.exit_code == 1
    assert "--choose-by" in result.output and "--events" in result.output
