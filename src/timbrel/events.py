"""Sound events in time: annotation tables, labels on frames, segment-based scores.

An annotation table lists events as ``file onset offset label`` (seconds), separated by
tabs or commas, with or without a header row (:func:`read_events`). Each frame takes the
labels of the events that cover its centre (:func:`frame_labels`). Detection is scored
on fixed-length segments as in Mesaros, Heittola & Virtanen (2016): a class is active in
a segment when an event of it overlaps the segment, and the reference and estimated
activities give the F1 score and the error rate (:func:`segment_scores`).

References
----------
Mesaros, A., Heittola, T. & Virtanen, T. (2016). Metrics for polyphonic sound event
detection. Applied Sciences 6(6), 162.
"""

from __future__ import annotations

import csv
import dataclasses
import math
import os
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from . import store
from ._errors import ParameterError

__all__ = ["Event", "EventProblem", "SegmentScores", "check_events", "event_roll",
           "frame_labels", "read_events", "segment_scores"]

#: Header names accepted for each column (case-insensitive), as the usual layouts spell them.
HEADER_NAMES = {
    "file": ("file", "filename", "audio_filename", "source", "path"),
    "onset": ("onset", "event_onset", "start", "start_s", "onset_s"),
    "offset": ("offset", "event_offset", "end", "stop", "end_s", "offset_s"),
    "label": ("label", "event_label", "class", "event"),
}


@dataclasses.dataclass(frozen=True)
class Event:
    """One annotated event: ``label`` sounds in ``file`` from ``onset`` to ``offset`` s."""

    file: str
    onset: float
    offset: float
    label: str
    line: int = 0  # line of the annotation table (1-based), 0 when not from a table


@dataclasses.dataclass(frozen=True)
class EventProblem:
    """An annotation that cannot be used as written: where it is and why."""

    line: int
    file: str
    reason: str

    def text(self, table: str | Path) -> str:
        """One line for a person: the table, the line and the reason."""
        return f"{table}, line {self.line}: {self.reason}"


def _number(text: str) -> float | None:
    try:
        value = float(text)
    except ValueError:
        return None
    return value if math.isfinite(value) else None


def _columns(header: Sequence[str]) -> dict[str, int] | None:
    """Column index of each field named in a header row, or None if it is not a header."""
    names = [h.strip().lower() for h in header]
    found = {}
    for field, accepted in HEADER_NAMES.items():
        matches = [i for i, name in enumerate(names) if name in accepted]
        if matches:
            found[field] = matches[0]
    return found if len(found) == len(HEADER_NAMES) else None


def read_events(path: str | os.PathLike[str]) -> tuple[list[Event], list[EventProblem]]:
    """Read an annotation table.

    Tab- or comma-separated (the first line decides), ``file onset offset label`` in that
    order, or any order under a header row naming them (``filename``, ``event_onset``,
    ``event_offset``, ``event_label`` and other usual spellings, see
    :data:`HEADER_NAMES`). Blank lines and lines starting with ``#`` are skipped.

    Parameters
    ----------
    path : str or path-like
        A local file or a store URL.

    Returns
    -------
    events : list of Event
        The usable events, in table order.
    problems : list of EventProblem
        Lines that cannot be used, by line number: too few fields, a time that is not a
        number, a negative time, an onset at or after its offset, an empty label.

    Raises
    ------
    ParameterError
        If the file cannot be read or holds no row at all.

    Examples
    --------
    >>> import tempfile, os
    >>> path = os.path.join(tempfile.mkdtemp(), "events.tsv")
    >>> _ = open(path, "w").write("a.wav\\t0.5\\t1.5\\tdog\\na.wav\\t2.0\\t1.0\\tcar\\n")
    >>> events, problems = read_events(path)
    >>> events[0]
    Event(file='a.wav', onset=0.5, offset=1.5, label='dog', line=1)
    >>> problems[0].reason
    'onset 2 s is not before offset 1 s'
    """
    path = str(path)  # a local path or a store URL (s3://bucket/events.tsv)
    try:
        text = store.read_bytes(path).decode("utf-8-sig")
    except (OSError, UnicodeDecodeError, store.StoreError) as exc:
        raise ParameterError(f"{path}: cannot read the annotation table ({exc})") from None
    lines = [(i + 1, line) for i, line in enumerate(text.splitlines())
             if line.strip() and not line.lstrip().startswith("#")]
    if not lines:
        raise ParameterError(f"{path}: the annotation table holds no rows")
    delimiter = "\t" if "\t" in lines[0][1] else ","
    rows = [(number, row) for number, row in
            zip((n for n, _ in lines), csv.reader((line for _, line in lines),
                                                  delimiter=delimiter), strict=True)]
    order = {"file": 0, "onset": 1, "offset": 2, "label": 3}
    header = _columns(rows[0][1])
    if header is not None:
        order, rows = header, rows[1:]
    events, problems = [], []
    for number, row in rows:
        event = _parse(number, row, order)
        if isinstance(event, EventProblem):
            problems.append(event)
        else:
            events.append(event)
    return events, problems


def _parse(number: int, row: Sequence[str], order: Mapping[str, int]) -> Event | EventProblem:
    if len(row) <= max(order.values()):
        return EventProblem(number, row[0].strip() if row else "",
                            f"{len(row)} field(s); need file, onset, offset and label")
    file, label = row[order["file"]].strip(), row[order["label"]].strip()
    onset, offset = _number(row[order["onset"]]), _number(row[order["offset"]])
    if onset is None or offset is None:
        return EventProblem(number, file, f"onset {row[order['onset']]!r} or offset "
                                          f"{row[order['offset']]!r} is not a number of seconds")
    if onset < 0 or offset < 0:
        return EventProblem(number, file, f"negative time (onset {onset:g} s, offset "
                                          f"{offset:g} s)")
    if onset >= offset:
        return EventProblem(number, file, f"onset {onset:g} s is not before offset {offset:g} s")
    if not label:
        return EventProblem(number, file, "empty label")
    return Event(file, onset, offset, label, number)


def check_events(events: Iterable[Event], durations: Mapping[str, float]
                 ) -> tuple[dict[str, list[Event]], list[EventProblem]]:
    """Match events to clips; report those for absent clips or reaching past a clip's end.

    Parameters
    ----------
    events : iterable of Event
    durations : mapping of clip name to its duration in seconds
        The clips of the source, named as in the annotation table.

    Returns
    -------
    by_clip : dict of clip name to list of Event
        Every event of a clip in ``durations``; one that runs past the clip's end is kept
        (it labels the frames it covers) and also reported.
    problems : list of EventProblem
        Events naming a clip the source lacks, and events past a clip's end.
    """
    by_clip: dict[str, list[Event]] = {}
    problems = []
    for event in events:
        if event.file not in durations:
            problems.append(EventProblem(event.line, event.file,
                                         f"{event.file!r} is not among the source's clips"))
            continue
        duration = durations[event.file]
        if event.offset > duration + 1e-6:
            problems.append(EventProblem(event.line, event.file,
                                         f"offset {event.offset:g} s is past the clip's end "
                                         f"({duration:g} s)"))
        by_clip.setdefault(event.file, []).append(event)
    return by_clip, problems


def frame_labels(events: Sequence[Event], centres: np.ndarray) -> list[list[str]]:
    """The labels of the events covering each frame's centre (onset ≤ centre < offset).

    Parameters
    ----------
    events : sequence of Event
        The events of one clip.
    centres : np.ndarray, shape (n_frames,)
        Each frame's centre in seconds.

    Returns
    -------
    list of list of str
        One list per frame, sorted, without repeats; empty for background.

    Examples
    --------
    >>> import numpy as np
    >>> frame_labels([Event("a", 0.0, 0.25, "dog"), Event("a", 0.1, 1.0, "car")],
    ...              np.array([0.05, 0.2, 0.5]))
    [['dog'], ['car', 'dog'], ['car']]
    """
    centres = np.asarray(centres, np.float64)
    labels: list[set[str]] = [set() for _ in range(len(centres))]
    for event in events:
        lo, hi = np.searchsorted(centres, [event.onset, event.offset], side="left")
        for i in range(int(lo), int(hi)):
            labels[i].add(event.label)
    return [sorted(s) for s in labels]


def event_roll(events: Iterable[Any], labels: Sequence[str], n_segments: int,
               segment: float = 1.0) -> np.ndarray:
    """Segment activity of events: class ``c`` is active in segment ``k`` when an event
    of it overlaps ``[k·segment, (k + 1)·segment)``.

    Parameters
    ----------
    events : iterable of objects with ``onset``, ``offset`` and ``label``
    labels : sequence of str
        The classes, in column order; events of other labels are ignored.
    n_segments : int
    segment : float, default 1.0
        Segment length in seconds.

    Returns
    -------
    np.ndarray, shape (n_segments, len(labels)), bool
    """
    roll = np.zeros((n_segments, len(labels)), bool)
    column = {label: i for i, label in enumerate(labels)}
    for event in events:
        if event.label in column:
            first = math.floor(event.onset / segment)
            last = math.ceil(event.offset / segment)
            roll[max(first, 0):min(last, n_segments), column[event.label]] = True
    return roll


@dataclasses.dataclass(frozen=True)
class SegmentScores:
    """Segment-based scores (Mesaros, Heittola & Virtanen 2016).

    Attributes
    ----------
    f1, error_rate : float
        Overall F1 = 2TP / (2TP + FP + FN) and ER = (S + D + I) / N, counted in every
        segment over all classes (S = min(FN, FP), D = max(0, FN − FP),
        I = max(0, FP − FN) per segment; N the active reference classes).
    precision, recall : float
    per_class : dict of label to dict
        ``f1``, ``error_rate`` ((FN + FP) / N of that class), ``precision``, ``recall``,
        ``n_reference`` (active segments).
    n_segments : int
    segment_seconds : float
    """

    f1: float
    error_rate: float
    precision: float
    recall: float
    per_class: dict[str, dict[str, float]]
    n_segments: int
    segment_seconds: float


def _ratio(a: float, b: float) -> float:
    return float(a / b) if b else float("nan")


def segment_scores(reference: np.ndarray, estimated: np.ndarray, labels: Sequence[str], *,
                   segment_seconds: float = 1.0) -> SegmentScores:
    """Scores of estimated segment activity against the reference.

    Parameters
    ----------
    reference, estimated : np.ndarray, shape (n_segments, n_classes), bool
        Activity per segment and class (see :func:`event_roll`), all clips stacked.
    labels : sequence of str
        Class names, in column order.
    segment_seconds : float, default 1.0
        Recorded in the result.

    Returns
    -------
    SegmentScores

    Examples
    --------
    >>> import numpy as np
    >>> ref = np.array([[1, 0], [1, 1], [0, 0]], bool)
    >>> est = np.array([[1, 0], [0, 1], [1, 0]], bool)
    >>> s = segment_scores(ref, est, ["dog", "car"])
    >>> round(s.f1, 3), round(s.error_rate, 3)
    (0.667, 0.667)
    """
    reference, estimated = np.asarray(reference, bool), np.asarray(estimated, bool)
    if reference.shape != estimated.shape or reference.ndim != 2 or \
            reference.shape[1] != len(labels):
        raise ParameterError(f"reference {reference.shape} and estimated {estimated.shape} must "
                             f"both be (n_segments, {len(labels)})")
    tp = (reference & estimated).sum(axis=1)
    fp = (~reference & estimated).sum(axis=1)
    fn = (reference & ~estimated).sum(axis=1)
    n_ref = reference.sum()
    substitutions = np.minimum(fn, fp).sum()
    deletions = np.maximum(0, fn - fp).sum()
    insertions = np.maximum(0, fp - fn).sum()
    per_class = {}
    for c, label in enumerate(labels):
        r, e = reference[:, c], estimated[:, c]
        tp_c, fp_c, fn_c = int((r & e).sum()), int((~r & e).sum()), int((r & ~e).sum())
        per_class[label] = {"f1": _ratio(2 * tp_c, 2 * tp_c + fp_c + fn_c),
                            "error_rate": _ratio(fn_c + fp_c, int(r.sum())),
                            "precision": _ratio(tp_c, tp_c + fp_c),
                            "recall": _ratio(tp_c, tp_c + fn_c), "n_reference": int(r.sum())}
    return SegmentScores(
        f1=_ratio(2 * tp.sum(), 2 * tp.sum() + fp.sum() + fn.sum()),
        error_rate=_ratio(substitutions + deletions + insertions, n_ref),
        precision=_ratio(tp.sum(), tp.sum() + fp.sum()), recall=_ratio(tp.sum(), n_ref),
        per_class=per_class, n_segments=int(reference.shape[0]), segment_seconds=segment_seconds)
