"""The development suite: three sound domains from Debian packages, split by source.

Each domain is a set of labelled clips whose ``train``, ``validation`` and ``test``
splits come from different *sources*, so a classifier is scored on sources it never saw:

``speech``
    Confusable spoken words (20 classes in five sets of four that differ in one sound:
    bat/pat/bad/pad, bit/beat/bet/bait, fin/thin/sin/shin, tip/dip/cap/cab,
    map/nap/seed/seat) from the espeak-ng speech synthesiser (Debian ``espeak-ng``, through
    ``tests/speech_corpus.py``): six training voices, ten validation voices and four test
    voices, six clips per word and voice. Each clip draws its own speaking rate (110-260
    words per minute) and pitch (10-90 of espeak-ng's 0-99), is put in a simulated room
    (an exponentially decaying noise tail, reverberation time 0.2-0.8 s, direct to
    reverberant ratio 0-10 dB), framed by 0.05-0.3 s of background before and after, and
    mixed with pink-to-brown noise at 20-40 dB SNR over the word, at a peak level of -20 to
    -1 dB full scale; the draws are seeded per clip and listed in the manifest. The ranges
    were set on the validation split with the MFCC peer alone (accuracy 0.526 there,
    against about 0.9 on the clean digits the set replaced), so the set leaves room above and
    below the peers. It lives in the folder ``speech-pairs``.
``instruments``
    Single notes of eight instrument families (piano, organ, guitar, bass, strings,
    brass, reed, pipe; two General MIDI programs each, eight pitches, two velocities)
    rendered by FluidSynth (Debian ``fluidsynth``) from four sample-based instrument sets:
    FluidR3 GM and MuseScore General Lite train (the latter grew out of the former, so
    both sit on one side), csound's GM bank validates and TimGM6mb tests (Debian
    ``fluid-soundfont-gm``, ``musescore-general-soundfont-small``, ``csound-soundfont``,
    ``timgm6mb-soundfont``).
``drums``
    Recorded drum hits of eight kinds (kick, snare, closed and open hi-hat, tom, crash,
    ride, clap) from the sample kits of Debian ``hydrogen-drumkits``: the kits are split
    between train, validation and test (kits of one author stay together).

Sets are built once into ``$TIMBREL_BENCH_DATA`` (default ``~/.cache/timbrel-bench``),
outside git, each in a sibling folder renamed into place when complete, and reused.
:func:`views` gives, per domain, a manifest for choosing defaults (train + validation,
the validation clips marked ``test`` for the probe) and one for the final figures
(train + test).

Run: python bench/domains.py [--domains speech,instruments,drums]   (prints the splits)
"""

from __future__ import annotations

import argparse
import csv
import os
import re
import shutil
import struct
import subprocess
import sys
import tempfile
import xml.etree.ElementTree as ET
from collections import Counter
from pathlib import Path

import numpy as np
import soundfile as sf

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
DATA = Path(os.environ.get("TIMBREL_BENCH_DATA", "~/.cache/timbrel-bench")).expanduser()
DOMAINS = ("speech", "instruments", "drums")
SPLITS = ("train", "validation", "test")
FORMAT = 3  # bump to rebuild every cached set
#: a domain's folder under DATA, where it is not the domain's name (a new name for a set
#: that changed, so an older copy other checkouts still use stays in place)
FOLDERS = {"speech": "speech-pairs"}

# --------------------------------------------------------------------------- instruments

SOUND_SETS = {  # name: (file, split)
    "fluidr3": ("/usr/share/sounds/sf2/FluidR3_GM.sf2", "train"),
    "musescore": ("/usr/share/sounds/sf3/MuseScore_General_Lite.sf3", "train"),
    "csound": ("/usr/share/sounds/sf2/sf_GMbank.sf2", "validation"),
    "timgm6mb": ("/usr/share/sounds/sf2/TimGM6mb.sf2", "test"),
}
#: family: (General MIDI programs, lowest and highest MIDI pitch)
FAMILIES = {
    "piano": ((0, 4), (48, 79)), "organ": ((16, 19), (48, 79)),
    "guitar": ((24, 25), (45, 72)), "bass": ((32, 33), (28, 52)),
    "strings": ((40, 42), (48, 72)), "brass": ((56, 57), (48, 72)),
    "reed": ((65, 71), (50, 74)), "pipe": ((73, 74), (60, 84)),
}
PITCHES_PER_PROGRAM = 8
VELOCITIES = (70, 110)
NOTE_SECONDS, SLOT_SECONDS, CLIP_SECONDS = 1.0, 2.0, 1.5
RENDER_RATE = 22050


def _note_plan() -> list[tuple[str, int, int, int]]:
    """(family, program, pitch, velocity) of every note, in rendering order."""
    plan = []
    for family, (programs, (low, high)) in FAMILIES.items():
        pitches = np.round(np.linspace(low, high, PITCHES_PER_PROGRAM)).astype(int)
        plan += [(family, p, int(pitch), v) for p in programs for pitch in pitches
                 for v in VELOCITIES]
    return plan


def _vlq(n: int) -> bytes:
    out = [n & 0x7F]
    n >>= 7
    while n:
        out.append((n & 0x7F) | 0x80)
        n >>= 7
    return bytes(reversed(out))


def midi_file(notes: list[tuple[str, int, int, int]]) -> bytes:
    """A type-0 Standard MIDI File playing ``notes`` one per slot (120 bpm, 480 ticks per
    beat: a slot of SLOT_SECONDS, each note held NOTE_SECONDS), written by hand."""
    ticks = 960  # per second at 120 bpm
    events = b""
    for _, program, pitch, velocity in notes:
        events += _vlq(0) + bytes([0xC0, program]) + _vlq(0) + bytes([0x90, pitch, velocity])
        events += _vlq(round(NOTE_SECONDS * ticks)) + bytes([0x80, pitch, 0])
        events += _vlq(round((SLOT_SECONDS - NOTE_SECONDS) * ticks))
        events += b"\xff\x01\x00"  # an empty text event holds the rest of the slot
    events += _vlq(0) + b"\xff\x2f\x00"
    return (b"MThd" + struct.pack(">IHHH", 6, 0, 1, 480)
            + b"MTrk" + struct.pack(">I", len(events)) + events)


def _build_instruments(folder: Path) -> list[dict[str, str]]:
    plan = _note_plan()
    rows = []
    midi = folder / "notes.mid"
    midi.write_bytes(midi_file(plan))
    for name, (font, split) in SOUND_SETS.items():
        wav = folder / f"{name}.wav"
        subprocess.run(["fluidsynth", "-ni", "-q", "-g", "0.6", "-r", str(RENDER_RATE),
                        "-F", str(wav), font, str(midi)], check=True, capture_output=True,
                       timeout=600)
        audio, rate = sf.read(wav, dtype="float32", always_2d=True)
        audio = audio.mean(axis=1)
        slot, clip = round(SLOT_SECONDS * rate), round(CLIP_SECONDS * rate)
        (folder / "clips").mkdir(exist_ok=True)
        for k, (family, program, pitch, velocity) in enumerate(plan):
            piece = audio[k * slot:k * slot + clip]
            path = f"clips/{name}_{k:04d}_{family}.flac"
            sf.write(folder / path, piece, rate, subtype="PCM_16")
            rows.append({"path": path, "label": family, "split": split, "origin": name,
                         "program": str(program), "pitch": str(pitch),
                         "velocity": str(velocity)})
        wav.unlink()
    midi.unlink()
    return rows


# --------------------------------------------------------------------------------- drums

KITS = "/usr/share/hydrogen/data/drumkits"
KIT_SPLITS = {
    "train": ("Millo-Drums_v.1", "Millo_MultiLayered2", "Millo_MultiLayered3", "VariBreaks",
              "ElectricEmpireKit", "rumpf_kit_z01_h2"),
    "validation": ("Audiophob", "ColomboAcousticDrumkit", "BJA_Pacific"),
    "test": ("The Black Pearl 1.0", "ForzeeStereo", "HardElectro1"),
}
#: kind: a pattern of the instrument names that are that kind (checked in this order)
DRUM_KINDS = {
    "clap": r"clap",
    "hihat_open": r"(open|opened|op)\b.*(hh|hat)|(hh|hat).*\b(open|opened|op)\b",
    "hihat_closed": r"(closed|cl)\b.*(hh|hat)|(hh|hat).*\b(closed|cl)\b",
    "kick": r"kick|bass ?drum",
    "snare": r"snare(?!.*roll)",
    "tom": r"\btom",
    "crash": r"crash(?!.*ride)",
    "ride": r"ride(?!.*(bell|cup))",
}
HITS_PER_KIT_KIND = 8
HIT_SECONDS = 1.0


def drum_kind(name: str) -> str | None:
    """The kind of a drum-kit instrument from its name, or None (other percussion)."""
    lowered = name.lower()
    for kind, pattern in DRUM_KINDS.items():
        if re.search(pattern, lowered):
            return kind
    return None


def _kit_samples(kit: Path) -> list[tuple[str, Path]]:
    """(kind, sample file) of each layer of each instrument of a kit, in file order."""
    tree = ET.parse(kit / "drumkit.xml")
    found = []
    for instrument in tree.getroot().iter():
        if instrument.tag.split("}")[-1] != "instrument":
            continue
        name = next((c.text or "" for c in instrument if c.tag.split("}")[-1] == "name"), "")
        kind = drum_kind(name)
        if kind is None:
            continue
        files = [e.text for e in instrument.iter() if e.tag.split("}")[-1] == "filename"
                 and e.text]
        found += [(kind, kit / f) for f in files if (kit / f).is_file()]
    return found


def _build_drums(folder: Path) -> list[dict[str, str]]:
    rows = []
    (folder / "clips").mkdir(exist_ok=True)
    for split, kits in KIT_SPLITS.items():
        for kit in kits:
            taken: Counter[str] = Counter()
            for kind, sample in _kit_samples(Path(KITS) / kit):
                if taken[kind] >= HITS_PER_KIT_KIND:
                    continue
                audio, rate = sf.read(sample, dtype="float32", always_2d=True)
                piece = audio.mean(axis=1)[: round(HIT_SECONDS * rate)]
                if len(piece) < rate // 20 or not np.abs(piece).max() > 1e-4:
                    continue  # under 50 ms, or silent
                slug = re.sub(r"[^a-z0-9]+", "-", kit.lower()).strip("-")
                path = f"clips/{slug}_{kind}_{taken[kind]}.flac"
                sf.write(folder / path, piece, rate, subtype="PCM_16")
                taken[kind] += 1
                rows.append({"path": path, "label": kind, "split": split, "origin": kit,
                             "sample": sample.name})
    return rows


# -------------------------------------------------------------------------------- speech

#: Confusable words: sets that differ in one sound (the voicing of the first or last
#: consonant, the vowel, the place of a fricative or nasal).
SPEECH_WORDS = (
    "bat", "pat", "bad", "pad",      # voicing, first and last consonant
    "bit", "beat", "bet", "bait",    # the vowel
    "fin", "thin", "sin", "shin",    # the fricative
    "tip", "dip", "cap", "cab",      # voicing
    "map", "nap", "seed", "seat",    # the nasal; voicing
)  # fmt: skip
SPEECH_TAKES = 6  # clips per word and voice, each with its own draws below
SPEECH_RATES = (110, 260)  # words per minute (espeak-ng's -s; it speaks 175 by default)
SPEECH_PITCHES = (10, 90)  # espeak-ng's -p, of 0..99 (50 by default)
SPEECH_SNR_DB = (20.0, 40.0)  # speech to background noise power, over the word
SPEECH_RT60_S = (0.2, 0.8)  # reverberation time of the simulated room
SPEECH_DRR_DB = (0.0, 10.0)  # direct to reverberant energy ratio
SPEECH_NOISE_SLOPE = (1.0, 2.0)  # noise power ~ f**-slope: 1 pink, 2 brown
SPEECH_PAD_S = (0.05, 0.3)  # background alone before and after the word
SPEECH_PEAK_DB = (-20.0, -1.0)  # peak level of the clip, dB full scale
SPEECH_SAMPLE_RATE = 16000
SPEECH_SEED = 17


def _speech_corpus():
    """``tests/speech_corpus.py``, which runs espeak-ng and lists its voices."""
    if str(ROOT / "tests") not in sys.path:
        sys.path.insert(0, str(ROOT / "tests"))
    import speech_corpus

    return speech_corpus


def speech_plan() -> list[dict]:
    """One row per clip: the word, voice and split, and the clip's own draws of speaking
    rate, pitch, room, noise and level (uniform in the ranges above, seeded per clip so
    the set is the same on every machine)."""
    corpus = _speech_corpus()
    voices = ([(v, "train") for v in corpus.DEFAULT_TRAIN_VOICES]
              + [(v, "validation") for v in corpus.VALIDATION_VOICES]
              + [(v, "test") for v in corpus.DEFAULT_TEST_VOICES])
    plan = []
    for voice, split in voices:
        for word in SPEECH_WORDS:
            for take in range(SPEECH_TAKES):
                rng = np.random.default_rng([SPEECH_SEED, len(plan)])
                plan.append({
                    "word": word, "voice": voice, "split": split, "take": take,
                    "rate": int(rng.integers(SPEECH_RATES[0], SPEECH_RATES[1] + 1)),
                    "pitch": int(rng.integers(SPEECH_PITCHES[0], SPEECH_PITCHES[1] + 1)),
                    "snr_db": float(rng.uniform(*SPEECH_SNR_DB)),
                    "rt60_s": float(rng.uniform(*SPEECH_RT60_S)),
                    "drr_db": float(rng.uniform(*SPEECH_DRR_DB)),
                    "noise_slope": float(rng.uniform(*SPEECH_NOISE_SLOPE)),
                    "lead_s": float(rng.uniform(*SPEECH_PAD_S)),
                    "tail_s": float(rng.uniform(*SPEECH_PAD_S)),
                    "peak_db": float(rng.uniform(*SPEECH_PEAK_DB)),
                    "seed": len(plan),
                })
    return plan


def room_response(rt60: float, drr_db: float, rate: int, rng: np.random.Generator
                  ) -> np.ndarray:
    """A simulated room's impulse response: the direct sound (a unit impulse) and a tail of
    Gaussian noise whose amplitude falls 60 dB in ``rt60`` seconds, scaled to ``drr_db``
    (the exponentially decaying noise model of late reverberation, common practice)."""
    t = np.arange(1, round(rt60 * rate)) / rate
    tail = rng.standard_normal(len(t)) * 10.0 ** (-3.0 * t / rt60)
    tail *= np.sqrt(10.0 ** (-drr_db / 10.0) / np.sum(tail ** 2))
    return np.concatenate([[1.0], tail])


def coloured_noise(n: int, slope: float, rng: np.random.Generator) -> np.ndarray:
    """Gaussian noise of ``n`` samples whose power falls as ``f ** -slope``, unit power."""
    spectrum = np.fft.rfft(rng.standard_normal(n))
    f = np.arange(len(spectrum), dtype=float)
    f[0] = f[1] if len(f) > 1 else 1.0
    noise = np.fft.irfft(spectrum * f ** (-slope / 2.0), n)
    return noise / np.sqrt(np.mean(noise ** 2))


def degrade(word: np.ndarray, rate: int, take: dict) -> np.ndarray:
    """A clean word as a user's recording might hold it: in a reverberant room, with
    background noise before, during and after it at ``take["snr_db"]`` (over the word),
    at a peak level of ``take["peak_db"]``."""
    rng = np.random.default_rng([SPEECH_SEED, take["seed"], 1])
    wet = np.convolve(word, room_response(take["rt60_s"], take["drr_db"], rate, rng))
    lead, tail = round(take["lead_s"] * rate), round(take["tail_s"] * rate)
    speech = np.concatenate([np.zeros(lead), wet, np.zeros(max(0, tail - (len(wet) - len(word))))])
    power = np.mean(word ** 2)
    noise = coloured_noise(len(speech), take["noise_slope"], rng)
    clip = speech + noise * np.sqrt(power / 10.0 ** (take["snr_db"] / 10.0))
    return (clip * 10.0 ** (take["peak_db"] / 20.0) / np.abs(clip).max()).astype(np.float32)


def _build_speech(folder: Path) -> list[dict[str, str]]:
    speak = _speech_corpus().speak
    rows = []
    (folder / "clips").mkdir()
    for take in speech_plan():
        word = speak(take["word"], take["voice"], rate=take["rate"], pitch=take["pitch"],
                     sample_rate=SPEECH_SAMPLE_RATE, scratch=folder / "clips" / "espeak.wav")
        voice = take["voice"].replace("+", "_")
        path = f"clips/{voice}_{take['word']}_{take['take']}.flac"
        sf.write(folder / path, degrade(word, SPEECH_SAMPLE_RATE, take), SPEECH_SAMPLE_RATE,
                 subtype="PCM_16")
        rows.append({"path": path, "label": take["word"], "split": take["split"],
                     "origin": take["voice"], "rate": str(take["rate"]),
                     "pitch": str(take["pitch"]), "snr_db": f"{take['snr_db']:.1f}",
                     "rt60_s": f"{take['rt60_s']:.2f}", "drr_db": f"{take['drr_db']:.1f}",
                     "noise_slope": f"{take['noise_slope']:.2f}"})
    return rows


BUILDERS = {"speech": _build_speech, "instruments": _build_instruments, "drums": _build_drums}


# ----------------------------------------------------------------------------- the sets


def build(domain: str, data: Path = DATA) -> Path:
    """The domain's folder with ``manifest.csv`` (``path,label,split,origin,...``; the
    origin is the voice, sound set or kit), built when missing (in a sibling folder,
    renamed into place when complete)."""
    out = data / FOLDERS.get(domain, domain)
    stamp = out / f".complete-{FORMAT}"
    if stamp.is_file():
        return out
    data.mkdir(parents=True, exist_ok=True)
    build_dir = Path(tempfile.mkdtemp(prefix=f".{domain}-", dir=data))
    try:
        rows = BUILDERS[domain](build_dir)
        with open(build_dir / "manifest.csv", "w", newline="", encoding="utf-8") as fh:
            writer = csv.DictWriter(fh, fieldnames=list(rows[0]), lineterminator="\n")
            writer.writeheader()
            writer.writerows(rows)
        (build_dir / f".complete-{FORMAT}").write_text("")
        if out.exists():
            shutil.rmtree(out)
        build_dir.rename(out)
    finally:
        shutil.rmtree(build_dir, ignore_errors=True)
    return out


def views(domain: str, data: Path = DATA) -> dict[str, Path]:
    """Manifests for the probe: ``validation`` (train + validation clips, the latter in
    the ``test`` role) and ``test`` (train + test clips)."""
    folder = build(domain, data)
    with open(folder / "manifest.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    out = {}
    for view in ("validation", "test"):
        path = folder / f"manifest_{view}.csv"
        kept = [{**r, "split": "train" if r["split"] == "train" else "test"}
                for r in rows if r["split"] in ("train", view)]
        with open(path, "w", newline="", encoding="utf-8") as fh:
            writer = csv.DictWriter(fh, fieldnames=list(kept[0]), lineterminator="\n")
            writer.writeheader()
            writer.writerows(kept)
        out[view] = path
    return out


def describe(domain: str, data: Path = DATA) -> str:
    """Clips, classes and sources of each split, as one line per split."""
    with open(build(domain, data) / "manifest.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    lines = []
    for split in SPLITS:
        part = [r for r in rows if r["split"] == split]
        labels = Counter(r["label"] for r in part)
        sources = sorted({r["origin"] for r in part})
        lines.append(f"{domain:<12}{split:<11}{len(part):>5} clips, {len(labels)} classes "
                     f"({min(labels.values())}-{max(labels.values())} each), "
                     f"{len(sources)} sources: {', '.join(sources)}")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--domains", default=",".join(DOMAINS))
    args = parser.parse_args(argv)
    for domain in args.domains.split(","):
        print(describe(domain))


if __name__ == "__main__":
    main()
