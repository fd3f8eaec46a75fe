"""Tests of timbrel.audio: discovery, decoding, downmix, resampling, bad input."""

from __future__ import annotations

import os
import struct
import tempfile
from pathlib import Path

import librosa
import numpy as np
import pytest
import soundfile as sf
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from timbrel import AudioReadError, ParameterError
from timbrel.audio import discover, load, read_blocks, read_info


@pytest.fixture
def rng():
    return np.random.default_rng(7)


def _tone(freq, sr, seconds=1.0, amp=0.5):
    t = np.arange(int(sr * seconds)) / sr
    return (amp * np.sin(2 * np.pi * freq * t)).astype(np.float32)


def test_folder_discovery_is_recursive_sorted_and_case_blind(tmp_path):
    for rel in ["b/z.WAV", "a.flac", "b/a.wav", "c/d/e.ogg", "notes.txt", "x.Mp3"]:
        p = tmp_path / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(b"x")
    items, extra = discover(tmp_path)
    assert [i.source for i in items] == ["a.flac", "b/a.wav", "b/z.WAV", "c/d/e.ogg", "x.Mp3"]
    assert extra == []
    assert all(i.path.is_absolute() for i in items)


def test_symlink_loop_terminates(tmp_path):
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "a.wav").write_bytes(b"x")
    os.symlink(tmp_path, tmp_path / "sub" / "loop")
    items, _ = discover(tmp_path)
    assert [i.source for i in items] == ["sub/a.wav"]


def test_manifest_carries_columns_and_resolves_relative_paths(tmp_path):
    (tmp_path / "clips").mkdir()
    for name in ["one.wav", "two.wav"]:
        sf.write(tmp_path / "clips" / name, np.zeros(1000, np.float32), 16000)
    manifest = tmp_path / "m.csv"
    manifest.write_text("path,label,split\nclips/two.wav,b,test\nclips/one.wav,a,train\n")
    items, extra = discover(manifest)
    assert extra == ["label", "split"]
    assert [(i.source, dict(i.extra)) for i in items] == [
        ("clips/two.wav", {"label": "b", "split": "test"}),
        ("clips/one.wav", {"label": "a", "split": "train"})]
    assert items[0].path.resolve() == (tmp_path / "clips" / "two.wav").resolve()


@pytest.mark.parametrize("escape", ["../../etc/passwd", "/etc/passwd", "clips/../../x.wav"])
def test_manifest_paths_outside_the_folder_are_refused(tmp_path, escape):
    manifest = tmp_path / "m.csv"
    manifest.write_text(f"path,label\n{escape},a\n")
    with pytest.raises(ParameterError, match="leads outside the manifest's folder"):
        discover(manifest)
    items, _ = discover(manifest, allow_outside=True)
    assert len(items) == 1


@pytest.mark.parametrize(("text", "match"), [("file,label\na.wav,x\n", "no 'path' column"),
                                             ("path\na.wav\na.wav\n", "listed twice"),
                                             ("path\n\n,\n", "empty path")])
def test_malformed_manifests(tmp_path, text, match):
    manifest = tmp_path / "m.csv"
    manifest.write_text(text)
    with pytest.raises(ParameterError, match=match):
        discover(manifest)


def test_missing_source(tmp_path):
    with pytest.raises(ParameterError, match="no such folder or manifest"):
        discover(tmp_path / "nope")


def test_a_source_without_clips_is_an_error(tmp_path):
    # "0 of 0 files cached" with exit 0 hid a wrong folder or an empty manifest
    (tmp_path / "readme.txt").write_text("no audio here")
    (tmp_path / "sub").mkdir()
    with pytest.raises(ParameterError, match=r"no audio files .*searched for \.wav, \.flac"):
        discover(tmp_path)
    manifest = tmp_path / "m.csv"
    manifest.write_text("path,label\n")
    with pytest.raises(ParameterError, match=r"m\.csv: the manifest lists no files"):
        discover(manifest)


@pytest.mark.parametrize("subtype", ["PCM_16", "PCM_24", "PCM_32", "FLOAT", "DOUBLE"])
def test_stereo_downmix_is_channel_mean(tmp_path, rng, subtype):
    # common practice: mono downmix = average of the channels
    stereo = (0.3 * rng.standard_normal((8000, 2))).clip(-1, 1)
    path = tmp_path / "s.wav"
    sf.write(path, stereo, 16000, subtype=subtype)
    decoded, _ = sf.read(path, dtype="float32")
    mono = load(path, sr=16000)
    np.testing.assert_allclose(mono, decoded.mean(axis=1), atol=1e-6)
    np.testing.assert_allclose(load(path, sr=16000, channel=1), decoded[:, 1], atol=1e-7)
    with pytest.raises(AudioReadError, match="has 2 channel"):
        load(path, sr=16000, channel=2)


@pytest.mark.parametrize(("sr_in", "freq"), [(44100, 1000.0), (48000, 3000.0), (8000, 440.0),
                                             (22050, 5000.0)])
def test_resampling_keeps_a_tones_frequency(tmp_path, sr_in, freq):
    path = tmp_path / "t.wav"
    sf.write(path, _tone(freq, sr_in, seconds=2.0), sr_in, subtype="FLOAT")
    y = load(path, sr=16000)
    assert abs(y.size - 2 * 16000) <= 2
    spectrum = np.abs(np.fft.rfft(y * np.hanning(y.size)))
    peak_hz = spectrum.argmax() * 16000 / y.size
    assert peak_hz == pytest.approx(freq, abs=1.0)
    # librosa.resample with soxr_hq as a general-purpose reference
    ref = librosa.resample(_tone(freq, sr_in, seconds=2.0), orig_sr=sr_in, target_sr=16000,
                           res_type="soxr_hq")
    n = min(ref.size, y.size)
    np.testing.assert_allclose(y[:n], ref[:n], atol=2e-3)


@pytest.mark.parametrize("sr_in", [16000, 44100])
def test_blocks_concatenate_to_the_whole_file(tmp_path, rng, sr_in):
    path = tmp_path / "long.flac"
    sf.write(path, (0.2 * rng.standard_normal(sr_in * 3)).clip(-1, 1), sr_in)
    whole = np.concatenate(list(read_blocks(path, sr=16000, block_seconds=100)))
    pieces = list(read_blocks(path, sr=16000, block_seconds=0.37))
    assert len(pieces) > 5
    joined = np.concatenate(pieces)
    assert joined.dtype == np.float32
    assert joined.size == whole.size
    np.testing.assert_allclose(joined, whole, atol=1e-4)


def _wav_header(n_channels=1, sr=16000, bits=16, data_bytes=0, claimed_data=None):
    claimed = data_bytes if claimed_data is None else claimed_data
    block = n_channels * bits // 8
    return (b"RIFF" + struct.pack("<I", 36 + claimed) + b"WAVEfmt " +
            struct.pack("<IHHIIHH", 16, 1, n_channels, sr, sr * block, block, bits) +
            b"data" + struct.pack("<I", claimed))


def _bad_files(tmp_path, rng):
    good = tmp_path / "good.wav"
    sf.write(good, _tone(440, 16000), 16000)
    raw = good.read_bytes()
    nan = np.zeros(4000, np.float32)
    nan[100] = np.nan
    inf = np.zeros(4000, np.float32)
    inf[7] = np.inf
    files = {
        "empty.wav": (b"", "empty file"),
        "random.wav": (rng.bytes(4096), "not readable as audio"),
        "text.flac": (b"hello, this is text\n" * 20, "not readable as audio"),
        "truncated_header.wav": (raw[:20], "not readable as audio"),
        "no_samples.wav": (_wav_header(data_bytes=0), "no samples"),
    }
    out = {}
    for name, (data, reason) in files.items():
        (tmp_path / name).write_bytes(data)
        out[name] = reason
    sf.write(tmp_path / "nan.wav", nan, 16000, subtype="FLOAT")
    out["nan.wav"] = "NaN or infinite"
    sf.write(tmp_path / "inf.wav", inf, 16000, subtype="FLOAT")
    out["inf.wav"] = "NaN or infinite"
    (tmp_path / "folder.wav").mkdir()
    out["folder.wav"] = "is a folder"
    return out


def test_every_bad_input_gets_a_named_reason(tmp_path, rng):
    for name, reason in _bad_files(tmp_path, rng).items():
        with pytest.raises(AudioReadError) as info:
            load(tmp_path / name, sr=16000)
        assert reason in info.value.reason, name
        assert name in str(info.value)


def test_missing_file(tmp_path):
    with pytest.raises(AudioReadError, match="no such file"):
        read_info(tmp_path / "none.wav")


def test_unreadable_permission(tmp_path):
    folder = Path(tempfile.mkdtemp())
    try:
        os.chmod(folder, 0o755)
        path = folder / "locked.wav"
        sf.write(path, np.zeros(1000, np.float32), 16000)
        os.chmod(path, 0)
        if os.geteuid() != 0:
            with pytest.raises(AudioReadError, match="permission denied"):
                read_info(path)
            return
        # root reads anything, so check in a forked child that became the user 'nobody'
        read_end, write_end = os.pipe()
        pid = os.fork()
        if pid == 0:  # child
            os.close(read_end)
            message = b"read without error"
            try:
                os.setuid(65534)
                read_info(path)
            except AudioReadError as exc:
                message = exc.reason.encode()
            except BaseException as exc:  # report anything else to the parent
                message = repr(exc).encode()
            os.write(write_end, message)
            os._exit(0)
        os.close(write_end)
        with os.fdopen(read_end, "rb") as fh:
            message = fh.read().decode()
        os.waitpid(pid, 0)
        assert message == "permission denied"
    finally:
        for p in folder.iterdir():
            p.unlink()
        folder.rmdir()


def test_non_utf8_file_name_is_found_and_read(tmp_path):
    name = os.fsdecode(b"caf\xe9.wav")
    path = tmp_path / name
    with open(path, "wb") as fh:  # soundfile cannot open a non-UTF-8 name itself
        sf.write(fh, _tone(440, 16000), 16000, format="WAV")
    items, _ = discover(tmp_path)
    assert [i.source for i in items] == ["caf\\xe9.wav"]
    assert load(items[0].path, sr=16000).size == 16000


@settings(max_examples=150, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.binary(max_size=2048))
def test_decoder_boundary_random_bytes(tmp_path, data):
    # whatever the bytes, the reader returns finite float32 audio or raises AudioReadError
    path = tmp_path / "fuzz.wav"
    path.write_bytes(data)
    try:
        y = load(path, sr=16000)
    except AudioReadError:
        return
    assert y.dtype == np.float32 and np.isfinite(y).all()


@settings(max_examples=150, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(channels=st.integers(0, 9), sr=st.integers(0, 400000),
       bits=st.sampled_from([0, 8, 12, 16, 24, 32, 64]),
       claimed=st.integers(0, 2**31), payload=st.binary(max_size=512))
def test_decoder_boundary_generated_wav_headers(tmp_path, channels, sr, bits, claimed, payload):
    # RIFF/WAVE headers with arbitrary fields and lengths (hypothesis)
    path = tmp_path / "hdr.wav"
    path.write_bytes(_wav_header(channels, sr, bits, claimed_data=claimed) + payload)
    try:
        y = load(path, sr=16000)
    except AudioReadError:
        return
    assert y.dtype == np.float32 and np.isfinite(y).all()
