"""Tests of timbrel.events: annotation tables, frame labels and segment-based scores."""

import math

import numpy as np
import pytest

from timbrel import ParameterError
from timbrel.events import (
    Event,
    check_events,
    event_roll,
    frame_labels,
    read_events,
    segment_scores,
)

LABELS = ["dog", "car", "bird"]


def _random_events(rng, files, n, length=10.0):
    events = []
    for _ in range(n):
        onset = float(rng.uniform(0, length - 0.2))
        events.append(Event(str(rng.choice(files)), round(onset, 3),
                            round(min(length, onset + float(rng.uniform(0.1, 3.0))), 3),
                            str(rng.choice(LABELS))))
    return events


def _ours(reference, estimated, segment):
    refs, ests = [], []
    for file in sorted({e.file for e in reference + estimated}):
        ref = [e for e in reference if e.file == file]
        est = [e for e in estimated if e.file == file]
        # segments up to the last offset of either list (as sed_eval counts them)
        n = math.ceil(max(e.offset for e in ref + est) / segment)
        refs.append(event_roll(ref, LABELS, n, segment))
        ests.append(event_roll(est, LABELS, n, segment))
    return segment_scores(np.vstack(refs), np.vstack(ests), LABELS, segment_seconds=segment)


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("segment", [1.0, 0.5])
def test_segment_scores_match_sed_eval(seed, segment):
    # Reference implementation: sed_eval's SegmentBasedMetrics (PyPI sed_eval, by the
    # authors of Mesaros, Heittola & Virtanen 2016), on random event lists.
    dcase_util = pytest.importorskip("dcase_util")
    sed_eval = pytest.importorskip("sed_eval")
    rng = np.random.default_rng(seed)
    files = ["a.wav", "b.wav", "c.wav"]
    reference = _random_events(rng, files, 14)
    estimated = _random_events(rng, files, 12) + reference[: int(rng.integers(0, 8))]

    def container(events):
        return dcase_util.containers.MetaDataContainer(
            [{"filename": e.file, "event_onset": e.onset, "event_offset": e.offset,
              "event_label": e.label} for e in events])

    metrics = sed_eval.sound_event.SegmentBasedMetrics(event_label_list=LABELS,
                                                       time_resolution=segment)
    for file in files:
        metrics.evaluate(reference_event_list=container([e for e in reference if e.file == file]),
                         estimated_event_list=container([e for e in estimated if e.file == file]))
    theirs = metrics.results()
    ours = _ours(reference, estimated, segment)
    assert ours.f1 == pytest.approx(theirs["overall"]["f_measure"]["f_measure"], abs=1e-9)
    assert ours.error_rate == pytest.approx(theirs["overall"]["error_rate"]["error_rate"],
                                            abs=1e-9)
    for label in LABELS:
        wise = theirs["class_wise"][label]
        assert ours.per_class[label]["f1"] == pytest.approx(wise["f_measure"]["f_measure"],
                                                            abs=1e-9, nan_ok=True)
        assert ours.per_class[label]["error_rate"] == pytest.approx(
            wise["error_rate"]["error_rate"], abs=1e-9, nan_ok=True)


HEADERS = [("\t", ""), (",", ""), ("\t", "filename\tonset\toffset\tevent_label\n"),
           (",", "event_label,event_onset,event_offset,file\n")]


@pytest.mark.parametrize(("delimiter", "header"), HEADERS)
def test_tables_with_and_without_a_header(tmp_path, delimiter, header):
    rows = [("a.wav", "0.5", "1.25", "dog"), ("b.wav", "2", "3.5", "car")]
    if header.startswith("event_label"):  # columns in another order under a header
        rows = [(r[3], r[1], r[2], r[0]) for r in rows]
    path = tmp_path / "events.txt"
    path.write_text(header + "".join(delimiter.join(r) + "\n" for r in rows))
    events, problems = read_events(path)
    assert problems == []
    assert [(e.file, e.onset, e.offset, e.label) for e in events] == [
        ("a.wav", 0.5, 1.25, "dog"), ("b.wav", 2.0, 3.5, "car")]
    assert [e.line for e in events] == ([2, 3] if header else [1, 2])


def test_bad_lines_are_reported_by_number_and_the_rest_kept(tmp_path):
    path = tmp_path / "events.tsv"
    path.write_text("a.wav\t0\t1\tdog\n"
                    "a.wav\t2\t1\tdog\n"        # onset after offset
                    "a.wav\t-1\t1\tdog\n"       # negative
                    "a.wav\tsoon\t1\tdog\n"     # not a number
                    "# a comment\n"
                    "a.wav\t1\t2\n"             # too few fields
                    "a.wav\t3\t3\tdog\n"        # empty interval
                    "a.wav\t1\t4\t \n"          # empty label
                    "b.wav\t0.5\t9\tcar\n"      # past b.wav's end (checked below)
                    "c.wav\t0\t1\tbird\n")      # no such clip (checked below)
    events, problems = read_events(path)
    assert [p.line for p in problems] == [2, 3, 4, 6, 7, 8]
    assert "not before offset" in problems[0].reason and "negative" in problems[1].reason
    by_clip, more = check_events(events, {"a.wav": 5.0, "b.wav": 4.0})
    assert [(p.line, "past the clip's end" in p.reason or "not among" in p.reason)
            for p in more] == [(9, True), (10, True)]
    assert sorted(by_clip) == ["a.wav", "b.wav"] and len(by_clip["b.wav"]) == 1
    assert problems[0].text(path).startswith(f"{path}, line 2:")


def test_empty_or_missing_tables_are_errors(tmp_path):
    (tmp_path / "empty.tsv").write_text("# nothing\n\n")
    with pytest.raises(ParameterError, match="no rows"):
        read_events(tmp_path / "empty.tsv")
    with pytest.raises(ParameterError, match="cannot read"):
        read_events(tmp_path / "absent.tsv")


def test_frames_take_the_labels_covering_their_centre():
    centres = np.arange(10) * 0.1 + 0.05
    events = [Event("a", 0.1, 0.4, "dog"), Event("a", 0.3, 0.6, "car"),
              Event("a", 0.95, 2.0, "dog")]
    labels = frame_labels(events, centres)
    assert labels[0] == [] and labels[1] == ["dog"] and labels[3] == ["car", "dog"]
    assert labels[6] == [] and labels[9] == ["dog"]
    # a frame whose centre is exactly an offset is outside (half-open intervals)
    assert frame_labels([Event("a", 0.0, 0.15, "x")], np.array([0.15])) == [[]]
