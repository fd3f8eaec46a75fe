"""Bad and unusual audio beside good clips: the good clips' outputs stay complete and
identical to a clean run, each bad file is named once with its reason (terminal and the
failures file), nothing prints a traceback, and the exit codes are the README's (0 with a
loud summary; 3 with --strict when any file failed)."""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from _bad_audio import KINDS, Kind, wav_header
from _faultkit import (
    FIT_OPTIONS,
    SETTINGS,
    cache_clips,
    dataset_rows,
    failures,
    invoke,
    no_traceback,
    run_child,
    temporaries,
    write_good_clips,
)
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from timbrel import TimbrelError
from timbrel.audio import load
from timbrel.cache import FrameCache
from timbrel.frontend import FrontEnd

pytestmark = pytest.mark.filterwarnings("ignore::UserWarning")


@pytest.fixture(scope="module")
def clean(tmp_path_factory):
    """Cache, model and dataset of the good clips alone: the reference of every kind."""
    root = tmp_path_factory.mktemp("clean")
    audio = root / "audio"
    good = write_good_clips(audio)
    assert invoke("frames", audio, "--out", root / "cache", "-q", "-j", "1",
                  *SETTINGS).exit_code == 0
    assert invoke("fit", root / "cache", "--out", root / "model.npz", "-q",
                  *FIT_OPTIONS).exit_code == 0
    assert invoke("export", audio, "--model", root / "model.npz", "--out", root / "ds", "-q",
                  "-j", "1").exit_code == 0
    return {"good": good, "model": root / "model.npz", "clips": cache_clips(root / "cache"),
            "rows": dataset_rows(root / "ds")}


def _predicted_frames(path: Path, fe: FrontEnd) -> int:
    with open(path, "rb") as fh:
        info = sf.info(fh)
    n = round(info.frames * fe.config.sample_rate / info.samplerate)
    return fe.n_frames(n)


def _check_run(kind: Kind, audio: Path, work: Path, clean: dict, *, frames_result,
               export_result) -> None:
    cache, dataset = work / "cache", work / "ds"
    for result in (frames_result, export_result):
        no_traceback(result)
    # README: 0 with a loud summary; --strict (given to export) exits 3 when any file failed
    assert frames_result.exit_code == 0, frames_result.output
    assert export_result.exit_code == (3 if kind.valid is False else 0), export_result.output

    clips, rows = cache_clips(cache), dataset_rows(dataset)
    for name in clean["good"]:  # the good clips: complete and bit-identical to the clean run
        assert np.array_equal(clips[name], clean["clips"][name]), name
        assert np.array_equal(rows[name], clean["rows"][name]), name
    for out, result in ((cache, frames_result), (dataset, export_result)):
        failed = failures(out)
        lines = [ln for ln in result.output.splitlines() if ln.startswith("failed: ")]
        if kind.valid is False:
            assert list(failed) == [kind.source], failed
            assert kind.reason.lower() in failed[kind.source].lower(), failed
            assert lines == [f"failed: {kind.source}: {failed[kind.source]}"]
            assert "1 FAILED" in result.output
        else:
            assert failed == {} and lines == [], failed
        assert temporaries(out) == []
    if kind.valid is False:  # one file, one reason, whichever stage met it
        assert failures(cache)[kind.source] == failures(dataset)[kind.source]
    extra = set(clips) - set(clean["good"])
    if kind.valid:
        assert extra == {kind.source} and set(rows) == set(clips)
        fe = FrontEnd(FrameCache.open(cache).config.frontend)
        got = clips[kind.source]
        assert np.isfinite(got).all() and np.isfinite(rows[kind.source]).all()
        path = os.path.join(os.fsencode(audio), os.fsencode(kind.entry))
        # frames of n resampled samples: 1 + (n - n_fft) // hop (README; librosa.util.frame)
        assert abs(len(got) - _predicted_frames(Path(os.fsdecode(path)), fe)) <= 1
        assert len(rows[kind.source]) == len(got)
    else:
        assert extra == set() and set(rows) == set(clean["good"])


@pytest.mark.parametrize("kind", [pytest.param(k, id=k.name, marks=[pytest.mark.slow] if k.slow
                                               else []) for k in KINDS])
def test_each_kind_beside_good_files(kind, tmp_path, clean):
    audio = tmp_path / "audio"
    write_good_clips(audio)
    kind.build(audio)
    frames_result = invoke("frames", audio, "--out", tmp_path / "cache", "-q", "-j", "1",
                           *SETTINGS)
    export_result = invoke("export", audio, "--model", clean["model"], "--out",
                           tmp_path / "ds", "-q", "-j", "1", "--strict")
    _check_run(kind, audio, tmp_path, clean, frames_result=frames_result,
               export_result=export_result)


def test_kinds_cover_the_brief():
    # at least 20 kinds, with both outcomes represented
    assert len(KINDS) >= 20
    assert {k.valid for k in KINDS} == {True, False, None}


def test_all_kinds_together_in_one_folder(tmp_path, clean):
    # the overnight case: every quick kind at once, two worker processes
    audio = tmp_path / "audio"
    write_good_clips(audio)
    kinds = [k for k in KINDS if not k.slow]
    for kind in kinds:
        kind.build(audio)
    result = invoke("frames", audio, "--out", tmp_path / "cache", "-q", "-j", "2", *SETTINGS)
    no_traceback(result)
    assert result.exit_code == 0
    bad = {k.source for k in kinds if k.valid is False}
    assert set(failures(tmp_path / "cache")) == bad
    clips = cache_clips(tmp_path / "cache")
    assert set(clips) == set(clean["good"]) | {k.source for k in kinds if k.valid}
    for name in clean["good"]:
        assert np.array_equal(clips[name], clean["clips"][name])
    strict = invoke("frames", audio, "--out", tmp_path / "cache", "-q", "-j", "1", "--strict",
                    *SETTINGS)
    assert strict.exit_code == 3 and f"{len(bad)} FAILED" in strict.output


def test_unreadable_file(tmp_path, clean):
    """Permission denied. Root reads any file whatever its mode (POSIX: the superuser
    bypasses permission checks), so as root the run drops to the unprivileged user
    'nobody' in a child process, where mode 000 does stop the read."""
    kind = Kind("unreadable", "locked.wav", False, "permission denied",
                "mode 000: EACCES for an unprivileged user (POSIX)", lambda folder: None)
    work = Path(tempfile.mkdtemp(prefix="timbrel-perm-"))  # outside root's private tmp
    try:
        os.chmod(work, 0o755)
        audio = work / "audio"
        write_good_clips(audio)
        sf.write(audio / "locked.wav", np.zeros(4000), 16000)
        os.chmod(audio / "locked.wav", 0)
        user = None
        if os.geteuid() == 0:
            user = 65534  # nobody
            os.chown(work, user, user)
        shutil.copy(clean["model"], work / "model.npz")
        frames = run_child(["frames", audio, "--out", work / "cache", "-q", "-j", "1",
                            *SETTINGS], user=user)
        export = run_child(["export", audio, "--model", work / "model.npz", "--out",
                            work / "ds", "-q", "-j", "1", "--strict"], user=user)

        class Result:  # the child's exit code and both streams, shaped like CliRunner's
            def __init__(self, proc):
                self.exit_code, self.output = proc.returncode, proc.stdout + proc.stderr
                self.exception = None

        _check_run(kind, audio, work, clean, frames_result=Result(frames),
                   export_result=Result(export))
    finally:
        shutil.rmtree(work, ignore_errors=True)


# ---------------------------------------------------------------- the decoder boundary

_headers = st.builds(
    lambda sr, ch, bits, n, fmt: wav_header(sr=sr, channels=ch, bits=bits, data_bytes=n,
                                            fmt=fmt),
    st.one_of(st.sampled_from([0, 1, 7999, 8000, 44100, 2**31, 2**32 - 1]),
              st.integers(4000, 400000)),
    st.integers(0, 65535), st.sampled_from([0, 1, 8, 16, 24, 32, 64, 65535]),
    st.integers(0, 2**32 - 1), st.sampled_from([0, 1, 3, 6, 7, 0xFFFE, 0x55]))
_magics = st.sampled_from([b"", b"RIFF", b"RIFF\x24\x00\x00\x00WAVE", b"fLaC", b"OggS",
                           b"FORM\x00\x00\x00\x20AIFF", b"ID3", b"\xff\xfb"])


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                  HealthCheck.function_scoped_fixture])
@given(head=st.one_of(_headers, _magics), body=st.binary(max_size=3000))
def test_decoder_never_escapes_with_another_error(tmp_path, head, body):
    # any byte string: either mono float32 samples, finite, or a TimbrelError
    path = tmp_path / "fuzz.wav"
    path.write_bytes(head + body)
    try:
        y = load(path, sr=16000)
    except TimbrelError:
        return
    assert y.dtype == np.float32 and y.ndim == 1 and np.isfinite(y).all()


@pytest.mark.slow
@pytest.mark.skipif(not os.path.exists("/proc/self/status"), reason="reads VmHWM from /proc")
def test_three_hours_are_decoded_in_bounded_memory(tmp_path):
    """Peak memory of `frames` on a 3-hour file against a 1-minute file in the same run
    (a ratio, not a timing): decoded whole, 3 h at 16 kHz would take 691 MB as float32."""
    import subprocess
    import sys

    from _bad_audio import _three_hours
    from _faultkit import RUNNER

    peaks = {}
    for name in ("minute", "three_hours"):
        folder = tmp_path / name
        folder.mkdir()
        if name == "minute":
            sf.write(folder / "m.wav", np.zeros(60 * 16000, np.int16), 16000)
        else:
            _three_hours(folder)
        peak_file = tmp_path / f"peak-{name}"
        proc = subprocess.run([sys.executable, str(RUNNER), "--peak-to", str(peak_file), "none",
                               "frames", str(folder), "--out", str(tmp_path / f"cache-{name}"),
                               "-q", "-j", "1", *SETTINGS], stdout=subprocess.DEVNULL)
        assert proc.returncode == 0
        peaks[name] = int(peak_file.read_text())
    print(f"peak RSS of frames: {peaks}")
    three_hours_float32 = 3 * 3600 * 16000 * 4
    assert peaks["three_hours"] - peaks["minute"] < three_hours_float32 / 4, peaks
