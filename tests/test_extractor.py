"""Tests of timbrel.extractor: features of waveforms, files and live streams."""

import subprocess
import sys
from pathlib import Path

import librosa
import numpy as np
import pyarrow as pa
import pyarrow.dataset as pads
import pytest
import soundfile as sf
from sklearn.base import clone
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import make_pipeline
from typer.testing import CliRunner

import timbrel
from timbrel import NotFittedError, ParameterError
from timbrel.cli import app
from timbrel.export import export

DATA = Path(__file__).parent / "data"
MODEL = DATA / "model_v1.npz"  # 8 kHz, 12 bands, context 1, 10 relu units
sys.path.insert(0, str(DATA))
import make_model_v1  # noqa: E402  (librosa chirps and tones at 8 kHz)


@pytest.fixture(scope="module")
def clips(tmp_path_factory) -> Path:
    """The fixture's four 8 kHz clips and a 44.1 kHz stereo one (librosa chirp and tone)."""
    root = tmp_path_factory.mktemp("clips")
    make_model_v1.write_audio(root)
    left = librosa.chirp(fmin=200, fmax=3000, sr=44100, duration=0.8)
    right = 0.5 * librosa.tone(660, sr=44100, duration=0.8)
    sf.write(root / "stereo.wav", np.stack([left, right], axis=1).astype(np.float32), 44100)
    return root


@pytest.fixture(scope="module")
def extractor():
    return timbrel.load(MODEL)


def test_file_and_waveform_features_equal_the_exported_rows(clips, extractor, tmp_path):
    export(clips, MODEL, tmp_path / "ds", workers=1)
    table = pads.dataset(tmp_path / "ds").to_table().to_pandas()
    for name in ("c0.wav", "stereo.wav"):
        rows = table[table["source"] == name].sort_values("frame")
        exported = np.stack(rows["features"].to_numpy())
        assert len(exported) > 10
        y, sr = sf.read(clips / name, dtype="float32")
        from_wave = extractor.features(y, sr)
        np.testing.assert_allclose(from_wave, exported, rtol=1e-5, atol=1e-5)
        np.testing.assert_allclose(extractor.file_features(clips / name), exported,
                                   rtol=1e-5, atol=1e-5)
        np.testing.assert_allclose(extractor.frame_times(len(exported)), rows["start_s"])


@pytest.mark.parametrize("sr", [8000, 22050])
@pytest.mark.parametrize("block", [1, 7, 160, 4410, 10**6])
def test_stream_equals_the_whole_signal(extractor, sr, block):
    # Source: librosa.chirp, 0.4 s (a one-sample block makes 8 800 pushes at 22 050 Hz).
    y = librosa.chirp(fmin=100, fmax=3500, sr=sr, duration=0.4).astype(np.float32)
    whole = extractor.features(y, sr)
    stream = extractor.stream(sr)
    parts = [stream.push(y[i:i + block]) for i in range(0, len(y), block)]
    parts.append(stream.flush())
    assert all(p.shape[1] == extractor.n_features_ for p in parts)
    streamed = np.concatenate(parts)
    assert streamed.shape == whole.shape and stream.n_frames == len(whole)
    np.testing.assert_allclose(streamed, whole, rtol=1e-5, atol=1e-5)
    assert len(stream.flush()) == 0
    with pytest.raises(ParameterError, match="flushed"):
        stream.push(y[:10])


def test_stream_rows_wait_only_for_their_context(extractor):
    # A frame is complete once its window and `context` frames after it have arrived.
    fe = extractor.frontend_
    stream = extractor.stream(fe.sample_rate)
    needed = fe.fft_length + (2 + fe.context) * fe.hop_length  # samples for frames 0..2
    got = stream.push(np.zeros(needed, np.float32) + 0.01)
    assert len(got) == 3
    assert extractor.latency_seconds_ == pytest.approx(
        (fe.fft_length + fe.context * fe.hop_length) / fe.sample_rate)


def test_a_scikit_learn_pipeline_trains_on_paths(clips):
    paths = sorted(str(p) for p in clips.glob("c*.wav")) * 2
    labels = [0, 1, 0, 1] * 2
    model = make_pipeline(timbrel.load(MODEL, pools=["mean", "max"]), LogisticRegression())
    model.fit(paths, labels)
    assert model.predict(paths).shape == (8,)
    assert model[0].transform(paths[:3]).shape == (3, 20)
    copy = clone(model[0])
    assert copy.get_params() == model[0].get_params()
    with pytest.raises(NotFittedError):
        copy.transform(paths[:1])


def test_waveform_input_at_its_own_rate(clips, extractor):
    y, sr = sf.read(clips / "stereo.wav", dtype="float32")
    own = timbrel.Extractor(MODEL, sr=sr).fit()
    np.testing.assert_allclose(own.transform([y]), extractor.transform([clips / "stereo.wav"]),
                               rtol=1e-5)
    with pytest.raises(ParameterError, match="shorter than one analysis window"):
        own.transform([y[:10]])


def test_command_streams_arrow_while_the_audio_still_arrives(extractor):
    # raw signed 16-bit PCM, as `sox ... -t raw -` gives it, of a librosa chirp at 16 kHz
    y = librosa.chirp(fmin=150, fmax=3000, sr=16000, duration=1.5).astype(np.float32)
    pcm = np.round(y * 32767).astype("<i2").tobytes()
    proc = subprocess.Popen([sys.executable, "-m", "timbrel", "stream", "-", "--model",
                             str(MODEL), "--rate", "16000"], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        proc.stdin.write(pcm[: len(pcm) // 2])
        proc.stdin.flush()
        reader = pa.ipc.open_stream(proc.stdout)
        first = reader.read_next_batch()
        assert proc.poll() is None  # read while the command still waits for audio
        proc.stdin.write(pcm[len(pcm) // 2:])
        proc.stdin.close()
        table = pa.Table.from_batches([first, *reader])
        assert proc.wait(timeout=60) == 0
    finally:
        proc.kill()
        proc.wait()
    expected = extractor.features(np.frombuffer(pcm, "<i2") / np.float32(32768), 16000)
    got = np.stack(table.column("features").to_numpy(zero_copy_only=False))
    np.testing.assert_allclose(got, expected, rtol=1e-5, atol=1e-5)
    assert table.column("frame").to_pylist() == list(range(len(expected)))
    assert table.schema.field("features").type.list_size == extractor.n_features_


def test_command_refuses_a_file_argument():
    result = CliRunner().invoke(app, ["stream", "x.wav", "--model", str(MODEL), "--rate",
                                      "8000"])
    assert result.exit_code == 2 and "standard input" in result.output
