"""Events on frames end to end: export --events, and the frame probe of timbrel.detection.

The audio is made of librosa tones and chirps placed at known times, so the annotation
of every event is exact by construction."""

import json
from pathlib import Path

import librosa
import numpy as np
import pyarrow.dataset as pads
import pytest
import soundfile as sf
from typer.testing import CliRunner

from timbrel import ParameterError
from timbrel.cli import app
from timbrel.detection import probe_events
from timbrel.events import Event, frame_labels
from timbrel.export import export
from timbrel.frontend import FrontEnd
from timbrel.pipeline import load_pipeline

DATA = Path(__file__).parent / "data"
MODEL = DATA / "model_v1.npz"  # 8 kHz, 12 bands, context 1, 10 relu units
SR = 8000
SOUNDS = {"low": lambda d: librosa.tone(300, sr=SR, duration=d),
          "high": lambda d: librosa.tone(2500, sr=SR, duration=d),
          "sweep": lambda d: librosa.chirp(fmin=400, fmax=3000, sr=SR, duration=d)}


@pytest.fixture(scope="module")
def scenes(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("scenes")
    rng = np.random.default_rng(6)
    lines = ["filename\tonset\toffset\tevent_label"]
    rows = ["path,split"]
    for i in range(6):
        y = 0.005 * rng.standard_normal(8 * SR)
        t = 0.3
        while t < 7.0:
            label = list(SOUNDS)[int(rng.integers(3))]
            length = float(rng.uniform(0.4, 1.0))
            start = round(t * SR)
            piece = SOUNDS[label](length)
            y[start:start + len(piece)] += 0.3 * piece
            lines.append(f"s{i}.wav\t{start / SR:.4f}\t{(start + len(piece)) / SR:.4f}\t{label}")
            t += length + float(rng.uniform(0.2, 0.6))
        sf.write(root / f"s{i}.wav", y.astype(np.float32), SR)
        rows.append(f"s{i}.wav,{'test' if i >= 4 else 'train'}")
    # lines that cannot be used as written, each a different reason
    lines += ["s0.wav\t2.0\t1.0\tlow", "s0.wav\t-1\t1.0\tlow", "absent.wav\t0\t1\tlow",
              "s1.wav\t7.5\t9.0\thigh"]
    (root / "events.tsv").write_text("\n".join(lines) + "\n")
    (root / "manifest.csv").write_text("\n".join(rows) + "\n")
    return root


@pytest.fixture(scope="module")
def dataset(scenes, tmp_path_factory) -> tuple[Path, object]:
    out = tmp_path_factory.mktemp("ds") / "ds"
    summary = export(scenes / "manifest.csv", MODEL, out, workers=1,
                     events=scenes / "events.tsv")
    return out, summary


def test_frames_carry_the_labels_of_the_events_at_their_centre(scenes, dataset):
    out, summary = dataset
    table = pads.dataset(out).to_table().to_pandas()
    events = []
    for line in (scenes / "events.tsv").read_text().splitlines()[1:]:
        file, onset, offset, label = line.split("\t")
        if 0 <= float(onset) < float(offset) and file != "absent.wav":
            events.append(Event(file, float(onset), float(offset), label))
    fe = FrontEnd(load_pipeline(MODEL).config.frontend)
    for source, rows in table.groupby("source"):
        rows = rows.sort_values("frame")
        expected = frame_labels([e for e in events if e.file == source],
                                fe.frame_centres(len(rows)))
        assert [list(v) for v in rows["events"]] == expected
    assert sum(len(v) > 0 for v in table["events"]) > len(table) / 3  # mostly sounding
    # the unusable lines, by number, with their reason
    numbers = [int(p.split("line ")[1].split(":")[0]) for p in summary.event_problems]
    n = len((scenes / "events.tsv").read_text().splitlines())
    assert numbers == [n - 3, n - 2, n - 1, n]
    assert "not before offset" in summary.event_problems[0]
    assert "past the clip's end" in summary.event_problems[3]


def test_frame_probe_scores_segments_beside_baselines(dataset):
    out, _ = dataset
    result = probe_events(out, baselines=("mfcc", "logmel"))
    assert result.classes == ["high", "low", "sweep"]
    assert (result.n_train_clips, result.n_test_clips) == (4, 2)
    assert [s.name for s in result.scores] == ["rbm-relu", "mfcc", "logmel"]
    for score in result.scores:
        assert 0.0 <= score.segment_f1 <= 1.0 and score.error_rate >= 0.0
    # tones an octave and more apart in quiet: MFCC frames find them (a sanity check)
    assert result.scores[1].segment_f1 > 0.8, result.table()
    assert "seg-F1" in result.table()


def test_probe_command_with_events_prints_json(dataset):
    out, _ = dataset
    result = CliRunner().invoke(app, ["probe", str(out), "--events", "--baseline", "mfcc",
                                      "--json"])
    assert result.exit_code == 0, result.output
    report = json.loads(result.output)
    assert {"segment_f1", "error_rate"} <= set(report["scores"][0])


def test_frame_probe_needs_events_and_both_splits(scenes, tmp_path):
    plain = tmp_path / "plain"
    export(scenes / "manifest.csv", MODEL, plain, workers=1)
    with pytest.raises(ParameterError, match="--events"):
        probe_events(plain)
