"""Synthesise timbrel's demo set: the sounds logged at Quillmere Tide Station.

The scenario is invented for this project. Quillmere is a fictional salt
marsh; an unattended listening post on its sea wall records short clips of
whatever it hears and a keeper labels them. Six sources are heard there, four
invented creatures and two pieces of invented machinery:

``reedwhistler``
    A small marsh creature that calls in two to five quick rising whistles
    (frequency sweeps between about 1.2 and 4.8 kHz, some of them arched), each
    with a faint second harmonic.
``tickbeetle``
    An insect that clicks in bouts: trains of very short, resonant ticks at 7 to
    18 per second, with jittered spacing and loudness.
``trillmoth``
    A moth whose wings buzz a steady tone (1.4 to 3.2 kHz) chopped by a fast
    amplitude trill (18 to 40 Hz), in one to three bouts.
``bellbuoy``
    The channel buoy: one to three strikes, each a click followed by decaying,
    inharmonic partials.
``tidepump``
    The station's drainage pump: a harmonic drone (85 to 170 Hz fundamental)
    whose overtones peak in a formant-like band, with slow wow and a stroke
    rhythm of one to three per second.
``sluicegate``
    Water rushing through the sluice: band-limited noise that swells and ebbs
    slowly.

The sources were chosen to overlap in *where* their energy lies (mostly 1 to 4
kHz) and to differ in *how it moves*: sweeps, clicks, amplitude trills,
decays, harmonic lines and noise. A classifier that only averages the spectrum
has a harder time than one that sees the spectro-temporal pattern.

Each clip varies pitch, rate, duration, onset time and level, sits on a bed of
marsh ambience (low wind rumble and faint hiss at a random level), and in about
a third of the clips a different source is heard faintly in the distance.

Every random draw comes from a generator seeded with ``(seed, class, clip)``,
so the same seed always gives the same samples. Output: 16 kHz mono 16-bit
FLAC files in ``clips/`` and ``manifest.csv`` (``path,label,split``; path
relative to this folder; a stratified, seeded 70/30 split).

The station also keeps longer logs: ``soundscapes/`` holds six half-minute
stretches of marsh in which 10 to 16 sources sound at random times, often
overlapping, with the keeper's annotations in ``soundscapes/events.tsv``
(``filename onset offset event_label``) and ``soundscapes/manifest.csv``
(four ``train``, two ``test``), for frame-level event detection.

Usage::

    python demo_audio/synthesise.py              # rewrite demo_audio/ in place
    python demo_audio/synthesise.py --out-dir /tmp/quillmere --seed 7
"""

from __future__ import annotations

import argparse
import csv
from collections.abc import Callable
from pathlib import Path

import numpy as np
import soundfile as sf
from scipy.signal import butter, lfilter, sosfilt

SAMPLE_RATE = 16000
DEFAULT_SEED = 2718
CLIPS_PER_CLASS = 14
TEST_CLIPS_PER_CLASS = 4  # 10 train + 4 test per class: a 71/29 split
CLIP_SECONDS = (1.0, 3.0)
TARGET_PEAK_DBFS = (-20.0, -6.0)
AMBIENCE_RMS_DBFS = (-60.0, -44.0)
HISS_RMS_DBFS = -78.0
DISTANT_SOURCE_CHANCE = 0.33
DISTANT_SOURCE_DB = (-20.0, -12.0)  # relative to the labelled source's peak

N_SOUNDSCAPES = 6  # 4 train, 2 test
SOUNDSCAPE_SECONDS = 30.0
SOUNDSCAPE_EVENTS = (10, 17)  # sources placed per soundscape, at random times

Generator = Callable[[np.random.Generator, float], np.ndarray]


# ------------------------------------------------------------------ building blocks


def _seconds(duration: float) -> int:
    return max(1, round(duration * SAMPLE_RATE))


def _tone(frequency_track: np.ndarray) -> np.ndarray:
    """Sine whose instantaneous frequency (Hz) follows ``frequency_track`` sample by sample."""
    phase = 2.0 * np.pi * np.cumsum(frequency_track) / SAMPLE_RATE
    return np.sin(phase)


def _fade(n_samples: int, attack: float, release: float) -> np.ndarray:
    """Envelope of ones with raised-cosine attack and release (in seconds)."""
    envelope = np.ones(n_samples)
    n_attack = min(n_samples // 2, _seconds(attack))
    n_release = min(n_samples // 2, _seconds(release))
    envelope[:n_attack] = 0.5 - 0.5 * np.cos(np.pi * np.arange(n_attack) / n_attack)
    envelope[n_samples - n_release :] = 0.5 + 0.5 * np.cos(np.pi * np.arange(n_release) / n_release)
    return envelope


def _resonator(signal: np.ndarray, centre: float, bandwidth: float) -> np.ndarray:
    """Two-pole resonant filter (a struck-body ring) at ``centre`` Hz."""
    radius = np.exp(-np.pi * bandwidth / SAMPLE_RATE)
    angle = 2.0 * np.pi * centre / SAMPLE_RATE
    return lfilter([1.0 - radius], [1.0, -2.0 * radius * np.cos(angle), radius**2], signal)


def _place(canvas: np.ndarray, event: np.ndarray, start: int) -> None:
    stop = min(canvas.shape[0], start + event.shape[0])
    canvas[start:stop] += event[: stop - start]


def _peak_normalise(signal: np.ndarray) -> np.ndarray:
    return signal / max(np.max(np.abs(signal)), 1e-12)


# ------------------------------------------------------------------------- sources


def reedwhistler(rng: np.random.Generator, max_duration: float) -> np.ndarray:
    """Two to five rising (sometimes arched) whistles with a faint second harmonic."""
    base = rng.uniform(1300.0, 2200.0)
    n_calls = int(rng.integers(2, 6))
    pieces = []
    for _ in range(n_calls):
        length = rng.uniform(0.07, 0.2)
        start = base * rng.uniform(0.92, 1.08)
        stop = start * rng.uniform(1.4, 2.0)
        t = np.linspace(0.0, 1.0, _seconds(length))
        if rng.random() < 0.3:  # arched call: up, then back down
            track = start * (stop / start) ** np.sin(np.pi * t)
        else:
            track = start * (stop / start) ** t
        # The harmonic fades out before 7.6 kHz so that it never aliases at 16 kHz.
        harmonic_weight = rng.uniform(0.15, 0.35) * np.clip((7600.0 - 2.0 * track) / 800.0, 0, 1)
        call = _tone(track) + harmonic_weight * _tone(2.0 * track)
        pieces.append(call * np.sin(np.pi * t) ** 2)
        pieces.append(np.zeros(_seconds(rng.uniform(0.04, 0.18))))
    return np.concatenate(pieces)[: _seconds(max_duration)]


def tickbeetle(rng: np.random.Generator, max_duration: float) -> np.ndarray:
    """A bout of short resonant ticks at 7-18 per second, spacing and loudness jittered."""
    duration = min(max_duration, rng.uniform(0.5, 1.8))
    n_samples = _seconds(duration)
    excitation = np.zeros(n_samples)
    rate = rng.uniform(7.0, 18.0)
    position = rng.uniform(0.0, 0.03)
    while position < duration - 0.02:
        burst = rng.standard_normal(int(rng.integers(16, 48))) * rng.uniform(0.6, 1.4)
        _place(excitation, burst, _seconds(position))
        position += rng.uniform(0.85, 1.15) / rate
    centre = rng.uniform(1500.0, 4000.0)
    ticks = _resonator(excitation, centre, rng.uniform(150.0, 600.0))
    # A weaker second body mode keeps the tick from being a pure ring.
    ticks += 0.5 * _resonator(excitation, centre * rng.uniform(1.5, 1.9), 500.0)
    return ticks * _fade(n_samples, 0.005, 0.02)


def trillmoth(rng: np.random.Generator, max_duration: float) -> np.ndarray:
    """One to three bouts of a tone chopped by a fast amplitude trill."""
    carrier = rng.uniform(1400.0, 3200.0)
    trill_rate = rng.uniform(18.0, 40.0)
    depth = rng.uniform(0.7, 1.0)
    pieces = []
    for _ in range(int(rng.integers(1, 4))):
        length = rng.uniform(0.3, 0.9)
        n_samples = _seconds(length)
        t = np.arange(n_samples) / SAMPLE_RATE
        drift = 1.0 + 0.03 * np.sin(2.0 * np.pi * rng.uniform(0.5, 2.0) * t + rng.uniform(0, 6))
        trill = (1.0 - depth + depth * 0.5 * (1.0 + np.sin(2.0 * np.pi * trill_rate * t))) ** 2
        pieces.append(_tone(carrier * drift) * trill * _fade(n_samples, 0.03, 0.06))
        pieces.append(np.zeros(_seconds(rng.uniform(0.08, 0.3))))
    return np.concatenate(pieces)[: _seconds(max_duration)]


def bellbuoy(rng: np.random.Generator, max_duration: float) -> np.ndarray:
    """One to three strikes: a click, then decaying inharmonic partials."""
    fundamental = rng.uniform(450.0, 900.0)
    ratios = np.array([1.0, 2.32, 4.25, 6.63]) * rng.uniform(0.98, 1.02, size=4)
    weights = rng.uniform(0.3, 1.0, size=4)
    decays = rng.uniform(0.25, 0.7) / np.sqrt(ratios)
    n_samples = _seconds(max_duration)
    t = np.arange(n_samples) / SAMPLE_RATE
    strike = np.zeros(n_samples)
    for ratio, weight, decay in zip(ratios, weights, decays, strict=True):
        if fundamental * ratio < 0.45 * SAMPLE_RATE:
            strike += weight * np.sin(2.0 * np.pi * fundamental * ratio * t) * np.exp(-t / decay)
    click = rng.standard_normal(_seconds(0.004)) * np.linspace(1.0, 0.0, _seconds(0.004))
    strike[: click.shape[0]] += 0.8 * click
    out = np.zeros(n_samples)
    position = 0.0
    for _ in range(int(rng.integers(1, 4))):
        if position >= max_duration - 0.3:
            break
        _place(out, strike * rng.uniform(0.6, 1.0), _seconds(position))
        position += rng.uniform(0.35, 0.8)
    ring_out = min(n_samples, _seconds(position + 0.8))
    return out[:ring_out] * _fade(ring_out, 0.0005, 0.05)


def tidepump(rng: np.random.Generator, max_duration: float) -> np.ndarray:
    """Harmonic drone with a formant-like overtone peak, slow wow and a stroke rhythm."""
    duration = min(max_duration, rng.uniform(0.8, 2.6))
    n_samples = _seconds(duration)
    t = np.arange(n_samples) / SAMPLE_RATE
    fundamental = rng.uniform(85.0, 170.0)
    wow = 1.0 + 0.01 * np.sin(2.0 * np.pi * rng.uniform(0.3, 1.0) * t + rng.uniform(0, 6))
    formant = rng.uniform(900.0, 2500.0)
    drone = np.zeros(n_samples)
    for harmonic in range(1, int(7000.0 / fundamental) + 1):
        octaves_from_formant = np.log2(harmonic * fundamental / formant)
        weight = np.exp(-0.5 * (octaves_from_formant / 0.6) ** 2) + 0.15 / harmonic
        drone += weight * np.sin(
            2.0 * np.pi * np.cumsum(harmonic * fundamental * wow) / SAMPLE_RATE + rng.uniform(0, 6)
        )
    stroke = 1.0 - rng.uniform(0.1, 0.3) * (1.0 + np.cos(2.0 * np.pi * rng.uniform(1, 3) * t))
    return drone * stroke * _fade(n_samples, 0.15, 0.2)


def sluicegate(rng: np.random.Generator, max_duration: float) -> np.ndarray:
    """Band-limited rushing noise that swells and ebbs slowly."""
    duration = min(max_duration, rng.uniform(0.9, 2.6))
    n_samples = _seconds(duration)
    t = np.arange(n_samples) / SAMPLE_RATE
    low, high = rng.uniform(500.0, 1200.0), rng.uniform(2500.0, 4500.0)
    band = butter(4, [low, high], btype="bandpass", fs=SAMPLE_RATE, output="sos")
    rush = sosfilt(band, rng.standard_normal(n_samples))
    depth = rng.uniform(0.5, 0.9)
    swell = 1.0 - depth * 0.5 * (1.0 + np.sin(2.0 * np.pi * rng.uniform(0.4, 1.5) * t))
    return rush * swell * _fade(n_samples, 0.1, 0.15)


SOURCES: dict[str, Generator] = {
    "reedwhistler": reedwhistler,
    "tickbeetle": tickbeetle,
    "trillmoth": trillmoth,
    "bellbuoy": bellbuoy,
    "tidepump": tidepump,
    "sluicegate": sluicegate,
}


# --------------------------------------------------------------------------- clips


def marsh_ambience(rng: np.random.Generator, n_samples: int) -> np.ndarray:
    """Low wind rumble (integrated, high-passed noise) at a random level plus faint hiss."""
    rumble = np.cumsum(rng.standard_normal(n_samples))
    rumble = sosfilt(butter(2, 30.0, btype="highpass", fs=SAMPLE_RATE, output="sos"), rumble)
    rumble *= 10.0 ** (rng.uniform(*AMBIENCE_RMS_DBFS) / 20.0) / np.sqrt(np.mean(rumble**2))
    hiss = rng.standard_normal(n_samples) * 10.0 ** (HISS_RMS_DBFS / 20.0)
    return rumble + hiss


def make_clip(label: str, rng: np.random.Generator) -> np.ndarray:
    """Synthesise one labelled clip: ambience, the source at a random onset and level.

    Parameters
    ----------
    label : str
        A key of :data:`SOURCES`.
    rng : numpy.random.Generator
        Source of every random draw for this clip.

    Returns
    -------
    clip : numpy.ndarray, shape (n_samples,), float32
        Mono samples at :data:`SAMPLE_RATE`, 1 to 3 s long, peak below full scale.
    """
    n_samples = _seconds(rng.uniform(*CLIP_SECONDS))
    clip = marsh_ambience(rng, n_samples)
    event = SOURCES[label](rng, n_samples / SAMPLE_RATE - 0.1)
    peak = 10.0 ** (rng.uniform(*TARGET_PEAK_DBFS) / 20.0)
    _place(clip, peak * _peak_normalise(event), int(rng.integers(0, n_samples - event.shape[0])))
    if rng.random() < DISTANT_SOURCE_CHANCE:
        others = [name for name in SOURCES if name != label]
        other = others[int(rng.integers(len(others)))]
        distant = SOURCES[other](rng, 0.8 * n_samples / SAMPLE_RATE)
        level = peak * 10.0 ** (rng.uniform(*DISTANT_SOURCE_DB) / 20.0)
        start = int(rng.integers(0, n_samples - distant.shape[0]))
        _place(clip, level * _peak_normalise(distant), start)
    return clip.astype(np.float32)


def _extent(event: np.ndarray, threshold: float = 0.02) -> tuple[int, int]:
    """First and last sample (exclusive) where the event rises above ``threshold`` of its
    peak: the span a listener would annotate."""
    loud = np.flatnonzero(np.abs(event) >= threshold * np.max(np.abs(event)))
    return int(loud[0]), int(loud[-1]) + 1


def make_soundscape(rng: np.random.Generator, seconds: float = SOUNDSCAPE_SECONDS
                    ) -> tuple[np.ndarray, list[tuple[float, float, str]]]:
    """A stretch of marsh with several sources heard in turn and overlapping.

    Parameters
    ----------
    rng : numpy.random.Generator
    seconds : float
        Length of the soundscape.

    Returns
    -------
    audio : numpy.ndarray, shape (n_samples,), float32
    events : list of (onset, offset, label)
        Where each source sounds, in seconds (the span above 2 % of its peak), sorted.
    """
    n_samples = _seconds(seconds)
    scape = marsh_ambience(rng, n_samples)
    events = []
    labels = list(SOURCES)
    for _ in range(int(rng.integers(*SOUNDSCAPE_EVENTS))):
        label = labels[int(rng.integers(len(labels)))]
        event = _peak_normalise(SOURCES[label](rng, rng.uniform(1.0, 3.0)))
        start = int(rng.integers(0, n_samples - event.shape[0]))
        _place(scape, 10.0 ** (rng.uniform(*TARGET_PEAK_DBFS) / 20.0) * event, start)
        first, last = _extent(event)
        events.append((round((start + first) / SAMPLE_RATE, 3),
                       round((start + last) / SAMPLE_RATE, 3), label))
    return (scape / max(1.0, 1.05 * np.max(np.abs(scape)))).astype(np.float32), sorted(events)


def synthesise_soundscapes(out_dir: Path, *, seed: int = DEFAULT_SEED) -> list[dict[str, str]]:
    """Write the annotated soundscapes into ``out_dir / "soundscapes"``.

    Files: ``scape_NN.flac``, ``manifest.csv`` (``path,split``) and ``events.tsv``
    (``filename onset offset event_label``, tab-separated, with a header).

    Returns
    -------
    rows : list of dict
        The manifest rows.
    """
    folder = out_dir / "soundscapes"
    folder.mkdir(parents=True, exist_ok=True)
    rows, lines = [], ["filename\tonset\toffset\tevent_label"]
    for index in range(N_SOUNDSCAPES):
        rng = np.random.default_rng([seed, 9_000_000, index])
        audio, events = make_soundscape(rng)
        name = f"scape_{index:02d}.flac"
        sf.write(folder / name, audio, SAMPLE_RATE, format="FLAC", subtype="PCM_16",
                 compression_level=1.0)
        rows.append({"path": name, "split": "test" if index >= N_SOUNDSCAPES - 2 else "train"})
        lines += [f"{name}\t{onset:.3f}\t{offset:.3f}\t{label}" for onset, offset, label in events]
    (folder / "events.tsv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    with open(folder / "manifest.csv", "w", newline="", encoding="utf-8") as handle:
        writer = csv.DictWriter(handle, fieldnames=["path", "split"], lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
    return rows


def synthesise(out_dir: Path, *, seed: int = DEFAULT_SEED) -> list[dict[str, str]]:
    """Write every clip and ``manifest.csv`` into ``out_dir``.

    Parameters
    ----------
    out_dir : pathlib.Path
        Folder that receives ``clips/`` and ``manifest.csv``; FLAC files in
        ``clips/`` that the new set does not contain are removed.
    seed : int, default DEFAULT_SEED
        Root of every random draw, >= 0.

    Returns
    -------
    rows : list of dict
        The manifest rows (``path``, ``label``, ``split``), in file order.
    """
    if seed < 0:
        raise ValueError(f"seed must be >= 0, got {seed}")
    clip_dir = out_dir / "clips"
    clip_dir.mkdir(parents=True, exist_ok=True)
    rows = []
    for class_index, label in enumerate(SOURCES):
        # A seeded permutation per class makes the split stratified and repeatable.
        order = np.random.default_rng([seed, class_index, 1_000_000]).permutation(CLIPS_PER_CLASS)
        test_clips = set(order[:TEST_CLIPS_PER_CLASS].tolist())
        for clip_index in range(CLIPS_PER_CLASS):
            rng = np.random.default_rng([seed, class_index, clip_index])
            clip = make_clip(label, rng)
            if np.max(np.abs(clip)) >= 1.0:
                raise RuntimeError(f"{label} clip {clip_index} would clip; lower the levels")
            relative = f"clips/{label}_{clip_index:02d}.flac"
            sf.write(
                out_dir / relative,
                clip,
                SAMPLE_RATE,
                format="FLAC",
                subtype="PCM_16",
                compression_level=1.0,
            )
            split = "test" if clip_index in test_clips else "train"
            rows.append({"path": relative, "label": label, "split": split})
    written = {out_dir / row["path"] for row in rows}
    for stale in clip_dir.glob("*.flac"):
        if stale not in written:
            stale.unlink()
    with open(out_dir / "manifest.csv", "w", newline="", encoding="utf-8") as handle:
        writer = csv.DictWriter(handle, fieldnames=["path", "label", "split"], lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
    return rows


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--out-dir",
        type=Path,
        default=Path(__file__).resolve().parent,
        help="folder for clips/ and manifest.csv (default: this script's folder)",
    )
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="root random seed")
    arguments = parser.parse_args(argv)
    rows = synthesise(arguments.out_dir, seed=arguments.seed)
    seconds = sum(sf.info(arguments.out_dir / row["path"]).duration for row in rows)
    print(f"wrote {len(rows)} clips ({seconds:.1f} s of audio) to {arguments.out_dir}")
    scapes = synthesise_soundscapes(arguments.out_dir, seed=arguments.seed)
    print(f"wrote {len(scapes)} annotated soundscapes of {SOUNDSCAPE_SECONDS:g} s to "
          f"{arguments.out_dir / 'soundscapes'}")


if __name__ == "__main__":
    main()
