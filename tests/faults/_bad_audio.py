"""Kinds of bad (and merely unusual) audio files, each with the decision taken for it.

Every kind writes one entry into a folder that already holds good clips. ``valid`` says
whether timbrel must process the entry (unusual but genuine audio) or name it as a
failure with a reason containing ``reason``; ``ignored`` entries are not files at all
(a folder cycle) and must neither fail nor add a clip.
"""

from __future__ import annotations

import dataclasses
import io
import os
import struct
from collections.abc import Callable
from pathlib import Path

import numpy as np
import soundfile as sf

SR = 16000


def wav_header(*, sr: int, channels: int, bits: int, data_bytes: int, fmt: int = 1) -> bytes:
    """A canonical 44-byte RIFF/WAVE header (layout from the RIFF/WAVE specification,
    Microsoft & IBM 1991: 'RIFF' size 'WAVE', 'fmt ' chunk of 16 bytes, 'data' chunk)."""
    align = (channels * bits // 8) % 2**16  # fields wrap as a 16/32-bit writer would
    return (b"RIFF" + struct.pack("<I", (36 + data_bytes) % 2**32) + b"WAVE"
            + b"fmt " + struct.pack("<IHHIIHH", 16, fmt, channels, sr,
                                    (sr * align) % 2**32, align, bits)
            + b"data" + struct.pack("<I", data_bytes))


def tone(seconds: float, sr: int = SR, channels: int = 1, freq: float = 440.0) -> np.ndarray:
    t = np.arange(round(seconds * sr)) / sr
    y = 0.4 * np.sin(2 * np.pi * freq * t)
    return np.repeat(y[:, None], channels, axis=1) if channels > 1 else y


def _pcm16(y: np.ndarray) -> bytes:
    return (np.clip(y, -1, 1) * 32767).astype("<i2").tobytes()


def _wav_bytes(y: np.ndarray, sr: int = SR, subtype: str = "PCM_16", fmt: str = "WAV") -> bytes:
    buf = io.BytesIO()
    sf.write(buf, y, sr, subtype=subtype, format=fmt)
    return buf.getvalue()


@dataclasses.dataclass(frozen=True)
class Kind:
    """One kind of input and what timbrel must do with it."""

    name: str
    entry: str | bytes          # file (or folder) name inside the audio folder
    valid: bool | None          # True: processed; False: a named failure; None: ignored
    reason: str                 # fragment of the failure reason (empty when valid)
    decision: str               # why, with the outside source of the expectation
    build: Callable[[Path], None]
    slow: bool = False

    @property
    def source(self) -> str:
        """The entry's name as timbrel prints it (undecodable bytes as \\xNN)."""
        raw = self.entry if isinstance(self.entry, bytes) else self.entry.encode()
        return raw.decode("utf-8", "backslashreplace")


def _write(name: str | bytes, data: bytes) -> Callable[[Path], None]:
    def build(folder: Path) -> None:
        with open(os.path.join(os.fsencode(folder), os.fsencode(name)), "wb") as fh:
            fh.write(data)
    return build


def _sf(name: str, y: np.ndarray, sr: int, subtype: str, fmt: str | None = None
        ) -> Callable[[Path], None]:
    def build(folder: Path) -> None:
        sf.write(folder / name, y, sr, subtype=subtype, format=fmt)
    return build


def _symlink(name: str, target: str) -> Callable[[Path], None]:
    def build(folder: Path) -> None:
        os.symlink(target, folder / name)
    return build


def _folder(name: str) -> Callable[[Path], None]:
    def build(folder: Path) -> None:
        (folder / name).mkdir()
        # inside: a file whose name is not an audio name
        sf.write(folder / name / "inner.wav.bak", np.zeros(10), SR, format="WAV")
    return build


def _three_hours(folder: Path) -> None:
    # written in one-minute blocks of tone and silence, so it never sits in memory whole
    minute = np.zeros(60 * SR, np.int16)
    minute[: 30 * SR] = (0.2 * np.sin(2 * np.pi * 220 * np.arange(30 * SR) / SR)
                         * 32767).astype(np.int16)
    with sf.SoundFile(folder / "three_hours.wav", "w", samplerate=SR, channels=1,
                      subtype="PCM_16") as fh:
        for _ in range(180):
            fh.write(minute)


_GOOD_WAV = _wav_bytes(tone(1.0))
_GOOD_FLAC = _wav_bytes(tone(2.0), fmt="FLAC")
_rng = np.random.default_rng(1234)
_nan = tone(0.5).astype(np.float32)
_nan[1000] = np.nan
_inf = tone(0.5).astype(np.float32)
_inf[2000] = np.inf
_square = np.sign(np.sin(2 * np.pi * 200 * np.arange(SR) / SR))  # full scale: ±1 clipped

KINDS: list[Kind] = [
    Kind("empty", "empty.wav", False, "empty file (0 bytes)",
         "a 0-byte file holds no audio (libsndfile refuses it)", _write("empty.wav", b"")),
    Kind("random_bytes", "noise.wav", False, "not readable as audio",
         "libsndfile finds no known header in random bytes",
         _write("noise.wav", _rng.integers(0, 256, 4096, dtype=np.uint8).tobytes())),
    Kind("text", "notes.flac", False, "not readable as audio",
         "plain text has no audio header", _write("notes.flac", b"shopping list\n" * 200)),
    Kind("truncated_header", "cut_header.wav", False, "not readable as audio",
         "a RIFF header cut before its 'data' chunk (RIFF/WAVE specification)",
         _write("cut_header.wav", _GOOD_WAV[:30])),
    Kind("truncated_data", "cut_data.wav", False, "cut short",
         "the 'data' chunk declares more bytes than the file holds (RIFF/WAVE "
         "specification): a copy cut short; framing the part present would pass a partial "
         "clip off as whole, so it is refused", _write("cut_data.wav",
                                                       _GOOD_WAV[: len(_GOOD_WAV) // 2])),
    Kind("truncated_flac", "cut.flac", False, "decoding failed",
         "a FLAC stream cut mid-frame: libsndfile's decoder loses sync",
         _write("cut.flac", _GOOD_FLAC[: len(_GOOD_FLAC) * 4 // 10])),
    Kind("header_overclaims", "overclaim.wav", False, "cut short",
         "header claims 10x the frames present (RIFF/WAVE specification)",
         _write("overclaim.wav", wav_header(sr=SR, channels=1, bits=16,
                                            data_bytes=10 * SR * 2) + _pcm16(tone(1.0)))),
    Kind("zero_sample_rate", "zero_rate.wav", False, "not readable as audio",
         "a sample rate of 0 Hz is meaningless; libsndfile refuses the header",
         _write("zero_rate.wav", wav_header(sr=0, channels=1, bits=16, data_bytes=SR * 2)
                + _pcm16(tone(1.0)))),
    Kind("one_hz_sample_rate", "one_hz.wav", False, "implausible sample rate 1 Hz",
         "a 16 kHz clip whose header says 1 Hz (damage): below every rate recorders use "
         "(telephony's 8 kHz is the usual floor, common practice), and upsampled to 16 kHz "
         "it would ask for 16000x its samples",
         _write("one_hz.wav", wav_header(sr=1, channels=1, bits=16, data_bytes=SR * 2)
                + _pcm16(tone(1.0)))),
    Kind("nan_samples", "nan.wav", False, "NaN or infinite",
         "IEEE-754 NaN is not a sample value; log-mel of it is undefined",
         _sf("nan.wav", _nan, SR, "FLOAT")),
    Kind("inf_samples", "inf.wav", False, "NaN or infinite",
         "an infinite sample is not audio (IEEE-754)", _sf("inf.wav", _inf, SR, "FLOAT")),
    Kind("silence", "silence.wav", True, "",
         "digital silence is valid audio; log(power + log_offset) keeps it finite "
         "(common practice)", _sf("silence.wav", np.zeros(SR), SR, "PCM_16")),
    Kind("dc_offset", "dc.wav", True, "", "a constant offset is valid audio (its energy "
         "sits in the lowest band)", _sf("dc.wav", np.full(SR, 0.5), SR, "PCM_16")),
    Kind("clipped_square", "square.wav", True, "", "a full-scale square wave is valid "
         "(clipped recordings are common)", _sf("square.wav", _square, SR, "PCM_16")),
    Kind("one_sample", "one.wav", False, "shorter than one analysis window",
         "one sample gives no frame: n_frames = 1 + (n - n_fft) // hop < 1 (README formula, "
         "as librosa.util.frame)", _sf("one.wav", np.array([0.1]), SR, "PCM_16")),
    Kind("shorter_than_window", "short.wav", False, "shorter than one analysis window",
         "300 samples < n_fft 512 at 16 kHz gives no frame",
         _sf("short.wav", tone(300 / SR), SR, "PCM_16")),
    Kind("rate_8k", "narrow.wav", True, "", "8 kHz telephone audio is valid; resampled "
         "with soxr", _sf("narrow.wav", tone(1.0, 8000), 8000, "PCM_16")),
    Kind("rate_192k", "hires.wav", True, "", "192 kHz studio audio is valid; resampled "
         "with soxr", _sf("hires.wav", tone(1.0, 192000), 192000, "PCM_24")),
    Kind("mono_flac", "mono.flac", True, "", "1-channel FLAC is valid",
         _sf("mono.flac", tone(1.0), SR, "PCM_16")),
    Kind("eight_channels", "octo.wav", True, "", "8 channels are valid; mixed down to mono "
         "(common practice)", _sf("octo.wav", tone(1.0, channels=8), SR, "PCM_16")),
    Kind("int8", "int8.aiff", True, "", "8-bit signed PCM is valid (AIFF holds it)",
         _sf("int8.aiff", tone(1.0), SR, "PCM_S8", "AIFF")),
    Kind("int16", "int16.wav", True, "", "16-bit PCM is the commonest encoding",
         _sf("int16.wav", tone(1.0), SR, "PCM_16")),
    Kind("int32", "int32.wav", True, "", "32-bit PCM is valid",
         _sf("int32.wav", tone(1.0), SR, "PCM_32")),
    Kind("float64", "double.wav", True, "", "64-bit float WAV is valid",
         _sf("double.wav", tone(1.0), SR, "DOUBLE")),
    Kind("wrong_extension", "really_wav.flac", True, "", "libsndfile reads the format from "
         "the header, not the name", _write("really_wav.flac", _GOOD_WAV)),
    Kind("symlink_loop", "loop.wav", False, "cannot read",
         "a symlink to itself: ELOOP (POSIX)", _symlink("loop.wav", "loop.wav")),
    Kind("dangling_symlink", "gone.wav", False, "No such file",
         "a symlink to a missing file: ENOENT (POSIX)", _symlink("gone.wav", "nowhere.wav")),
    Kind("folder_cycle", "cycle", None, "", "a symlink to the folder's own parent: a "
         "cycle to skip, not a file (os.walk follows it forever otherwise)",
         _symlink("cycle", ".")),
    Kind("non_utf8_name", b"caf\xe9.wav", True, "", "a Latin-1 file name on a UTF-8 "
         "system is still a file; shown with \\xNN escapes", _write(b"caf\xe9.wav", _GOOD_WAV)),
    Kind("folder_named_wav", "x.wav", False, "is a folder",
         "a directory named like a file is not audio", _folder("x.wav")),
    Kind("three_hours", "three_hours.wav", True, "", "a 3-hour recording is valid; "
         "decoded in blocks", _three_hours, slow=True),
]
