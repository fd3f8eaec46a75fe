"""Tests of timbrel.frontend against published formulas and librosa as a reference."""

from __future__ import annotations

import itertools

import librosa
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from timbrel import BandStats, FrontEnd, ParameterError, mel_filter_bank, stack_context
from timbrel.frontend import ContextStacker, _analysis_window, context_rows, hz_to_mel, mel_to_hz


@pytest.fixture
def rng():
    return np.random.default_rng(20261202)


def test_htk_formula_worked_value():
    # HTK mel formula m = 2595 log10(1 + f/700) (HTK Book; O'Shaughnessy 1987):
    # 1000 Hz is about 1000 mel (999.99, computed by hand from the formula).
    assert hz_to_mel(1000.0, scale="htk") == pytest.approx(999.985, abs=1e-3)
    assert hz_to_mel(700.0, scale="htk") == pytest.approx(2595 * np.log10(2.0))


def test_slaney_formula_worked_values():
    # Slaney's Auditory Toolbox (1998): linear 3f/200 below 1 kHz, so 1000 Hz = 15 mel,
    # then 27 mels per log(6.4) above.
    assert hz_to_mel(1000.0, scale="slaney") == pytest.approx(15.0)
    assert hz_to_mel(200.0, scale="slaney") == pytest.approx(3.0)
    assert hz_to_mel(6400.0, scale="slaney") == pytest.approx(15.0 + 27.0)


@pytest.mark.parametrize("scale", ["slaney", "htk"])
def test_mel_conversions_match_librosa_and_invert(scale):
    # librosa.hz_to_mel / mel_to_hz as a general-purpose reference
    f = np.linspace(0, 22050, 301)
    ours = hz_to_mel(f, scale=scale)
    ref = librosa.hz_to_mel(f, htk=scale == "htk")
    np.testing.assert_allclose(ours, ref, rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(mel_to_hz(ours, scale=scale), f, rtol=1e-9, atol=1e-7)


@pytest.mark.parametrize("sr", [8000, 16000, 22050, 44100])
@pytest.mark.parametrize("n_mels", [20, 40, 64])
@pytest.mark.parametrize(("scale", "norm"), [("slaney", "slaney"), ("htk", "none"),
                                             ("htk", "slaney")])
def test_filter_bank_matches_librosa(sr, n_mels, scale, norm):
    # librosa.filters.mel as a general-purpose reference for matched settings
    n_fft = 1024 if sr > 16000 else 512
    ours = mel_filter_bank(sr=sr, n_fft=n_fft, n_mels=n_mels, fmin=20.0, scale=scale, norm=norm)
    ref = librosa.filters.mel(sr=sr, n_fft=n_fft, n_mels=n_mels, fmin=20.0, htk=scale == "htk",
                              norm="slaney" if norm == "slaney" else None)
    assert ours.shape == (n_mels, 1 + n_fft // 2)
    assert ours.dtype == np.float32
    np.testing.assert_allclose(ours, ref, rtol=1e-5, atol=1e-7 * ref.max())


def test_filter_bank_is_read_only_and_cached():
    a = mel_filter_bank(sr=16000, n_fft=512, n_mels=40)
    b = mel_filter_bank(sr=16000, n_fft=512, n_mels=40)
    assert a is b
    with pytest.raises(ValueError):
        a[0, 0] = 1.0


@pytest.mark.parametrize("kind", ["hann", "hamming", "blackman"])
@pytest.mark.parametrize(("win_length", "n_fft"), [(400, 512), (401, 512), (7, 16)])
def test_analysis_window_equals_scipy_periodic_window(kind, win_length, n_fft):
    # scipy.signal.get_window(fftbins=True) as the reference periodic window, centred
    # in n_fft with zeros either side (as librosa pads a short window)
    import scipy.signal

    ours = _analysis_window(kind, win_length, n_fft)
    left = (n_fft - win_length) // 2
    ref = scipy.signal.get_window(kind, win_length, fftbins=True).astype(np.float32)
    np.testing.assert_allclose(ours[left:left + win_length], ref, rtol=0, atol=1e-7)
    assert not ours[:left].any() and not ours[left + win_length:].any()
    assert not ours.flags.writeable


@pytest.mark.parametrize(("sr", "window", "n_mels", "mel_scale"),
                         [(16000, "hann", 40, "slaney"), (22050, "hamming", 64, "htk"),
                          (8000, "blackman", 24, "slaney")])
def test_frames_match_librosa_melspectrogram(rng, sr, window, n_mels, mel_scale):
    # librosa.feature.melspectrogram(center=False, power=2) then log(. + offset): the front
    # end's documented definition, with librosa as the reference implementation
    fe = FrontEnd(sample_rate=sr, window=window, n_mels=n_mels, mel_scale=mel_scale)
    c = fe.config
    y = (0.1 * rng.standard_normal(sr * 2)).astype(np.float32)
    ours = fe.frames(y, sr)
    mel = librosa.feature.melspectrogram(
        y=y, sr=sr, n_fft=c.fft_length, hop_length=c.hop_length, win_length=c.win_length,
        window=window, center=False, power=2.0, n_mels=n_mels, htk=mel_scale == "htk",
        norm="slaney")
    ref = np.log(mel.T + c.log_offset)
    assert ours.shape == ref.shape == (fe.n_frames(y.size), n_mels)
    assert ours.dtype == np.float32
    np.testing.assert_allclose(ours, ref, atol=2e-4)


@pytest.mark.parametrize("freq", [300.0, 1000.0, 2500.0, 5000.0])
@pytest.mark.parametrize("scale", ["slaney", "htk"])
def test_pure_tone_peaks_in_nearest_band(freq, scale):
    # common practice: a sinusoid's energy is largest in the mel band whose centre is nearest
    fe = FrontEnd(mel_scale=scale, n_mels=40)
    sr = 16000
    t = np.arange(sr) / sr
    y = (0.5 * np.sin(2 * np.pi * freq * t)).astype(np.float32)
    frames = fe.frames(y, sr)
    edges = mel_to_hz(np.linspace(hz_to_mel(0.0, scale=scale), hz_to_mel(8000.0, scale=scale),
                                  42), scale=scale)
    centres = edges[1:-1]
    expected = int(np.argmin(np.abs(hz_to_mel(centres, scale=scale) -
                                    hz_to_mel(freq, scale=scale))))
    peak = np.bincount(frames.argmax(axis=1), minlength=40).argmax()
    assert peak == expected


@pytest.mark.parametrize("click_at", [0.25, 0.5, 0.731])
def test_click_lands_in_the_right_frame(click_at):
    # a click at time s: the frame whose window centre is nearest s holds the most energy;
    # frame i starts at i * hop / sr and its window is centred n_fft / 2 later
    sr = 16000
    fe = FrontEnd()
    c = fe.config
    y = np.zeros(sr, np.float32)
    sample = round(click_at * sr)
    y[sample] = 1.0
    frames = fe.frames(y, sr)
    energy = np.exp(frames).sum(axis=1)
    starts = fe.frame_times(len(frames))
    centre_times = starts + (c.fft_length / 2) / sr
    assert energy.argmax() == np.argmin(np.abs(centre_times - sample / sr))
    assert starts[1] == pytest.approx(c.hop_length / sr)


def test_frame_count_formula():
    fe = FrontEnd()
    c = fe.config
    assert fe.n_frames(c.fft_length - 1) == 0
    assert fe.n_frames(c.fft_length) == 1
    assert fe.n_frames(c.fft_length + c.hop_length) == 2
    assert fe.frames(np.zeros(c.fft_length - 1, np.float32), 16000).shape == (0, c.n_mels)


@settings(max_examples=30, deadline=None)
@given(st.lists(st.integers(1, 3000), min_size=1, max_size=12))
def test_stream_equals_whole_clip(block_sizes):
    # streaming in any block split gives the frames of the whole clip (hypothesis)
    rng = np.random.default_rng(len(block_sizes))
    y = (0.1 * rng.standard_normal(sum(block_sizes))).astype(np.float32)
    fe = FrontEnd()
    whole = fe.frames(y, 16000)
    pieces = np.split(y, np.cumsum(block_sizes)[:-1])
    streamed = [f for f in fe.stream(pieces, 16000)]
    got = np.concatenate(streamed) if streamed else np.zeros((0, fe.n_mels), np.float32)
    np.testing.assert_allclose(got, whole, atol=1e-5)


def test_float64_input_agrees_with_float32_and_is_not_modified(rng):
    fe = FrontEnd()
    y64 = 0.1 * rng.standard_normal(16000)
    keep = y64.copy()
    a = fe.frames(y64, 16000)
    b = fe.frames(y64.astype(np.float32), 16000)
    np.testing.assert_allclose(a, b, atol=1e-4)
    np.testing.assert_array_equal(y64, keep)


@pytest.mark.parametrize(("bad", "match"), [
    (np.zeros((2, 100), np.float32), "mono"),
    (np.array([0.0, np.nan] * 400, np.float32), "NaN"),
    (np.arange(1000), "floating point"),
])
def test_frames_refuses_bad_signals(bad, match):
    with pytest.raises(ParameterError, match=match):
        FrontEnd().frames(bad, 16000)


def test_frames_refuses_wrong_rate():
    with pytest.raises(ParameterError, match="resample first"):
        FrontEnd().frames(np.zeros(1000, np.float32), 44100)


@pytest.mark.parametrize("context", [0, 1, 3])
def test_stack_context_layout(context):
    frames = np.arange(6 * 4, dtype=np.float32).reshape(6, 4)
    stacked = stack_context(frames, context)
    width = 2 * context + 1
    assert stacked.shape == (6, width * 4)
    for t in range(6):
        for p in range(width):
            source = min(max(t + p - context, 0), 5)  # edges repeat the first/last frame
            np.testing.assert_array_equal(stacked[t, p * 4:(p + 1) * 4], frames[source])


@settings(max_examples=40, deadline=None)
@given(st.lists(st.integers(0, 50), min_size=1, max_size=8))
def test_band_stats_equal_numpy_on_concatenated_frames(sizes):
    # Chan/Welford merge over any split equals numpy's mean/std of the concatenation
    rng = np.random.default_rng(sum(sizes))
    parts = [rng.normal(3.0, 2.0, size=(n, 5)) for n in sizes]
    total = np.concatenate(parts)
    merged = BandStats(5)
    for part in parts:
        merged.merge(BandStats.of(part))
    assert merged.count == len(total)
    if len(total):
        np.testing.assert_allclose(merged.mean, total.mean(axis=0), rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(merged.std, total.std(axis=0), rtol=1e-9, atol=1e-12)
    again = BandStats.from_dict(merged.to_dict())
    np.testing.assert_array_equal(again.m2, merged.m2)


def test_from_toml(tmp_path):
    path = tmp_path / "fe.toml"
    path.write_text("[frontend]\nn_mels = 24\nmel_scale = \"htk\"\n")
    fe = FrontEnd.from_toml(path)
    assert fe.n_mels == 24 and fe.config.mel_scale == "htk"
    assert fe.filter_bank.shape == (24, 257)


@settings(max_examples=40, deadline=None)
@given(n=st.integers(0, 40), context=st.integers(0, 4), cuts=st.lists(st.integers(0, 40)))
def test_context_stacker_and_rows_equal_whole_stacking(n, context, cuts):
    # streaming and random-access stacking agree with stack_context on the whole clip
    frames = np.random.default_rng(n).standard_normal((n, 3)).astype(np.float32)
    whole = stack_context(frames, context) if n else np.empty((0, 3 * (2 * context + 1)))
    bounds = sorted({0, n, *[c for c in cuts if c <= n]})
    stacker = ContextStacker(context)
    out = [stacker.push(frames[a:b]) for a, b in itertools.pairwise(bounds)]
    out.append(stacker.finish())
    got = np.concatenate([o for o in out if len(o)]) if n else np.empty_like(whole)
    np.testing.assert_array_equal(got, whole)
    for a, b in itertools.pairwise(bounds):
        np.testing.assert_array_equal(context_rows(frames, a, b, context), whole[a:b])


def test_standardise_uses_band_statistics_and_spares_constant_bands():
    frames = np.column_stack([np.arange(10.0), np.full(10, 4.0)])
    stats = BandStats.of(frames)
    z = stats.standardise(frames)
    assert z.dtype == np.float32
    np.testing.assert_allclose(z[:, 0], (frames[:, 0] - 4.5) / frames[:, 0].std(), rtol=1e-6)
    np.testing.assert_array_equal(z[:, 1], 0.0)
