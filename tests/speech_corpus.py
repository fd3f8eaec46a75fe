"""Spoken-word reference set synthesised with espeak-ng, for tests.

The tests need real speech from outside the project: a probe classifier must
tell spoken words apart on voices it never saw during training. Debian's
``espeak-ng`` speech synthesiser produces such audio on any machine without a
download. This module runs it once per (word, voice, rate, pitch), resamples
each clip to the requested rate with :func:`scipy.signal.resample_poly`, and
writes a ``manifest.csv`` whose ``split`` column puts some *voices* in
``train`` and the other voices in ``test``, so the test split holds unseen
speakers.

A small JSON stamp beside the manifest records the parameters and the
espeak-ng version; a second call with the same parameters returns the cached
set without running the synthesiser again.

The set is built in a sibling folder and renamed into place when complete, so
an interrupted run never leaves a half-built set that looks finished.
"""

from __future__ import annotations

import csv
import json
import math
import os
import re
import shutil
import subprocess
import tempfile
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from functools import lru_cache
from pathlib import Path

import numpy as np
import soundfile as sf
from scipy.signal import resample_poly

from timbrel._errors import ParameterError, TimbrelError

__all__ = [
    "DEFAULT_PITCHES",
    "DEFAULT_RATES",
    "DEFAULT_TEST_VOICES",
    "DEFAULT_TRAIN_VOICES",
    "DEFAULT_VOICES",
    "DEFAULT_WORDS",
    "ESPEAK_PROGRAM",
    "MANIFEST_COLUMNS",
    "VALIDATION_VOICES",
    "espeak_available",
    "espeak_unavailable_reason",
    "espeak_version",
    "installed_voice_names",
    "make_spoken_word_set",
    "skip_or_fail_without_espeak",
    "speak",
]

ESPEAK_PROGRAM = "espeak-ng"

DEFAULT_WORDS: tuple[str, ...] = (
    "zero", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine", "yes", "no",
)  # fmt: skip

# Voices checked on Debian 12's espeak-ng 1.51: each one exists and gives a
# different waveform for the same word. Accents and voice variants are mixed so
# that both splits hold male-, female- and rough-sounding voices. en-gb-x-rp is
# left out because it sounds almost the same as ``en``; a near copy of a train
# voice would make the "unseen speaker" split too easy.
DEFAULT_TRAIN_VOICES: tuple[str, ...] = (
    "en", "en-us", "en-gb-scotland", "en+f2", "en+m3", "en+croak",
)  # fmt: skip
DEFAULT_TEST_VOICES: tuple[str, ...] = ("en-029", "en-gb-x-gbclan", "en+f4", "en-us+m7")
DEFAULT_VOICES: tuple[str, ...] = DEFAULT_TRAIN_VOICES + DEFAULT_TEST_VOICES
# Voices for choosing defaults, so the test voices are scored only to confirm a choice:
# none shares a base or a variant with a test voice, and with ten voices (480 clips)
# one clip is 0.2 points of accuracy. MFCC reaches about 90 % on them, below the
# ceiling that the test voices put the baselines near.
VALIDATION_VOICES: tuple[str, ...] = (
    "en-gb-x-gbcwmd", "en-us-nyc", "en+f3", "en+m5", "en-gb-x-rp+f5", "en-us+m2",
    "en+klatt3", "en-gb-x-rp+m6", "en-us-nyc+f1", "en-gb-x-gbcwmd+m8",
)  # fmt: skip

# espeak-ng speaks at 175 words per minute and pitch 50 (of 0..99) by default;
# the set brackets both.
DEFAULT_RATES: tuple[int, ...] = (140, 200)
DEFAULT_PITCHES: tuple[int, ...] = (35, 65)

MANIFEST_COLUMNS: tuple[str, ...] = ("path", "label", "voice", "split", "rate", "pitch")

_MANIFEST_NAME = "manifest.csv"
_STAMP_NAME = "stamp.json"
_STAMP_FORMAT = 1
_WORD_PATTERN = re.compile(r"^[a-z]+(?:[ '][a-z]+)*$")
_VOICE_PATTERN = re.compile(r"^[A-Za-z0-9_-]+(?:\+[A-Za-z0-9_ -]+)?$")
# espeak-ng's documented ranges for -s (words per minute) and -p (pitch).
_RATE_RANGE = (80, 450)
_PITCH_RANGE = (0, 99)
_SUBPROCESS_TIMEOUT_S = 60


def espeak_unavailable_reason() -> str | None:
    """Say why espeak-ng cannot be used here, or return ``None`` when it can.

    Returns
    -------
    reason : str or None
        A short phrase such as ``"espeak-ng is not on PATH"``; ``None`` when the
        program runs and reports its version.
    """
    if shutil.which(ESPEAK_PROGRAM) is None:
        return f"{ESPEAK_PROGRAM} is not on PATH"
    try:
        completed = subprocess.run(
            [ESPEAK_PROGRAM, "--version"],
            capture_output=True,
            text=True,
            timeout=_SUBPROCESS_TIMEOUT_S,
            check=False,
        )
    except (OSError, subprocess.TimeoutExpired) as error:
        return f"{ESPEAK_PROGRAM} could not be started ({error})"
    if completed.returncode != 0:
        return f"{ESPEAK_PROGRAM} --version exited with status {completed.returncode}"
    return None


REQUIRE_SPEECH_VARIABLE = "TIMBREL_REQUIRE_SPEECH"


def skip_or_fail_without_espeak() -> None:
    """Skip the calling test when espeak-ng cannot run, or fail it when
    ``TIMBREL_REQUIRE_SPEECH=1`` (as on CI machines, which install it)."""
    import pytest

    reason = espeak_unavailable_reason()
    if reason is None:
        return
    message = (
        f"spoken-word tests need espeak-ng ({reason}); install it with "
        "`apt-get install espeak-ng`, or run `make test`, which installs it"
    )
    if os.environ.get(REQUIRE_SPEECH_VARIABLE) == "1":
        pytest.fail(
            f"{message}. {REQUIRE_SPEECH_VARIABLE}=1 is set, so this fails.", pytrace=False
        )
    pytest.skip(message)


def espeak_available() -> bool:
    """Return whether espeak-ng can be run on this machine.

    Returns
    -------
    available : bool
        ``True`` when :func:`espeak_unavailable_reason` finds no problem.
    """
    return espeak_unavailable_reason() is None


def espeak_version() -> str:
    """Return the first line of ``espeak-ng --version``.

    Returns
    -------
    version : str
        For example ``"eSpeak NG text-to-speech: 1.51  Data at: ..."``.

    Raises
    ------
    TimbrelError
        When espeak-ng is not usable here.
    """
    _require_espeak()
    completed = _run_espeak(["--version"])
    return completed.stdout.splitlines()[0].strip()


@lru_cache(maxsize=1)
def installed_voice_names() -> tuple[frozenset[str], frozenset[str]]:
    """List the base voices and the voice variants espeak-ng has installed.

    A voice argument is ``BASE`` or ``BASE+VARIANT``. espeak-ng rejects an unknown
    base but silently falls back to its default sound for an unknown variant,
    so variants have to be checked against this list before synthesis.

    Returns
    -------
    bases : frozenset of str
        Names accepted before the ``+``: language codes (``"en"``, ``"en-us"``,
        ...) and voice file names. MBROLA voices are left out because they need
        extra data files that are packaged separately.
    variants : frozenset of str
        Names accepted after the ``+`` (``"f2"``, ``"m3"``, ``"croak"``, ...).

    Raises
    ------
    TimbrelError
        When espeak-ng is not usable here.
    """
    _require_espeak()
    bases: set[str] = set()
    for fields, other_languages in _voice_table(_run_espeak(["--voices"]).stdout):
        language, file_name = fields[1], fields[4]
        if file_name.startswith("mb/"):
            continue
        bases.add(language)
        bases.add(file_name.rsplit("/", 1)[-1].lower())
        bases.update(re.findall(r"\(([^ ()]+) \d+\)", other_languages))
    variants = {
        fields[4].rsplit("/", 1)[-1]
        for fields, _ in _voice_table(_run_espeak(["--voices=variant"]).stdout)
    }
    return frozenset(bases), frozenset(variants)


def make_spoken_word_set(
    out_dir: str | os.PathLike[str],
    *,
    words: Sequence[str] = DEFAULT_WORDS,
    voices: Sequence[str] = DEFAULT_VOICES,
    test_voices: Sequence[str] = DEFAULT_TEST_VOICES,
    rates: Sequence[int] = DEFAULT_RATES,
    pitches: Sequence[int] = DEFAULT_PITCHES,
    sample_rate: int = 16000,
    workers: int | None = None,
) -> Path:
    """Synthesise a labelled set of spoken words with espeak-ng, or reuse a cached one.

    One mono 16-bit WAV clip is made for every combination of word, voice,
    rate and pitch; its label is the word. Clips of ``test_voices`` form the
    ``test`` split and clips of every other voice the ``train`` split.

    Parameters
    ----------
    out_dir : str or os.PathLike
        Folder that receives ``manifest.csv``, ``stamp.json`` and ``clips/``.
        It must be absent, empty, or a set made earlier by this function (which
        is then reused when the parameters match and rebuilt otherwise).
    words : sequence of str, default DEFAULT_WORDS
        Two or more distinct lower-case words (letters, inner spaces or
        apostrophes). Default: the English digits ``"zero"`` .. ``"nine"``,
        ``"yes"`` and ``"no"``.
    voices : sequence of str, default DEFAULT_VOICES
        Two or more distinct espeak-ng voices, ``BASE`` or ``BASE+VARIANT``
        (e.g. ``"en-us"``, ``"en+f2"``), each installed (see
        :func:`installed_voice_names`).
    test_voices : sequence of str, default DEFAULT_TEST_VOICES
        The voices held out for the ``test`` split: a non-empty proper subset of
        ``voices``.
    rates : sequence of int, default DEFAULT_RATES
        One or more distinct speaking rates in words per minute, each in
        80 .. 450 (espeak-ng's ``-s``).
    pitches : sequence of int, default DEFAULT_PITCHES
        One or more distinct base pitches, each in 0 .. 99 (espeak-ng's ``-p``).
    sample_rate : int, default 16000
        Sample rate of the written clips in Hz, 4000 .. 48000.
    workers : int or None, default None
        Synthesiser processes run at once, >= 1; ``None`` uses the CPU count
        (at most 4).

    Returns
    -------
    manifest : pathlib.Path
        ``out_dir / "manifest.csv"`` with columns ``path`` (relative to
        ``out_dir``), ``label``, ``voice``, ``split``, ``rate`` and ``pitch``; one
        row per clip, ``len(words) * len(voices) * len(rates) * len(pitches)``
        rows in all.

    Raises
    ------
    ParameterError
        When an argument is outside its range (the message names it), a voice is
        not installed, or ``out_dir`` holds files this function did not write.
    TimbrelError
        When espeak-ng is missing or fails on a clip.
    """
    out_path = Path(out_dir)
    words = _check_words(words)
    voices = _check_distinct_names("voices", voices, minimum=2)
    test_voices = _check_distinct_names("test_voices", test_voices, minimum=1)
    unknown_test = [voice for voice in test_voices if voice not in voices]
    if unknown_test:
        raise ParameterError(f"test_voices {unknown_test!r} are not among voices {list(voices)!r}")
    if len(test_voices) == len(voices):
        raise ParameterError("test_voices must leave at least one voice for the train split")
    rates = _check_int_levels("rates", rates, _RATE_RANGE)
    pitches = _check_int_levels("pitches", pitches, _PITCH_RANGE)
    if isinstance(sample_rate, bool) or not isinstance(sample_rate, int):
        raise ParameterError(f"sample_rate must be an int, got {sample_rate!r}")
    if not 4000 <= sample_rate <= 48000:
        raise ParameterError(f"sample_rate must be in 4000 .. 48000 Hz, got {sample_rate}")
    if workers is None:
        workers = min(4, os.cpu_count() or 1)
    elif isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise ParameterError(f"workers must be an int >= 1 or None, got {workers!r}")

    _require_espeak()
    _check_voices_installed(voices)
    stamp = {
        "format": _STAMP_FORMAT,
        "espeak": espeak_version(),
        "words": list(words),
        "voices": list(voices),
        "test_voices": list(test_voices),
        "rates": list(rates),
        "pitches": list(pitches),
        "sample_rate": sample_rate,
    }
    if _is_complete(out_path, stamp):
        return out_path / _MANIFEST_NAME
    if out_path.exists() and not _is_ours_or_empty(out_path):
        raise ParameterError(
            f"out_dir {str(out_path)!r} holds files not written by make_spoken_word_set; "
            "pass an empty or new folder"
        )

    out_path.parent.mkdir(parents=True, exist_ok=True)
    build_dir = Path(tempfile.mkdtemp(prefix=f".{out_path.name}.building-", dir=out_path.parent))
    try:
        _build(build_dir, stamp, workers=workers)
        _move_into_place(build_dir, out_path, stamp)
    finally:
        if build_dir.exists():
            shutil.rmtree(build_dir)
    return out_path / _MANIFEST_NAME


# --------------------------------------------------------------------------- helpers


def _require_espeak() -> None:
    reason = espeak_unavailable_reason()
    if reason is not None:
        raise TimbrelError(f"cannot synthesise speech: {reason}")


def _run_espeak(arguments: list[str]) -> subprocess.CompletedProcess[str]:
    completed = subprocess.run(
        [ESPEAK_PROGRAM, *arguments],
        capture_output=True,
        text=True,
        timeout=_SUBPROCESS_TIMEOUT_S,
        check=False,
    )
    # espeak-ng reports some failures (e.g. a missing MBROLA voice) on stderr with status 0.
    if completed.returncode != 0 or "error" in completed.stderr.lower():
        command = " ".join([ESPEAK_PROGRAM, *arguments])
        raise TimbrelError(
            f"`{command}` failed with status {completed.returncode}: {completed.stderr.strip()}"
        )
    return completed


def _voice_table(listing: str) -> list[tuple[list[str], str]]:
    """Split ``espeak-ng --voices`` output into (first five columns, other languages)."""
    rows = []
    for line in listing.splitlines()[1:]:
        fields = line.split(maxsplit=5)
        if len(fields) >= 5:
            rows.append((fields[:5], fields[5] if len(fields) > 5 else ""))
    return rows


def _check_words(words: Sequence[str]) -> tuple[str, ...]:
    words = _check_distinct_names("words", words, minimum=2)
    for word in words:
        if not _WORD_PATTERN.fullmatch(word):
            raise ParameterError(
                f"words must be lower-case letters with inner spaces or apostrophes, got {word!r}"
            )
    return words


def _check_distinct_names(name: str, values: Sequence[str], *, minimum: int) -> tuple[str, ...]:
    if isinstance(values, str):
        raise ParameterError(f"{name} must be a sequence of str, not one str: {values!r}")
    values = tuple(values)
    if not all(isinstance(value, str) and value for value in values):
        raise ParameterError(f"{name} must hold non-empty str, got {list(values)!r}")
    if len(set(values)) != len(values):
        raise ParameterError(f"{name} must be distinct, got {list(values)!r}")
    if len(values) < minimum:
        raise ParameterError(f"{name} needs at least {minimum} entries, got {list(values)!r}")
    return values


def _check_int_levels(
    name: str, values: Sequence[int], allowed: tuple[int, int]
) -> tuple[int, ...]:
    values = tuple(values)
    low, high = allowed
    if not values:
        raise ParameterError(f"{name} needs at least one entry")
    for value in values:
        if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
            raise ParameterError(f"{name} entries must be int in {low} .. {high}, got {value!r}")
    if len(set(values)) != len(values):
        raise ParameterError(f"{name} must be distinct, got {list(values)!r}")
    return values


def _check_voices_installed(voices: Sequence[str]) -> None:
    bases, variants = installed_voice_names()
    for voice in voices:
        if not _VOICE_PATTERN.fullmatch(voice):
            raise ParameterError(f"voice {voice!r} is not of the form BASE or BASE+VARIANT")
        base, _, variant = voice.partition("+")
        if base not in bases:
            raise ParameterError(f"voice {voice!r}: base voice {base!r} is not installed")
        if variant and variant not in variants:
            raise ParameterError(f"voice {voice!r}: variant {variant!r} is not installed")


def _voice_slug(voice: str) -> str:
    return voice.replace("+", "_")


def _clip_jobs(stamp: dict) -> list[dict]:
    test_voices = set(stamp["test_voices"])
    jobs = []
    for voice in stamp["voices"]:
        for word in stamp["words"]:
            for rate in stamp["rates"]:
                for pitch in stamp["pitches"]:
                    file_word = word.replace(" ", "-").replace("'", "")
                    jobs.append(
                        {
                            "path": f"clips/{_voice_slug(voice)}/{file_word}_s{rate}_p{pitch}.wav",
                            "label": word,
                            "voice": voice,
                            "split": "test" if voice in test_voices else "train",
                            "rate": rate,
                            "pitch": pitch,
                        }
                    )
    return jobs


def speak(
    text: str, voice: str, *, rate: int, pitch: int, sample_rate: int, scratch: Path
) -> np.ndarray:
    """Synthesise ``text`` with one espeak-ng voice and return it resampled.

    Parameters
    ----------
    text : str
        What to say (a word, for the sets of this module).
    voice : str
        An installed espeak-ng voice, ``BASE`` or ``BASE+VARIANT`` (not checked here).
    rate : int
        Speaking rate in words per minute, 80 .. 450 (espeak-ng's ``-s``; not checked).
    pitch : int
        Base pitch, 0 .. 99 (espeak-ng's ``-p``; not checked).
    sample_rate : int
        Sample rate of the returned samples in Hz.
    scratch : pathlib.Path
        A WAV file name the synthesiser may write and this function removes.

    Returns
    -------
    samples : np.ndarray, shape (n_samples,), float32
        Mono samples in -1 .. 1, resampled with :func:`scipy.signal.resample_poly`.

    Raises
    ------
    TimbrelError
        When espeak-ng fails or writes no samples.
    """
    _run_espeak(
        ["-v", voice, "-s", str(rate), "-p", str(pitch), "-w", str(scratch), text]
    )  # fmt: skip
    samples, native_rate = sf.read(scratch, dtype="float32", always_2d=True)
    scratch.unlink()
    if samples.shape[0] == 0:
        raise TimbrelError(f"espeak-ng wrote no samples for {text!r} ({voice})")
    mono = samples.mean(axis=1)
    if native_rate != sample_rate:
        common = math.gcd(native_rate, sample_rate)
        mono = resample_poly(mono, sample_rate // common, native_rate // common)
    # The polyphase filter can overshoot full scale slightly on sharp onsets.
    return np.clip(mono, -1.0, 1.0).astype(np.float32)


def _synthesise_clip(job: dict, build_dir: Path, sample_rate: int) -> None:
    target = build_dir / job["path"]
    mono = speak(job["label"], job["voice"], rate=job["rate"], pitch=job["pitch"],
                 sample_rate=sample_rate, scratch=target.with_suffix(".native.wav"))
    sf.write(target, mono, sample_rate, subtype="PCM_16")


def _build(build_dir: Path, stamp: dict, *, workers: int) -> None:
    jobs = _clip_jobs(stamp)
    for voice in stamp["voices"]:
        (build_dir / "clips" / _voice_slug(voice)).mkdir(parents=True)
    # Threads suffice: the work happens in the espeak-ng child processes.
    with ThreadPoolExecutor(max_workers=workers) as pool:
        # list() re-raises the first failure from any worker.
        list(pool.map(lambda job: _synthesise_clip(job, build_dir, stamp["sample_rate"]), jobs))
    with open(build_dir / _MANIFEST_NAME, "w", newline="", encoding="utf-8") as handle:
        writer = csv.DictWriter(handle, fieldnames=MANIFEST_COLUMNS, lineterminator="\n")
        writer.writeheader()
        writer.writerows(jobs)
    # The stamp goes last: its presence marks the set as complete.
    (build_dir / _STAMP_NAME).write_text(json.dumps(stamp, indent=2) + "\n", encoding="utf-8")


def _is_complete(out_path: Path, stamp: dict) -> bool:
    stamp_file = out_path / _STAMP_NAME
    manifest = out_path / _MANIFEST_NAME
    if not (stamp_file.is_file() and manifest.is_file()):
        return False
    try:
        if json.loads(stamp_file.read_text(encoding="utf-8")) != stamp:
            return False
    except (OSError, ValueError):
        return False
    with open(manifest, newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    expected = {job["path"] for job in _clip_jobs(stamp)}
    listed = {row.get("path") for row in rows}
    return (
        len(rows) == len(expected)
        and listed == expected
        and all((out_path / path).is_file() for path in expected)
    )


def _is_ours_or_empty(out_path: Path) -> bool:
    if not out_path.is_dir():
        return False
    entries = {entry.name for entry in out_path.iterdir()}
    return not entries or (
        _STAMP_NAME in entries and entries <= {_STAMP_NAME, _MANIFEST_NAME, "clips"}
    )


def _move_into_place(build_dir: Path, out_path: Path, stamp: dict) -> None:
    for _ in range(2):
        if _is_complete(out_path, stamp):
            # Another process (e.g. a parallel test worker) finished the same set first.
            return
        if out_path.exists():
            shutil.rmtree(out_path)
        try:
            build_dir.rename(out_path)
            return
        except OSError:
            continue
    raise TimbrelError(f"could not move the spoken-word set into {str(out_path)!r}")
