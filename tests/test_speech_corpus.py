"""Checks of the espeak-ng spoken-word set (tests/speech_corpus.py).

The set is the tests' outside reference of real speech, so these tests check
that it is well formed and that it behaves like speech according to librosa,
a general-purpose audio library from PyPI, not code of this project.
"""

from __future__ import annotations

import csv
import itertools
import subprocess
from pathlib import Path

import librosa
import numpy as np
import pytest
import soundfile as sf

import speech_corpus
from speech_corpus import (
    DEFAULT_PITCHES,
    DEFAULT_RATES,
    DEFAULT_TEST_VOICES,
    DEFAULT_VOICES,
    DEFAULT_WORDS,
    MANIFEST_COLUMNS,
    make_spoken_word_set,
)
from timbrel._errors import ParameterError, TimbrelError

speech = pytest.mark.speech

# A small set for tests that build their own copy; four clips take well under a second.
TINY = {
    "words": ("zero", "one"),
    "voices": ("en", "en+f2"),
    "test_voices": ("en+f2",),
    "rates": (160,),
    "pitches": (50,),
}


def read_manifest(manifest: Path) -> list[dict[str, str]]:
    with open(manifest, newline="", encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


def load(manifest: Path, row: dict[str, str]) -> tuple[np.ndarray, int]:
    samples, rate = sf.read(manifest.parent / row["path"], dtype="float32")
    return samples, rate


# ----------------------------------------------------------------- the default set


@speech
def test_manifest_holds_every_word_voice_rate_pitch_once(spoken_words: Path) -> None:
    rows = read_manifest(spoken_words)
    assert tuple(rows[0].keys()) == MANIFEST_COLUMNS
    combinations = [(r["label"], r["voice"], int(r["rate"]), int(r["pitch"])) for r in rows]
    expected = set(itertools.product(DEFAULT_WORDS, DEFAULT_VOICES, DEFAULT_RATES, DEFAULT_PITCHES))
    assert len(combinations) == len(set(combinations)) == len(expected)
    assert set(combinations) == expected
    assert len({r["path"] for r in rows}) == len(rows)


@speech
def test_every_clip_decodes_as_mono_16k_speech_length_and_not_silent(spoken_words: Path) -> None:
    problems = []
    for row in read_manifest(spoken_words):
        # soundfile (libsndfile) is the reference decoder here.
        info = sf.info(spoken_words.parent / row["path"])
        samples, rate = load(spoken_words, row)
        duration = samples.shape[0] / rate
        peak = float(np.max(np.abs(samples)))
        rms = float(np.sqrt(np.mean(samples.astype(np.float64) ** 2)))
        if info.samplerate != 16000 or info.channels != 1 or samples.ndim != 1:
            problems.append(f"{row['path']}: {info.samplerate} Hz, {info.channels} channels")
        # One spoken word lasts a few tenths of a second to about a second
        # (common practice; bounds from memory, generous on both sides).
        if not 0.2 <= duration <= 2.0:
            problems.append(f"{row['path']}: {duration:.2f} s long")
        # Silence or a near-silent file would have peak and RMS near 0
        # (-40 dBFS RMS is far below any spoken word at espeak-ng's levels).
        if peak < 0.05 or rms < 0.01:
            problems.append(f"{row['path']}: peak {peak:.4f}, rms {rms:.4f}")
        if peak >= 1.0:
            problems.append(f"{row['path']}: clipped (peak {peak:.4f})")
    assert not problems, "\n".join(problems)


@speech
def test_train_and_test_voices_are_disjoint_and_both_hold_every_word(spoken_words: Path) -> None:
    rows = read_manifest(spoken_words)
    voices_by_split = {
        split: {r["voice"] for r in rows if r["split"] == split} for split in ("train", "test")
    }
    assert {r["split"] for r in rows} == {"train", "test"}
    assert voices_by_split["train"].isdisjoint(voices_by_split["test"])
    assert voices_by_split["test"] == set(DEFAULT_TEST_VOICES)
    assert voices_by_split["train"] | voices_by_split["test"] == set(DEFAULT_VOICES)
    for split in ("train", "test"):
        assert {r["label"] for r in rows if r["split"] == split} == set(DEFAULT_WORDS)


@speech
def test_each_voice_sounds_different(spoken_words: Path) -> None:
    # espeak-ng falls back silently to its default sound for an unknown variant;
    # two voices giving the same samples would be one speaker under two names.
    rows = read_manifest(spoken_words)
    rate, pitch = str(DEFAULT_RATES[0]), str(DEFAULT_PITCHES[0])
    for word in ("seven", "yes"):
        clips = {
            r["voice"]: load(spoken_words, r)[0]
            for r in rows
            if r["label"] == word and r["rate"] == rate and r["pitch"] == pitch
        }
        for first, second in itertools.combinations(sorted(clips), 2):
            a, b = clips[first], clips[second]
            if a.shape == b.shape:
                relative = np.linalg.norm(a - b) / np.linalg.norm(a)
                assert relative > 0.05, f"{first} and {second} give nearly equal '{word}'"


def mfcc_frames(samples: np.ndarray, rate: int) -> np.ndarray:
    # librosa's trim and MFCC; c0 (overall level) is dropped, as is common practice.
    trimmed, _ = librosa.effects.trim(samples, top_db=40)
    return librosa.feature.mfcc(y=trimmed, sr=rate, n_mfcc=13)[1:]


def dtw_distance(first: np.ndarray, second: np.ndarray) -> float:
    # librosa's dynamic time warping, cost averaged along the path so long words
    # do not score as more distant merely for being long.
    cost, path = librosa.sequence.dtw(X=first, Y=second, metric="euclidean")
    return float(cost[-1, -1] / len(path))


@speech
def test_same_word_at_another_rate_is_nearer_than_other_words(spoken_words: Path) -> None:
    # Outside reference: librosa's MFCC + DTW template matching. Matching an
    # isolated word against templates of the same speaker is a classic
    # small-vocabulary recogniser that is close to error-free (common practice;
    # the 95 % bar is from memory). If the set held noise, silence or mixed-up
    # labels, the nearest template would often be another word.
    rows = read_manifest(spoken_words)
    slow, fast = str(min(DEFAULT_RATES)), str(max(DEFAULT_RATES))
    pitch = str(DEFAULT_PITCHES[0])
    features = {}
    for row in rows:
        if row["pitch"] == pitch and row["rate"] in (slow, fast):
            samples, rate = load(spoken_words, row)
            features[row["voice"], row["rate"], row["label"]] = mfcc_frames(samples, rate)
    hits, same_word, other_words = 0, [], []
    for voice in DEFAULT_VOICES:
        for word in DEFAULT_WORDS:
            distances = {
                other: dtw_distance(features[voice, slow, word], features[voice, fast, other])
                for other in DEFAULT_WORDS
            }
            hits += min(distances, key=distances.__getitem__) == word
            same_word.append(distances[word])
            other_words.extend(d for other, d in distances.items() if other != word)
    accuracy = hits / (len(DEFAULT_VOICES) * len(DEFAULT_WORDS))
    assert accuracy >= 0.95, f"nearest-template accuracy {accuracy:.3f}"
    assert np.mean(same_word) < np.mean(other_words)


@speech
def test_voiced_pitch_lies_in_speech_range_and_follows_the_pitch_setting(
    spoken_words: Path,
) -> None:
    # Outside reference: librosa's YIN estimator (de Cheveigne & Kawahara 2002).
    # Adult speaking voices have a fundamental of roughly 70-300 Hz (common
    # practice; range from memory), and espeak-ng's -p raises the base pitch.
    # The creaky variant is left out: creaky voice has irregular glottal periods
    # by design (common practice), and librosa's pYIN marks all of it unvoiced.
    creaky = {voice for voice in DEFAULT_VOICES if voice.endswith("+croak")}
    rows = [row for row in read_manifest(spoken_words) if row["voice"] not in creaky]
    low_pitch, high_pitch = str(min(DEFAULT_PITCHES)), str(max(DEFAULT_PITCHES))
    rate = str(DEFAULT_RATES[0])
    median_f0 = {}
    for row in rows:
        if row["label"] in ("nine", "no") and row["rate"] == rate:
            samples, sr = load(spoken_words, row)
            frames = {"frame_length": 1024, "hop_length": 256}
            f0 = librosa.yin(samples, fmin=50, fmax=600, sr=sr, **frames)
            rms = librosa.feature.rms(y=samples, **frames)[0]
            # Pitch is only meaningful in the loud, voiced middle of the word. YIN
            # has no voicing decision: on aperiodic (e.g. creaky) frames it lands on
            # or beyond its search bounds, so those frames carry no estimate.
            usable = (rms > 0.5 * rms.max()) & (f0 > 50 * 1.05) & (f0 < 600 / 1.05)
            assert usable.sum() >= 3, f"{row['path']}: no periodic loud frames"
            median_f0[row["voice"], row["label"], row["pitch"]] = float(np.median(f0[usable]))
    for (voice, word, pitch), f0 in median_f0.items():
        assert 60.0 <= f0 <= 400.0, f"{voice} '{word}' pitch {pitch}: median f0 {f0:.1f} Hz"
        if pitch == low_pitch:
            assert median_f0[voice, word, high_pitch] > f0, f"{voice} '{word}' ignores -p"


# ------------------------------------------------------------- building and caching


@speech
@pytest.mark.parametrize("sample_rate", [8000, 16000, 22050, 44100])
def test_resampled_clips_match_librosa_resampling_of_raw_output(
    tmp_path: Path, espeak_ready: None, sample_rate: int
) -> None:
    manifest = make_spoken_word_set(tmp_path / "set", sample_rate=sample_rate, **TINY)
    for row in read_manifest(manifest):
        raw_file = tmp_path / "raw.wav"
        subprocess.run(
            [
                "espeak-ng", "-v", row["voice"], "-s", row["rate"], "-p", row["pitch"],
                "-w", str(raw_file), row["label"],
            ],
            check=True,
        )  # fmt: skip
        raw, raw_rate = sf.read(raw_file, dtype="float32")
        # Outside reference: librosa.resample with the soxr high-quality filter.
        expected = librosa.resample(
            raw, orig_sr=raw_rate, target_sr=sample_rate, res_type="soxr_hq"
        )
        clip, clip_rate = load(manifest, row)
        assert clip_rate == sample_rate
        assert abs(clip.shape[0] - expected.shape[0]) <= 1
        n = min(clip.shape[0], expected.shape[0])
        correlation = np.corrcoef(clip[:n], expected[:n])[0, 1]
        # Two good low-pass resamplers differ only near the new Nyquist frequency,
        # where speech holds little energy; 16-bit storage adds ~1e-5 noise.
        assert correlation > 0.995, f"{row['path']}: correlation {correlation:.5f}"


@speech
def test_second_call_reuses_the_set_without_synthesising(
    tmp_path: Path, espeak_ready: None, monkeypatch: pytest.MonkeyPatch
) -> None:
    manifest = make_spoken_word_set(tmp_path / "set", **TINY)
    times = {p: p.stat().st_mtime_ns for p in (tmp_path / "set").rglob("*") if p.is_file()}

    def refuse(*args: object, **kwargs: object) -> None:
        raise AssertionError("the cached set was synthesised again")

    monkeypatch.setattr(speech_corpus, "_synthesise_clip", refuse)
    assert make_spoken_word_set(tmp_path / "set", **TINY) == manifest
    assert {p: p.stat().st_mtime_ns for p in times} == times


@speech
def test_changed_parameters_rebuild_the_set(tmp_path: Path, espeak_ready: None) -> None:
    make_spoken_word_set(tmp_path / "set", **TINY)
    wider = {**TINY, "rates": (130, 190)}
    rows = read_manifest(make_spoken_word_set(tmp_path / "set", **wider))
    assert sorted({int(r["rate"]) for r in rows}) == [130, 190]
    assert len(rows) == 2 * 2 * 2
    on_disk = {
        p.relative_to(tmp_path / "set").as_posix() for p in (tmp_path / "set").rglob("*.wav")
    }
    assert on_disk == {r["path"] for r in rows}


@speech
def test_a_set_with_a_missing_clip_is_rebuilt(tmp_path: Path, espeak_ready: None) -> None:
    manifest = make_spoken_word_set(tmp_path / "set", **TINY)
    victim = manifest.parent / read_manifest(manifest)[0]["path"]
    victim.unlink()
    make_spoken_word_set(tmp_path / "set", **TINY)
    assert sf.info(victim).frames > 0


@speech
@pytest.mark.parametrize(
    ("change", "named"),
    [
        pytest.param(
            {"voices": ("en", "en+nosuchvariant"), "test_voices": ("en",)},
            "nosuchvariant",
            id="unknown-variant",
        ),
        pytest.param(
            {"voices": ("en", "xx-nosuchbase"), "test_voices": ("en",)},
            "xx-nosuchbase",
            id="unknown-base",
        ),
        pytest.param({"test_voices": ("en-us",)}, "en-us", id="test-voice-not-in-voices"),
        pytest.param({"test_voices": ("en", "en+f2")}, "test_voices", id="no-train-voice"),
        pytest.param({"words": ("zero", "Zero")}, "Zero", id="upper-case-word"),
        pytest.param({"words": ("zero", "-v")}, "-v", id="option-like-word"),
        pytest.param({"words": "zero"}, "zero", id="one-str-not-sequence"),
        pytest.param({"words": ("zero", "zero")}, "distinct", id="repeated-word"),
        pytest.param({"rates": (20,)}, "20", id="rate-too-low"),
        pytest.param({"pitches": (120,)}, "120", id="pitch-too-high"),
        pytest.param({"sample_rate": 1000}, "1000", id="sample-rate-too-low"),
        pytest.param({"workers": 0}, "workers", id="zero-workers"),
    ],
)
def test_bad_arguments_are_rejected_by_name(
    tmp_path: Path, espeak_ready: None, change: dict, named: str
) -> None:
    with pytest.raises(ParameterError, match=named):
        make_spoken_word_set(tmp_path / "set", **{**TINY, **change})
    assert not (tmp_path / "set").exists()


@speech
def test_a_folder_of_other_files_is_left_alone(tmp_path: Path, espeak_ready: None) -> None:
    (tmp_path / "set").mkdir()
    notes = tmp_path / "set" / "notes.txt"
    notes.write_text("keep me\n", encoding="utf-8")
    with pytest.raises(ParameterError, match="not written by"):
        make_spoken_word_set(tmp_path / "set", **TINY)
    assert notes.read_text(encoding="utf-8") == "keep me\n"


# -------------------------------------------------------------- without espeak-ng


def test_missing_program_is_reported_and_refused(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("PATH", str(tmp_path))  # an empty folder: no espeak-ng on PATH
    assert speech_corpus.espeak_unavailable_reason() == "espeak-ng is not on PATH"
    assert speech_corpus.espeak_available() is False
    with pytest.raises(TimbrelError, match="not on PATH"):
        make_spoken_word_set(tmp_path / "set", **TINY)


@pytest.mark.parametrize(("required", "outcome"), [("1", "fail"), ("", "skip"), ("0", "skip")])
def test_fixture_skips_or_fails_without_espeak(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, required: str, outcome: str
) -> None:
    from speech_corpus import skip_or_fail_without_espeak

    monkeypatch.setenv("PATH", str(tmp_path))
    monkeypatch.setenv("TIMBREL_REQUIRE_SPEECH", required)
    expected = pytest.fail.Exception if outcome == "fail" else pytest.skip.Exception
    with pytest.raises(expected, match="apt-get install espeak-ng"):
        skip_or_fail_without_espeak()
