"""Findings of a take against its reference part: wrong, missed, extra, early, late, held notes,
hesitations and restarts.

The comparison works on note lists: the reference part (:mod:`takescribe.score`), the
score-to-take alignment (:mod:`takescribe.align`) and the notes heard in the take (ground
truth or a transcription, :class:`takescribe.notes.Note`).

Method
------
1. Every reference note is placed in the take through the alignment (``score_to_take``).
2. Anchors: played notes are matched to reference notes of the same pitch with
   :func:`takescribe.evaluate.match_notes` (maximum bipartite matching, mir_eval
   conventions) in a wide window (``anchor_window``). The anchors are then re-made around
   the local-tempo prediction of step 4 (a few rounds), so they follow a take that drifts
   away from a coarse alignment; a stretch of at least ``min_restart_notes`` reference notes
   left without anchors (an unnoticed pause, a misplaced jump) is laid over the free played
   notes between its neighbouring anchors at the overall pace, at the one offset that lines
   up most of its pitches.
3. Restarts: a run of at least ``min_restart_notes`` unmatched played notes that repeats,
   with one consistent time shift, notes already matched elsewhere in the take is a second
   attempt at the same bars (both attempts must be heard; a run that holds notes matched
   further on is a repeated motif, not a restart). The earlier attempt is the left-off one:
   its notes become ``extra`` findings linked to ONE ``restart`` finding (placed where that
   attempt was in the part), and the timing model is cut at the note the player went back to.
4. Local tempo: reference onsets are grouped (chords), and the take time of each group is
   predicted by a robust line (Siegel's repeated median) through its neighbouring groups
   (``neighbours`` on each side, the group itself left out; fewer than four groups take the
   overall pace). Gradual tempo drift is followed by the line, so only the local residual
   counts as early or late. At the edge of a timing segment (the first or last notes, next
   to a pause) the line is extrapolated from one side, so the note is also read against
   the overall pace through the same neighbours, and only a residual beyond the tolerance
   in both readings counts. Likewise every note is read against a closer line (half the
   neighbours, at least two a side): rubato that swells and relaxes within a phrase bends
   the take's time line faster than the wider line follows, and it is the player's pulse.
   The closer line counts only where its own groups lie on it (within half the tolerance):
   a rushed run that jumps back into time is no pulse.
5. Hesitations: walking through the part, a group that arrives more than
   ``hesitation_threshold`` seconds after the line through the groups before it *and*
   whose delay persists on the next group (the music resumes shifted, rather than one
   late note) opens a new timing segment. The pause is ONE ``hesitation`` finding, timed
   where the music should have gone on (the onset after the longest silence minus the
   pause); the delayed notes are judged against the tempo after the pause and are
   reported ``late`` only if they are late against that tempo as well, with ``linked_to``
   pointing to the hesitation. A chord split by the pause (one hand before, one after) is
   matched on both sides, and a note held into the pause is not ``held_long``.
6. Final matching: same-pitch matching in ``timing_tolerance + match_margin`` around the
   local-tempo prediction, each played note then moved to the nearest free reference note
   of its pitch (the maximum matching only maximises the count); among the leftovers,
   pitch-free matching pairs ``wrong_pitch`` notes; the remaining reference notes are
   ``missed`` and the remaining played notes ``extra``.
7. Durations: a correctly pitched note held for less than ``1 - duration_tolerance`` or
   more than ``1 + duration_tolerance`` times its written length at the local tempo (and
   off by more than ``timing_tolerance`` seconds) is ``held_short`` / ``held_long``; a
   note released just as the next one starts is never ``held_short`` (the next note, if
   early or extra, is reported itself), and a note that sounds on through the place of a
   missing repeat of its pitch is not ``held_long``: the missing note is the one finding
   (its text says the pitch sounded on through its place).

Conventions
-----------
- Times are seconds in the take; pitches are MIDI numbers (C4 = 60, A4 = 69 = 440 Hz).
- The default timing tolerance, 100 ms, is wider than the 50 ms onset tolerance of
  mir_eval's transcription metrics on purpose: a teacher cares about audible timing
  errors, not transcription precision (common practice, no source).
- A "beat" in the tempo curve is a quarter note of the part.
- Without an alignment (``alignment=None``), the take is assumed to follow the written
  tempo from time 0.

JSON schema (``Comparison.to_json()`` / :func:`findings_json`)
----------------------------------------------------------------
::

    {
      "schema": "takescribe-findings/1",
      "summary": {
        "notes_in_part": int,            # reference notes
        "notes_played": int,             # played notes given
        "notes_played_correctly": int,   # right pitch, no timing or duration finding
        "notes_uncertain": int,          # part notes the recording cannot settle (no finding)
        "counts": {kind: int, ...},      # one entry per kind in KINDS; events only (not the
                                         # notes linked to a restart or hesitation)
        "linked_details": int,           # findings linked to a restart or hesitation
        "findings_per_minute": float,
        "tempo_curve": [{"measure": int, "score_quarters": float, "take_time": float,
                         "seconds_per_beat": float, "beats_per_minute": float}, ...],
        "bars_with_most_findings": [{"measure": int, "findings": int}, ...],
        "alignment_confidence": float | null,
        "take_duration": float
      },
      "findings": [
        {"id": int, "kind": str, "measure": int | null, "beat": float | null,
         "measure_label": str | null,   # bar number as printed (repeats share a label)
         "time": float,                  # seconds in the take (missed: where it should sound)
         "expected_pitch": int | null, "played_pitch": int | null,
         "deviation": float | null,      # seconds (timing, duration, pause) or semitones
         "reference_index": int | null, "played_index": int | null,
         "linked_to": int | null,        # id of the hesitation/restart this belongs to
         "from_time": float | null,      # restart only: where the left-off attempt stops (the
                                         # end of its last note's written value, or its release)
         "to_time": float | null,        # restart only: first onset of the attempt that goes on
         "from_measure": int | null, "from_beat": float | null,      # restart only
         "to_measure": int | null, "to_beat": float | null,          # restart only
         "text": str}, ...
      ],
      "note_status": [str, ...],         # per reference note: played / wrong_pitch / missed / uncertain
      "played_status": [str, ...]        # per played note: matched / extra
    }

Deviation signs: ``early`` is negative and ``late`` positive (played minus expected,
seconds); ``held_short`` negative and ``held_long`` positive (played minus expected
length, seconds); ``wrong_pitch`` is played minus expected pitch in semitones;
``hesitation`` is the length of the pause in seconds; ``restart`` is how much of the part,
in seconds at the written tempo, was played again.
"""

from __future__ import annotations

import json
import warnings
from collections import Counter
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

import numpy as np

from ..audio.load import TakescribeWarning
from ..errors import InputError
from ..evaluation.metrics import match_notes
from ..notes import Note, validate_notes

__all__ = [
    "KINDS",
    "Finding",
    "Comparison",
    "compare_notes",
    "findings_json",
    "pitch_name",
    "validate_comparison_options",
]

KINDS = (
    "wrong_pitch",
    "missed",
    "extra",
    "early",
    "late",
    "held_short",
    "held_long",
    "hesitation",
    "restart",
)

_NOTE_NAMES = ("C", "C#", "D", "Eb", "E", "F", "F#", "G", "G#", "A", "Bb", "B")


def pitch_name(pitch: int) -> str:
    """Scientific pitch name of a MIDI number, C4 = 60 (common practice, no source)."""
    pitch = int(pitch)
    return f"{_NOTE_NAMES[pitch % 12]}{pitch // 12 - 1}"


@dataclass(frozen=True, slots=True)
class Finding:
    """One thing a teacher may want to look at.

    Parameters
    ----------
    id : int
        1-based, in time order.
    kind : str
        One of :data:`KINDS`.
    time : float
        Seconds in the take (for a missed note, where it should have sounded).
    measure, beat : int or None, float or None
        Position in the part (measure number as written, beat as given by the reference).
    expected_pitch, played_pitch : int or None
        MIDI numbers.
    deviation : float or None
        Seconds or semitones (see the module docstring for signs).
    reference_index, played_index : int or None
        Index of the reference note / played note concerned.
    linked_to : int or None
        Id of the hesitation or restart finding this one belongs to.
    text : str
        Short teacher-facing sentence.
    """

    id: int
    kind: str
    time: float
    measure: int | None = None
    beat: float | None = None
    measure_label: str | None = None
    expected_pitch: int | None = None
    played_pitch: int | None = None
    deviation: float | None = None
    reference_index: int | None = None
    played_index: int | None = None
    linked_to: int | None = None
    from_time: float | None = None
    to_time: float | None = None
    from_measure: int | None = None
    from_beat: float | None = None
    to_measure: int | None = None
    to_beat: float | None = None
    text: str = ""

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise InputError(f"finding kind must be one of {', '.join(KINDS)}; got {self.kind!r}")

    def to_dict(self) -> dict:
        """Plain JSON-ready dict (field names as in the module docstring)."""
        return {
            "id": self.id,
            "kind": self.kind,
            "measure": self.measure,
            "beat": self.beat,
            "measure_label": self.measure_label,
            "time": _round(self.time),
            "expected_pitch": self.expected_pitch,
            "played_pitch": self.played_pitch,
            "deviation": _round(self.deviation),
            "reference_index": self.reference_index,
            "played_index": self.played_index,
            "linked_to": self.linked_to,
            "from_time": _round(self.from_time),
            "to_time": _round(self.to_time),
            "from_measure": self.from_measure,
            "from_beat": self.from_beat,
            "to_measure": self.to_measure,
            "to_beat": self.to_beat,
            "text": self.text,
        }


@dataclass(frozen=True, eq=False)
class Comparison:
    """Result of :func:`compare_notes`.

    Attributes
    ----------
    findings : tuple of Finding
        Sorted by time.
    summary : dict
        See the module docstring.
    note_status : tuple of str
        Per reference note: ``"played"``, ``"wrong_pitch"``, ``"missed"`` or ``"uncertain"``
        (faint evidence only, no finding; see ``faint_notes``).
    played_status : tuple of str
        Per played note: ``"matched"`` (paired with a reference note, right or wrong
        pitch) or ``"extra"``.
    pairs : tuple of (int, int)
        (reference index, played index) of every pairing, right or wrong pitch.
    expected_onsets, expected_offsets : ndarray (n_ref,)
        Where each reference note should start and end in the take, at the local tempo.
    played_notes : tuple of Note
        The played notes, in the order given (``played_index`` refers to it).
    measure_times : dict
        Measure number -> take time (seconds) at which the measure starts.
    """

    findings: tuple
    summary: dict
    note_status: tuple
    played_status: tuple
    pairs: tuple = ()
    expected_onsets: np.ndarray = field(default_factory=lambda: np.zeros(0))
    expected_offsets: np.ndarray = field(default_factory=lambda: np.zeros(0))
    played_notes: tuple = ()
    measure_times: dict = field(default_factory=dict)

    def to_json(self) -> dict:
        """JSON-ready dict (schema in the module docstring)."""
        return findings_json(self)

    def dumps(self) -> str:
        """The JSON document as text (UTF-8, indented)."""
        return json.dumps(self.to_json(), indent=2, ensure_ascii=False)


def findings_json(comparison: Comparison) -> dict:
    """JSON-ready dict of a :class:`Comparison` (schema in the module docstring)."""
    return {
        "schema": "takescribe-findings/1",
        "summary": comparison.summary,
        "findings": [f.to_dict() for f in comparison.findings],
        "note_status": list(comparison.note_status),
        "played_status": list(comparison.played_status),
    }


def _round(x: float | None, digits: int = 4) -> float | None:
    return None if x is None else round(float(x), digits)


# --------------------------------------------------------------------------- validation


def validate_comparison_options(
    *,
    timing_tolerance: float,
    duration_tolerance: float,
    match_margin: float,
    anchor_window: float,
    hesitation_threshold: float,
    neighbours: int,
    min_restart_notes: int,
) -> None:
    """Check the numeric options of :func:`compare_notes`; raise ``InputError`` naming the bad one."""
    for name, value, low, high in (
        ("timing_tolerance", timing_tolerance, 0.0, 2.0),
        ("duration_tolerance", duration_tolerance, 0.0, 10.0),
        ("match_margin", match_margin, 0.0, 2.0),
        ("anchor_window", anchor_window, 0.0, 10.0),
        ("hesitation_threshold", hesitation_threshold, 0.0, 30.0),
    ):
        if not isinstance(value, (int, float, np.floating, np.integer)) or not np.isfinite(value):
            raise InputError(f"{name} must be a finite number of seconds, got {value!r}")
        if not low < float(value) <= high:
            raise InputError(f"{name} must be in range ({low}, {high}], got {value!r}")
    if not isinstance(neighbours, (int, np.integer)) or not 1 <= neighbours <= 50:
        raise InputError(f"neighbours must be an integer in range 1..50, got {neighbours!r}")
    if not isinstance(min_restart_notes, (int, np.integer)) or not 2 <= min_restart_notes <= 100:
        raise InputError(f"min_restart_notes must be an integer in range 2..100, got {min_restart_notes!r}")


# --------------------------------------------------------------------------- reference access


@dataclass(frozen=True)
class _Part:
    """The reference as arrays (one name and unit per quantity)."""

    onsets: np.ndarray  # score seconds at the written tempo
    offsets: np.ndarray
    pitches: np.ndarray  # MIDI
    quarters: np.ndarray  # onset in quarter notes
    measures: np.ndarray  # int, -1 when unknown
    beats: np.ndarray  # float, nan when unknown
    measure_position: Callable[[float], tuple[int | None, float | None]]
    measure_starts: dict  # measure -> score seconds
    measure_end: float  # score seconds where the last bar ends
    measure_labels: tuple  # printed bar number of each bar (performance order), may be empty

    def label(self, measure: int | None) -> str | None:
        if measure is None:
            return None
        if 1 <= measure <= len(self.measure_labels) and self.measure_labels[measure - 1]:
            return self.measure_labels[measure - 1]
        return str(measure)


def _part_from_reference(reference: Any) -> _Part:
    notes = getattr(reference, "notes", None)
    if notes is None:
        raise TypeError(f"reference must have a .notes sequence (takescribe.score.Reference), got {type(reference).__name__}")
    notes = list(notes)
    n = len(notes)
    onsets = np.array([float(x.onset) for x in notes], dtype=float)
    offsets = np.array([float(x.offset) for x in notes], dtype=float)
    pitches = np.array([int(x.pitch) for x in notes], dtype=int)
    if n and (np.any(~np.isfinite(onsets)) or np.any(offsets < onsets)):
        raise InputError("reference notes must have finite onsets and offsets after their onsets (seconds)")
    quarters = np.array([float(getattr(x, "onset_quarters", np.nan)) for x in notes], dtype=float)
    if n and np.any(~np.isfinite(quarters)):
        quarters = onsets * 2.0  # written tempo unknown: 120 quarter notes per minute
    measures = np.array([int(getattr(x, "measure", -1) if getattr(x, "measure", None) is not None else -1) for x in notes])
    beats = np.array([float(getattr(x, "beat", np.nan) if getattr(x, "beat", None) is not None else np.nan) for x in notes])

    order = np.argsort(onsets, kind="stable")
    s_sorted, q_sorted = onsets[order], quarters[order]

    def seconds_to_quarters(s: float) -> float:
        if n == 0:
            return 2.0 * s
        if n == 1 or s_sorted[-1] == s_sorted[0]:
            return float(q_sorted[0] + 2.0 * (s - s_sorted[0]))
        if s <= s_sorted[0] or s >= s_sorted[-1]:
            # extrapolate at the overall rate of the part
            rate = (q_sorted[-1] - q_sorted[0]) / (s_sorted[-1] - s_sorted[0])
            ref_s, ref_q = (s_sorted[0], q_sorted[0]) if s <= s_sorted[0] else (s_sorted[-1], q_sorted[-1])
            return float(ref_q + rate * (s - ref_s))
        return float(np.interp(s, s_sorted, q_sorted))

    measure_beat = getattr(reference, "measure_beat", None)
    own_seconds_to_quarters = getattr(reference, "seconds_to_quarters", None)

    def measure_position(s: float) -> tuple[int | None, float | None]:
        if n == 0:
            return None, None
        q = None
        if callable(own_seconds_to_quarters):
            try:
                q = float(own_seconds_to_quarters(float(s)))
            except Exception:  # noqa: BLE001 - fall back to the notes' own positions
                q = None
        if q is None:
            q = seconds_to_quarters(s)
        if callable(measure_beat):
            try:
                m, b = measure_beat(q)
                return int(m), round(float(b), 2)
            except Exception:  # noqa: BLE001 - fall back to the notes' own positions
                pass
        # nearest note at or before s: same measure, beat advanced by the quarters elapsed
        k = int(np.searchsorted(s_sorted, s + 1e-9, side="right")) - 1
        k = max(k, 0)
        i = order[k]
        if measures[i] < 0:
            return None, None
        beat = beats[i] + (q - quarters[i]) if np.isfinite(beats[i]) else None
        return int(measures[i]), (None if beat is None else round(float(beat), 2))

    # measure starts, in score seconds
    measure_starts: dict = {}
    starts = getattr(reference, "measure_starts", None)
    to_seconds = getattr(reference, "quarters_to_seconds", None)
    measure_end = None
    if starts is not None and callable(to_seconds) and len(starts) >= 2:
        try:
            # takescribe.score: quarter position of each bar (1-based, performance order), plus the end
            starts = [float(q) for q in starts]
            for m, q in enumerate(starts[:-1], start=1):
                measure_starts[m] = float(to_seconds(q))
            measure_end = float(to_seconds(starts[-1]))
        except Exception:  # noqa: BLE001 - fall back below
            measure_starts = {}
    if not measure_starts:
        for m in sorted(set(int(x) for x in measures if x >= 0)):
            sel = measures == m
            # the first note of the measure, moved back by its beat (beats counted from 1)
            k = np.flatnonzero(sel)[np.argmin(onsets[sel])]
            start = onsets[k]
            if np.isfinite(beats[k]) and len(s_sorted) > 1:
                q0 = quarters[k] - (beats[k] - 1.0)
                start = float(np.interp(q0, q_sorted, s_sorted, left=s_sorted[0] - (quarters[k] - q0) * 0.5))
            measure_starts[m] = float(start)
    if measure_end is None:
        measure_end = float(offsets.max()) if n else 0.0
    labels = tuple(str(x) for x in getattr(reference, "measure_labels", ()) or ())
    return _Part(onsets, offsets, pitches, quarters, measures, beats, measure_position, measure_starts,
                 measure_end, labels)


def _score_to_take_function(alignment: Any) -> Callable[[np.ndarray], np.ndarray]:
    if alignment is None:
        return lambda s: np.asarray(s, dtype=float)
    f = getattr(alignment, "score_to_take", None)
    if not callable(f):
        raise TypeError(f"alignment must have a score_to_take(t) method (takescribe.align.Alignment), got {type(alignment).__name__}")

    def mapped(s: np.ndarray) -> np.ndarray:
        s = np.asarray(s, dtype=float)
        try:
            out = np.asarray(f(s), dtype=float)
            if out.shape == s.shape:
                return out
        except Exception:  # noqa: BLE001 - scalar-only implementations
            pass
        return np.array([float(f(float(x))) for x in s.ravel()]).reshape(s.shape)

    return mapped


# --------------------------------------------------------------------------- matching


def _match_notes(ref_on, ref_off, ref_pitch, est_on, est_off, est_pitch, *, window: float, same_pitch: bool):
    """Maximum matching of two small note sets (indices local to the given arrays)."""
    if len(ref_on) == 0 or len(est_on) == 0:
        return []
    ref_intervals = np.column_stack([ref_on, np.maximum(ref_off, ref_on + 1e-3)])
    est_intervals = np.column_stack([est_on, np.maximum(est_off, est_on + 1e-3)])
    # shift both to non-negative times: predictions can fall just before 0
    shift = min(0.0, float(ref_intervals.min()), float(est_intervals.min()))
    ref_intervals = ref_intervals - shift
    est_intervals = est_intervals - shift
    pairs = match_notes(
        ref_intervals,
        np.asarray(ref_pitch, dtype=float),
        est_intervals,
        np.asarray(est_pitch, dtype=float),
        onset_tolerance=float(window),
        pitch_tolerance=50.0 if same_pitch else None,
        offset_ratio=None,
    )
    return [(int(i), int(j)) for i, j in pairs]


def _uncross(pairs, ref_time, est_time, key):
    """Reorder pairs so that within each key group ref order follows played order.

    The maximum matching is indifferent to which of two equal-pitch notes pairs with which;
    pairing them in time order keeps every pair inside the window (exchange argument) and
    avoids two opposite timing errors where there are none.
    """
    groups: dict = {}
    for i, j in pairs:
        groups.setdefault(key(i, j), []).append((i, j))
    out = []
    for members in groups.values():
        refs = sorted((i for i, _ in members), key=lambda i: (ref_time[i], i))
        ests = sorted((j for _, j in members), key=lambda j: (est_time[j], j))
        out.extend(zip(refs, ests))
    return out


def _same_pitch_pairs(ref_on, ref_off, ref_pitch, played_on, played_off, played_pitch, pool, refs, *, window):
    """Same-pitch matching of reference notes ``refs`` with played notes ``pool`` (global indices).

    After the maximum matching, each played note moves to the nearest free reference note of
    its pitch when that is closer (the matching only maximises the count), and notes freed
    that way get a second chance.
    """
    refs = np.asarray(refs, dtype=int)
    pool = np.asarray(pool, dtype=int)
    pairs = _match_notes(ref_on[refs], ref_off[refs], ref_pitch[refs], played_on[pool], played_off[pool],
                         played_pitch[pool], window=window, same_pitch=True)
    pairs = [(int(refs[i]), int(pool[j])) for i, j in pairs]
    pairs = _uncross(pairs, ref_on, played_on, key=lambda i, j: ref_pitch[i])
    by_pitch: dict = {}
    for i in refs:
        by_pitch.setdefault(int(ref_pitch[i]), []).append(int(i))
    for _ in range(3):
        matched = {i for i, _ in pairs}
        changed = False
        for n, (i, j) in enumerate(pairs):
            best, best_distance = i, abs(ref_on[i] - played_on[j])
            for other in by_pitch.get(int(ref_pitch[i]), ()):
                distance = abs(ref_on[other] - played_on[j])
                if other not in matched and distance < best_distance - 1e-9:
                    best, best_distance = other, distance
            if best != i:
                matched.discard(i)
                matched.add(best)
                pairs[n] = (best, j)
                changed = True
        if not changed:
            break
    left_refs = np.array([i for i in refs if i not in {a for a, _ in pairs}], dtype=int)
    left_pool = np.array([j for j in pool if j not in {b for _, b in pairs}], dtype=int)
    if left_refs.size and left_pool.size:
        more = _match_notes(ref_on[left_refs], ref_off[left_refs], ref_pitch[left_refs], played_on[left_pool],
                            played_off[left_pool], played_pitch[left_pool], window=window, same_pitch=True)
        pairs += [(int(left_refs[i]), int(left_pool[j])) for i, j in more]
        pairs = _uncross(pairs, ref_on, played_on, key=lambda i, j: ref_pitch[i])
    return pairs


def _recover_stretches(part, predicted, played_on, played_pitch, pool, anchors, *, min_notes: int, slope: float,
                       vote_tolerance: float = 0.15) -> list:
    """Anchors for stretches of the part that the alignment placed too far off.

    A stretch of at least ``min_notes`` consecutive reference notes without anchors (an
    unnoticed pause, a badly placed jump) is laid over the free played notes between the
    anchors around it at the overall pace (``slope`` take seconds per score second); the one
    time offset that lines up most of its notes with played notes of the same pitch places
    it, and the notes that then line up become anchors. The alignment's own placement
    inside the stretch is not used: it is what went wrong.
    """
    anchored_refs = {i for i, _ in anchors}
    anchored_played = {j for _, j in anchors}
    free = np.array([j for j in pool if j not in anchored_played], dtype=int)
    if free.size == 0:
        return []
    anchor_s = np.array([part.onsets[i] for i, _ in anchors]) if anchors else np.zeros(0)
    anchor_t = np.array([played_on[j] for _, j in anchors]) if anchors else np.zeros(0)
    order = np.lexsort((part.pitches, part.onsets))
    stretches, current = [], []
    for i in order:
        if i in anchored_refs:
            if len(current) >= min_notes:
                stretches.append(current)
            current = []
        else:
            current.append(int(i))
    if len(current) >= min_notes:
        stretches.append(current)
    found = []
    taken: set = set()
    for stretch in stretches:
        s_first, s_last = part.onsets[stretch[0]], part.onsets[stretch[-1]]
        before = anchor_t[anchor_s < s_first - 1e-6]
        after = anchor_t[anchor_s > s_last + 1e-6]
        lo = before.max() if before.size else -np.inf
        hi = after.min() if after.size else np.inf
        window = free[(played_on[free] > lo) & (played_on[free] < hi)]
        candidates = []  # (ref, played, offset)
        for i in stretch:
            for j in window[played_pitch[window] == part.pitches[i]]:
                if j not in taken:
                    candidates.append((i, int(j), float(played_on[j] - slope * part.onsets[i])))
        if len(candidates) < min_notes:
            continue
        offsets = np.array([c[2] for c in candidates])
        best_count, best_offset = 0, 0.0
        for c in offsets:
            voters = {candidates[k][0] for k in np.flatnonzero(np.abs(offsets - c) <= vote_tolerance)}
            if len(voters) > best_count:
                best_count, best_offset = len(voters), float(c)
        if best_count < max(min_notes, int(np.ceil(0.5 * len(stretch)))):
            continue
        pairs: dict = {}
        for i, j, offset in candidates:
            if abs(offset - best_offset) <= vote_tolerance:
                if i not in pairs or abs(offset - best_offset) < abs(pairs[i][1] - best_offset):
                    pairs[i] = (j, offset)
        used_played: set = set()
        for i, (j, _) in sorted(pairs.items(), key=lambda item: part.onsets[item[0]]):
            if j not in used_played:
                found.append((i, j))
                used_played.add(j)
        taken |= used_played
    return found


# --------------------------------------------------------------------------- tempo model


def _robust_line(x: np.ndarray, y: np.ndarray, default_slope: float) -> tuple[float, float]:
    """Siegel's repeated-median line (breakdown point 50 %): one late or early note among
    its neighbours does not tilt the local tempo."""
    if len(x) == 0:
        return default_slope, 0.0
    slope = default_slope
    # fewer than four points: the overall pace is a safer slope than a line through them
    if len(np.unique(np.round(x, 6))) >= 4:
        dx = x[None, :] - x[:, None]
        dy = y[None, :] - y[:, None]
        valid = np.abs(dx) > 1e-6
        per_point = []
        for k in range(len(x)):
            if np.any(valid[k]):
                per_point.append(float(np.median(dy[k, valid[k]] / dx[k, valid[k]])))
        if per_point:
            slope = float(np.median(per_point))
    # a local line steeper or flatter than four times the overall pace is not a tempo
    slope = float(np.clip(slope, default_slope / 4.0, default_slope * 4.0))
    intercept = float(np.median(y - slope * x))
    return slope, intercept


@dataclass
class _TempoModel:
    group_scores: np.ndarray  # score seconds of each onset group with a pairing
    group_takes: np.ndarray  # median take onset of each group
    segment_of_group: np.ndarray
    segment_starts: list  # score seconds where each segment starts
    default_slope: float
    neighbours: int
    hesitations: list  # (group index, pause seconds, pause start take time)

    def segment_at(self, s: float) -> int:
        return int(np.searchsorted(np.asarray(self.segment_starts), s + 1e-9, side="right")) - 1

    def _around(self, s: float, exclude_group: int | None, segment: int | None = None, neighbours: int | None = None):
        """Groups of the segment of ``s`` (or ``segment``): up to ``neighbours`` before it, at it, after it."""
        seg = self.segment_at(s) if segment is None else segment
        n = self.neighbours if neighbours is None else neighbours
        members = np.flatnonzero(self.segment_of_group == seg)
        if exclude_group is not None:
            members = members[members != exclude_group]
        gs = self.group_scores[members]
        return (members[gs < s - 1e-9][-n:], members[np.abs(gs - s) <= 1e-9], members[gs > s + 1e-9][:n])

    def fit(self, s: float, *, exclude_group: int | None = None, segment: int | None = None,
            neighbours: int | None = None) -> tuple[float, float] | None:
        """Local line (slope, intercept) of take time against score time around ``s``."""
        before, at, after = self._around(s, exclude_group, segment, neighbours)
        chosen = np.concatenate([before, at, after])
        if chosen.size == 0:
            return None
        return _robust_line(self.group_scores[chosen], self.group_takes[chosen], self.default_slope)

    def predict(self, s: float, *, exclude_group: int | None = None, fallback: float | None = None) -> float:
        line = self.fit(s, exclude_group=exclude_group)
        if line is None:
            return float(s * self.default_slope) if fallback is None else float(fallback)
        slope, intercept = line
        return slope * s + intercept

    def close_prediction(self, s: float, *, exclude_group: int | None = None, fit_tolerance: float) -> float | None:
        """The take time of ``s`` on a line through half as many neighbours (at least two a side).

        Rubato that swells and relaxes within a phrase bends the take's time line faster
        than the local line follows; a line through the nearest groups follows it. None where
        it has fewer than two groups on each side (the edges have their own reading), or where
        those groups stray more than ``fit_tolerance`` seconds from the line: that is no
        pulse but a jump (a rushed run that falls back into time), which the wider line reads.
        """
        n = max(2, self.neighbours // 2)
        before, _, after = self._around(s, exclude_group, neighbours=n)
        if before.size < 2 or after.size < 2:
            return None
        slope, intercept = self.fit(s, exclude_group=exclude_group, neighbours=n)
        chosen = np.concatenate([before, after])
        if np.max(np.abs(self.group_takes[chosen] - (slope * self.group_scores[chosen] + intercept))) > fit_tolerance:
            return None
        return slope * s + intercept

    def edge_prediction(self, s: float, *, exclude_group: int | None = None) -> float | None:
        """At the edge of a timing segment, the take time of ``s`` at the overall pace.

        There the local line is extrapolated from notes on one side only, so an error in
        its slope grows with the distance; this second reading keeps the intercept of the
        same notes but the overall pace. None away from an edge.
        """
        before, at, after = self._around(s, exclude_group)
        chosen = np.concatenate([before, after])
        if chosen.size == 0 or (before.size and after.size):
            return None
        x, y = self.group_scores[chosen], self.group_takes[chosen]
        return float(self.default_slope * s + np.median(y - self.default_slope * x))

    def predict_in_segment(self, s: float, segment: int) -> float:
        """Take time of score time ``s`` on the tempo line of another timing segment."""
        line = self.fit(s, segment=segment)
        if line is None:
            return self.predict(s)
        return line[0] * s + line[1]

    def slope(self, s: float) -> float:
        line = self.fit(s)
        return self.default_slope if line is None else line[0]


def _tempo_model(
    score_on: np.ndarray,
    played_on: np.ndarray,
    pairs: Sequence[tuple[int, int]],
    *,
    breaks: Sequence[float],
    neighbours: int,
    hesitation_threshold: float,
    default_slope: float,
) -> _TempoModel:
    by_group: dict = {}
    for i, j in pairs:
        by_group.setdefault(round(float(score_on[i]), 4), []).append(float(played_on[j]))
    gs = np.array(sorted(by_group), dtype=float)
    gt = np.array([float(np.median(by_group[s])) for s in gs], dtype=float)
    breaks = sorted(set(float(b) for b in breaks))
    starts = [-np.inf] + breaks

    def segments_for(starts_: list) -> np.ndarray:
        return np.searchsorted(np.asarray(starts_), gs + 1e-9, side="right") - 1

    # overall pace: median ratio of consecutive gaps within segments
    seg = segments_for(starts)
    ratios = []
    for k in range(1, len(gs)):
        if seg[k] == seg[k - 1] and gs[k] - gs[k - 1] > 1e-6:
            ratios.append((gt[k] - gt[k - 1]) / (gs[k] - gs[k - 1]))
    ratios = [r for r in ratios if r > 0]
    if ratios:
        default_slope = float(np.median(ratios))

    hesitations = []
    for k in range(1, len(gs)):
        seg = segments_for(starts)
        if seg[k] != seg[k - 1]:
            continue
        left = np.flatnonzero((seg == seg[k]) & (np.arange(len(gs)) < k))[-neighbours:]
        slope, intercept = _robust_line(gs[left], gt[left], default_slope)
        pred_k = slope * gs[k] + intercept
        shift_k = gt[k] - pred_k
        expected_gap = slope * (gs[k] - gs[k - 1])
        if shift_k <= max(hesitation_threshold, 0.5 * expected_gap):
            continue
        if k + 1 >= len(gs) or seg[k + 1] != seg[k]:
            continue  # nothing after it to show that the delay persists: judged as late
        shift_next = gt[k + 1] - (slope * gs[k + 1] + intercept)
        if shift_next < 0.5 * shift_k:
            continue  # one late note, the music went on at the old place
        pause_start = float(pred_k)
        hesitations.append((k, float(shift_k), pause_start))
        starts = sorted(starts + [float(gs[k]) - 1e-3])
    seg = segments_for(starts)
    return _TempoModel(gs, gt, seg, starts, default_slope, neighbours, hesitations)


# --------------------------------------------------------------------------- restarts


@dataclass
class _Restart:
    abandoned: list  # played indices
    resumed_pairs: list  # (ref, played) of the later attempt to use as anchors
    dropped_pairs: list  # (ref, played) of the earlier attempt to drop from the anchors
    voter_pairs: list  # (ref, played) of the run that repeats the part
    abandoned_refs: dict  # played index of the left-off attempt -> reference note it played
    to_ref: int  # first reference note of the resumed attempt
    from_ref: int  # last reference note reached in the abandoned attempt
    from_time: float
    to_time: float


def _find_restarts(
    part: _Part,
    played_on: np.ndarray,
    played_off: np.ndarray,
    played_pitch: np.ndarray,
    anchors: list,
    expected0: np.ndarray,
    *,
    min_restart_notes: int,
    ignore: set = frozenset(),
    used_refs: set = frozenset(),
    slope: float = 1.0,
    vote_tolerance: float = 0.15,
    min_shift: float = 0.5,
) -> list[_Restart]:
    matched_ref_of = {j: i for i, j in anchors}
    partner_of_ref = {i: j for i, j in anchors}
    order = np.argsort(played_on, kind="stable")
    # runs of unmatched played notes (in take order), tolerating one matched note inside
    runs, current, matched_streak = [], [], 0
    for j in order:
        if j in ignore:
            continue
        if j in matched_ref_of:
            matched_streak += 1
            if matched_streak >= 2 and current:
                runs.append(current)
                current = []
            continue
        matched_streak = 0
        current.append(int(j))
    if current:
        runs.append(current)

    restarts: list[_Restart] = []
    used: set = set(used_refs)
    for run in runs:
        if len(run) < min_restart_notes:
            continue
        candidates = []  # (j, i, shift)
        for j in run:
            for i in np.flatnonzero(part.pitches == played_pitch[j]):
                if i not in partner_of_ref:
                    continue  # a restart needs the other attempt in the take, not just a shifted run
                shift = float(played_on[j] - played_on[partner_of_ref[i]])
                if abs(shift) >= min_shift:
                    candidates.append((j, int(i), shift))
        if not candidates:
            continue
        shifts = np.array([c[2] for c in candidates])
        best_count, best_shift = 0, 0.0
        for c in shifts:
            voters = {candidates[k][0] for k in np.flatnonzero(np.abs(shifts - c) <= vote_tolerance)}
            if len(voters) > best_count or (len(voters) == best_count and abs(c) < abs(best_shift)):
                best_count, best_shift = len(voters), float(c)
        if best_count < max(min_restart_notes, int(np.ceil(0.5 * len(run)))):
            continue
        close = np.abs(shifts - best_shift) <= vote_tolerance
        best_shift = float(np.median(shifts[close]))
        votes: dict = {}
        for k in np.flatnonzero(np.abs(shifts - best_shift) <= vote_tolerance):
            j, i, shift = candidates[k]
            if i in used:
                continue
            if j not in votes or abs(shift - best_shift) < abs(votes[j][1] - best_shift):
                votes[j] = (i, shift)
        # one reference note per voter
        seen_ref: dict = {}
        for j, (i, shift) in votes.items():
            if i not in seen_ref or abs(shift - best_shift) < abs(votes[seen_ref[i]][1] - best_shift):
                seen_ref[i] = j
        voter_pairs = [(i, j) for i, j in seen_ref.items()]
        if len(voter_pairs) < min_restart_notes:
            continue
        refs = [i for i, _ in voter_pairs]
        run_times = [played_on[j] for _, j in voter_pairs]
        partner_times = [played_on[partner_of_ref[i]] for i in refs]
        if best_shift < 0:  # the run came first: it is the abandoned attempt
            earlier_start, later_start = min(run_times), min(partner_times)
            resumed, dropped = [], []
        else:  # the run is the second attempt; the anchors there were the abandoned one
            earlier_start, later_start = min(partner_times), min(run_times)
            resumed = voter_pairs
            dropped = [(i, partner_of_ref[i]) for i in refs if i in partner_of_ref]
        # the first notes of the repeated stretch may have paired across the two attempts:
        # walk back through the part while a note is heard twice, ``gap`` apart, just before
        # the attempts as found so far
        gap = abs(best_shift)
        voters_refs = set(refs)
        score_order = [int(i) for i in np.lexsort((part.pitches, part.onsets))]
        first = min(score_order.index(i) for i in refs)
        head = min(refs, key=lambda i: part.onsets[i])
        for position in range(first - 1, max(first - 4 * min_restart_notes, -1), -1):
            i = score_order[position]
            if i in used or i in voters_refs:
                continue
            same = np.flatnonzero((played_pitch == part.pitches[i]) & ~np.isin(np.arange(len(played_on)), list(ignore)))
            # where the later attempt would have played it, at the overall pace
            due = later_start - slope * (part.onsets[head] - part.onsets[i])
            later = [j for j in same if abs(played_on[j] - due) <= 2.0 * vote_tolerance and played_on[j] < later_start
                     and (j not in matched_ref_of or matched_ref_of[j] == i)]
            pair = None
            for j_later in sorted(later, key=lambda j: -played_on[j]):
                earlier = [j for j in same if abs(played_on[j_later] - played_on[j] - gap) <= vote_tolerance]
                if earlier:
                    pair = (min(earlier, key=lambda j: abs(played_on[j_later] - played_on[j] - gap)), int(j_later))
                    break
            if pair is None:
                break
            j_earlier, j_later = pair
            earlier_start = min(earlier_start, played_on[j_earlier])
            later_start = min(later_start, played_on[j_later])
            voters_refs.add(i)
            refs.append(i)
            if part.onsets[i] < part.onsets[head]:
                head = i
            resumed = [p for p in resumed if p[0] != i] + [(i, j_later)]
            if i in partner_of_ref and partner_of_ref[i] != j_later:
                dropped = [p for p in dropped if p[0] != i] + [(i, partner_of_ref[i])]
        abandoned = [int(j) for j in np.flatnonzero((played_on >= earlier_start - 1e-6) & (played_on < later_start - 1e-6))]
        if not abandoned:
            continue
        to_ref = min(refs, key=lambda i: (part.onsets[i], part.pitches[i]))
        from_ref = max(refs, key=lambda i: (part.onsets[i], -part.pitches[i]))
        # a left-off attempt holds the repeated stretch (and perhaps the note stumbled on), not
        # notes matched further on: otherwise this is a repeated motif, not a restart
        beyond = [j for j in abandoned if j in matched_ref_of and part.onsets[matched_ref_of[j]] > part.onsets[from_ref] + 1e-6]
        if len(beyond) > 1:
            continue
        # where the left-off attempt stopped: the end of the written value of its last note,
        # at the overall pace (a release just before the bar line is still "the end of the bar")
        ref_of_played = {**matched_ref_of, **({j: i for i, j in voter_pairs} if best_shift < 0 else {})}
        last_played = max(abandoned, key=lambda j: (played_on[j], played_off[j]))
        last_ref = ref_of_played.get(last_played)
        if last_ref is None:
            # the note the player stopped on: its pitch at or just after the last repeated note
            after = [i for i in np.flatnonzero(part.pitches == played_pitch[last_played])
                     if part.onsets[from_ref] - 1e-6 <= part.onsets[i] <= part.onsets[from_ref] + 4.0]
            last_ref = min(after, key=lambda i: part.onsets[i]) if after else None
        written_end = played_off[last_played]
        if last_ref is not None:
            written_end = played_on[last_played] + slope * (part.offsets[last_ref] - part.onsets[last_ref])
        used.update(refs)
        restarts.append(
            _Restart(
                abandoned=abandoned,
                resumed_pairs=resumed,
                dropped_pairs=dropped,
                voter_pairs=voter_pairs,
                abandoned_refs={j: i for j, i in ref_of_played.items() if j in set(abandoned)},
                to_ref=int(to_ref),
                from_ref=int(from_ref),
                from_time=float(min(max(written_end, max(played_off[abandoned])), later_start)),
                to_time=float(later_start),
            )
        )
    return restarts


# --------------------------------------------------------------------------- main entry


def compare_notes(
    reference: Any,
    alignment: Any,
    played_notes: Sequence[Note],
    *,
    timing_tolerance: float = 0.100,
    duration_tolerance: float = 0.5,
    match_margin: float = 0.3,
    anchor_window: float = 0.5,
    hesitation_threshold: float = 0.3,
    neighbours: int = 4,
    min_restart_notes: int = 3,
    judge_durations: bool = True,
    faint_notes: Sequence[Note] | None = None,
    mask_partials: bool = False,
) -> Comparison:
    """Compare the notes of a take with the reference part.

    Parameters
    ----------
    reference : takescribe.score.Reference
        The part; uses ``notes`` (pitch, onset, offset in seconds at the written tempo,
        onset_quarters, measure, beat), ``measure_beat(q)``, ``measure_starts`` and
        ``quarters_to_seconds`` where present.
    alignment : takescribe.align.Alignment or None
        Score time -> take time (``score_to_take``); ``None`` means the take follows the
        written tempo from 0 s.
    played_notes : sequence of Note
        What was played (ground truth or a transcription), seconds in the take.
    timing_tolerance : float
        Seconds a note may be off the player's own local pulse before it is early/late.
    duration_tolerance : float
        Relative: a note held for less than ``1 - duration_tolerance`` or more than
        ``1 + duration_tolerance`` times its written length at the local tempo is
        held_short / held_long.
    match_margin : float
        Seconds added to ``timing_tolerance`` for the final matching window, so early and
        late notes are still recognised as the note meant.
    anchor_window : float
        Seconds, first-pass matching window around the alignment's prediction.
    hesitation_threshold : float
        Seconds of unwritten pause (persisting on the next note) that make a hesitation.
    neighbours : int
        Onset groups on each side used for the local tempo line.
    min_restart_notes : int
        Notes of the abandoned attempt needed to recognise a restart.
    judge_durations : bool
        Report ``held_short`` / ``held_long``. Turn off when the note ends are not reliable
        (a transcription of a piano or plucked take, where the end of a note is the end of
        its audible decay rather than the player's release).
    faint_notes : sequence of Note, optional
        Notes heard only faintly (below the draft's threshold, where the part expects them,
        or a struck key played again while it still rings; :func:`takescribe.informed.faint_notes`). A part note that would be ``missed`` but has a
        faint note of its pitch starting within 0.15 s of where it should sound gets the status
        ``"uncertain"`` and no finding: the evidence is too weak to put it in the draft and too
        strong to tell the player it was not played.
    mask_partials : bool
        For played notes from a transcription: a part note that would be ``missed`` while a
        played note 12, 19 or 24 semitones below it sounds where it starts gets the status
        ``"uncertain"`` and no finding. Its partials coincide with that note's 2nd, 3rd or 4th
        partial, so a spectrum cannot tell whether it was played (the factorization gives
        that energy to the lower note). Off for notes known exactly (ground truth, MIDI).

    Returns
    -------
    Comparison

    Raises
    ------
    InputError
        If an option is out of range or the reference notes are malformed.
    TypeError
        If ``played_notes`` is not a sequence of Note or the reference/alignment lack the
        attributes used.

    Examples
    --------
    >>> from types import SimpleNamespace as NS
    >>> from takescribe.notes import Note
    >>> ref = NS(notes=[NS(pitch=60 + k, onset=0.5 * k, offset=0.5 * k + 0.45, onset_quarters=k,
    ...                   measure=1 + k // 4, beat=1.0 + k % 4) for k in range(8)])
    >>> played = [Note(0.5 * k, 0.5 * k + 0.45, 60 + k) for k in range(8) if k != 3]
    >>> result = compare_notes(ref, None, played)
    >>> [(f.kind, f.expected_pitch) for f in result.findings]
    [('missed', 63)]
    """
    if not isinstance(judge_durations, (bool, np.bool_)):
        raise TypeError(f"judge_durations must be True or False, got {judge_durations!r}")
    validate_comparison_options(
        timing_tolerance=timing_tolerance,
        duration_tolerance=duration_tolerance,
        match_margin=match_margin,
        anchor_window=anchor_window,
        hesitation_threshold=hesitation_threshold,
        neighbours=neighbours,
        min_restart_notes=min_restart_notes,
    )
    played = validate_notes(played_notes, name="played_notes")
    part = _part_from_reference(reference)
    to_take = _score_to_take_function(alignment)
    n_ref, n_played = len(part.onsets), len(played)
    if n_played == 0:
        warnings.warn("no notes were heard in the take: every note of the part is reported missed",
                      TakescribeWarning, stacklevel=2)
    if n_ref == 0:
        warnings.warn("the part has no notes: every played note is reported extra", TakescribeWarning, stacklevel=2)

    played_on = np.array([p.onset for p in played], dtype=float)
    played_off = np.array([p.offset for p in played], dtype=float)
    played_pitch = np.array([p.pitch for p in played], dtype=int)

    expected0 = to_take(part.onsets) if n_ref else np.zeros(0)
    expected0_off = to_take(part.offsets) if n_ref else np.zeros(0)
    default_slope = _overall_slope(part.onsets, expected0)

    # 1. anchors: same pitch, wide window around the alignment's prediction
    anchors = _match_notes(expected0, expected0_off, part.pitches, played_on, played_off, played_pitch,
                           window=anchor_window, same_pitch=True)
    anchors = _uncross(anchors, expected0, played_on, key=lambda i, j: part.pitches[i])

    # 2-3. restarts, then the local tempo and hesitations from the anchors; re-anchoring around
    # the local-tempo prediction lets the anchors follow a take that drifts away from a coarse
    # alignment, and a restart hidden by a coarse alignment shows up once the anchors settle
    restarts: list[_Restart] = []
    abandoned_owner: dict = {}
    breaks: list[float] = []
    predicted = expected0
    for _round in range(2):
        found = _find_restarts(part, played_on, played_off, played_pitch, anchors, predicted,
                               min_restart_notes=min_restart_notes, ignore=set(abandoned_owner),
                               used_refs={i for r in restarts for i, _ in r.resumed_pairs + r.voter_pairs},
                               slope=default_slope if _round == 0 else model.default_slope)
        for r in found:
            for j in r.abandoned:
                abandoned_owner.setdefault(j, len(restarts))
            restarts.append(r)
        dropped = {p for r in found for p in r.dropped_pairs}
        anchors = [(i, j) for i, j in anchors if (i, j) not in dropped and j not in abandoned_owner]
        anchored_refs = {i for i, _ in anchors}
        anchors += [(i, j) for r in found for i, j in r.resumed_pairs if i not in anchored_refs]
        # a segment starts just before the note the player went back to (group keys are rounded)
        breaks = [float(part.onsets[r.to_ref]) - 1e-3 for r in restarts]
        pool = np.array([j for j in range(n_played) if j not in abandoned_owner], dtype=int)
        for _ in range(3):
            model = _tempo_model(part.onsets, played_on, anchors, breaks=breaks, neighbours=neighbours,
                                 hesitation_threshold=hesitation_threshold, default_slope=default_slope)
            predicted = np.array([model.predict(s, fallback=e) for s, e in zip(part.onsets, predicted)]) if n_ref else np.zeros(0)
            pred_off = predicted + np.array([model.slope(s) for s in part.onsets]) * (part.offsets - part.onsets) if n_ref else np.zeros(0)
            again = _match_notes(predicted, pred_off, part.pitches, played_on[pool], played_off[pool], played_pitch[pool],
                                 window=anchor_window, same_pitch=True)
            again = _uncross([(i, int(pool[j])) for i, j in again], predicted, played_on, key=lambda i, j: part.pitches[i])
            again += _recover_stretches(part, predicted, played_on, played_pitch, pool, again,
                                        min_notes=min_restart_notes, slope=model.default_slope)
            if sorted(again) == sorted(anchors) or len(again) < len(anchors):
                break
            anchors = again

    # 4. final matching around the local-tempo prediction
    pred_off = predicted + np.array([model.slope(s) for s in part.onsets]) * (part.offsets - part.onsets) if n_ref else np.zeros(0)
    window = timing_tolerance + match_margin
    same = _same_pitch_pairs(predicted, pred_off, part.pitches, played_on, played_off, played_pitch, pool,
                             np.arange(n_ref), window=window)
    # around a hesitation a chord can be split by the pause (one hand before it, one after):
    # the notes left over next to the pause are tried against the tempo line of the other side
    alt_expected: dict = {}
    taken_ref, taken_played = {i for i, _ in same}, {j for _, j in same}
    for k, _pause, _start in model.hesitations:
        s_here, s_before = float(model.group_scores[k]), float(model.group_scores[k - 1])
        seg = int(model.segment_of_group[k])
        for i in range(n_ref):
            if i in taken_ref:
                continue
            s_i = float(part.onsets[i])
            if abs(s_i - s_here) < 1e-3:
                alt_expected[i] = model.predict_in_segment(s_i, seg - 1)
            elif s_before - 1e-3 < s_i < s_here - 1e-3:
                alt_expected[i] = model.predict_in_segment(s_i, seg)
    if alt_expected:
        refs = np.array(sorted(alt_expected), dtype=int)
        alt_on = predicted.copy()
        alt_on[refs] = [alt_expected[i] for i in refs]
        free = np.array([j for j in pool if j not in taken_played], dtype=int)
        extra_pairs = _same_pitch_pairs(alt_on, alt_on + (pred_off - predicted), part.pitches, played_on, played_off,
                                        played_pitch, free, refs, window=window)
        same += extra_pairs
        alt_expected = {i: alt_expected[i] for i, _ in extra_pairs}
    else:
        alt_expected = {}
    left_ref = np.array(sorted(set(range(n_ref)) - {i for i, _ in same}), dtype=int)
    left_played = np.array(sorted(set(pool.tolist()) - {j for _, j in same}), dtype=int)
    wrong = _match_notes(predicted[left_ref], pred_off[left_ref], part.pitches[left_ref], played_on[left_played],
                         played_off[left_played], played_pitch[left_played], window=window, same_pitch=False)
    wrong = [(int(left_ref[i]), int(left_played[j])) for i, j in wrong]
    # within a chord, pair wrong notes by pitch order (lowest with lowest)
    wrong = _uncross(wrong, part.pitches, played_pitch, key=lambda i, j: round(float(part.onsets[i]), 4))

    # 5. refit the tempo with every pairing (the split-chord notes aside), keeping the restart cuts
    model = _tempo_model(part.onsets, played_on, [p for p in same if p[0] not in alt_expected] + wrong,
                         breaks=breaks, neighbours=neighbours,
                         hesitation_threshold=hesitation_threshold, default_slope=default_slope)
    group_index = {round(float(s), 4): k for k, s in enumerate(model.group_scores)}
    predicted = np.array([model.predict(s, fallback=e) for s, e in zip(part.onsets, predicted)]) if n_ref else np.zeros(0)
    slopes = np.array([model.slope(s) for s in part.onsets]) if n_ref else np.zeros(0)
    pred_off = predicted + slopes * (part.offsets - part.onsets)
    for i in alt_expected:
        predicted[i] = alt_expected[i]
        pred_off[i] = alt_expected[i] + slopes[i] * (part.offsets[i] - part.onsets[i])

    # 6. findings
    raw: list[dict] = []

    def add(kind: str, time: float, **kw) -> dict:
        item = {"kind": kind, "time": float(time), **kw}
        raw.append(item)
        return item

    def where(i: int) -> dict:
        m = int(part.measures[i]) if part.measures[i] >= 0 else None
        b = round(float(part.beats[i]), 3) if np.isfinite(part.beats[i]) else None
        if m is None:
            m, b = part.measure_position(float(part.onsets[i]))
        return {"measure": m, "beat": b, "measure_label": part.label(m)}

    restart_items = []
    for r in restarts:
        fm = where(r.from_ref)
        tm = where(r.to_ref)
        replayed = float(part.onsets[r.from_ref] - part.onsets[r.to_ref])
        item = add(
            "restart", r.from_time, **fm, deviation=replayed, reference_index=r.to_ref,
            from_time=r.from_time, to_time=r.to_time, from_measure=fm["measure"], from_beat=fm["beat"],
            to_measure=tm["measure"], to_beat=tm["beat"],
            text=(f"{_bar(fm)}: stopped and started again from {_bar(tm, lower=True)}. "
                  f"The {len(r.abandoned)} notes of the attempt that was left off are listed with it."),
        )
        restart_items.append(item)

    hesitation_of_group: dict = {}
    ref_of_played = {j: i for i, j in same + wrong}
    pool_onsets = np.unique(played_on[pool]) if pool.size else np.zeros(0)
    for k, pause, start in model.hesitations:
        refs_here = [i for i in range(n_ref) if abs(part.onsets[i] - model.group_scores[k]) <= 1e-4]
        i0 = min(refs_here, key=lambda i: part.pitches[i]) if refs_here else None
        # the music resumes after the longest silence between onsets around the delayed group
        # (a chord split by the pause puts the delayed group's median on either side of it)
        near = pool_onsets[(pool_onsets >= start - pause - 1.0) & (pool_onsets <= start + pause + 1.0)]
        if near.size >= 2:
            resume = float(near[1:][np.argmax(np.diff(near))])
            start = resume - pause
            resumed = [j for j in pool if abs(played_on[j] - resume) < 1e-9 and j in ref_of_played]
            if resumed:
                i0 = min((ref_of_played[j] for j in resumed), key=lambda i: (part.onsets[i], part.pitches[i]))
        pos = where(i0) if i0 is not None else {"measure": None, "beat": None, "measure_label": None}
        item = add(
            "hesitation", start, **pos, expected_pitch=None if i0 is None else int(part.pitches[i0]),
            deviation=pause, reference_index=i0,
            text=(f"{_bar(pos)}: a pause of {pause:.1f} s before "
                  f"{'this note' if i0 is None else pitch_name(part.pitches[i0])} that the part does not have."),
        )
        hesitation_of_group[k] = item

    # the group just before each hesitation: a note held into the pause belongs to the pause
    before_hesitation = {k - 1 for k in hesitation_of_group}

    note_status = ["missed"] * n_ref
    played_status = ["extra"] * n_played
    for i, j in same:
        note_status[i] = "played"
        played_status[j] = "matched"
    for i, j in wrong:
        note_status[i] = "wrong_pitch"
        played_status[j] = "matched"

    def sounds_through(j: int, t: float) -> bool:
        """Played note ``j`` was already sounding at take time ``t`` and went on after it."""
        return played_on[j] < t - timing_tolerance and played_off[j] > t + timing_tolerance

    # unpartnered reference notes, by pitch: a played note that sounds on through where one of
    # them should start is a repeated note not heard apart (not re-articulated, or merged by
    # the transcription); that is one event, reported on the missing note, not also held_long
    unheard_by_pitch: dict[int, list] = {}
    for i in range(n_ref):
        if note_status[i] == "missed":
            unheard_by_pitch.setdefault(int(part.pitches[i]), []).append(float(predicted[i]))

    def masked_by_partials(i: int) -> bool:
        """A played note a partial below part note ``i`` (12, 19, 24 semitones) sounds where it starts."""
        if not mask_partials:
            return False
        t = float(predicted[i])
        return any(played_status[j] == "matched" and int(part.pitches[i] - played_pitch[j]) in _PARTIAL_STEPS
                   and played_on[j] <= t + _FAINT_WINDOW and played_off[j] > t for j in range(n_played))

    flagged_refs: set = set()
    for i, j in same:
        pos = where(i)
        g = group_index.get(round(float(part.onsets[i]), 4))
        if i in alt_expected:
            expected = float(alt_expected[i])
        else:
            expected = model.predict(float(part.onsets[i]), exclude_group=g, fallback=float(predicted[i]))
        residual = float(played_on[j] - expected)
        if i not in alt_expected:
            # at a segment edge the pulse is uncertain: a note is early or late only if it is
            # so against both readings of it (the local line and the overall pace)
            edge = model.edge_prediction(float(part.onsets[i]), exclude_group=g)
            if edge is not None and abs(played_on[j] - edge) < abs(residual):
                residual = float(played_on[j] - edge)
            # and rubato within a phrase is the player's pulse too: a note is early or late
            # only if it is so against the closer line as well
            close = model.close_prediction(float(part.onsets[i]), exclude_group=g, fit_tolerance=0.5 * timing_tolerance)
            if close is not None and abs(played_on[j] - close) < abs(residual):
                residual = float(played_on[j] - close)
        name = pitch_name(part.pitches[i])
        common = dict(**pos, expected_pitch=int(part.pitches[i]), played_pitch=int(played_pitch[j]),
                      reference_index=i, played_index=j)
        if abs(residual) > timing_tolerance:
            kind = "late" if residual > 0 else "early"
            linked = hesitation_of_group.get(g) if kind == "late" else None
            text = (f"{_bar(pos)}: {name} came {abs(residual):.2f} s "
                    f"{'after' if kind == 'late' else 'ahead of'} the player's own pulse"
                    + (" (just after a pause)." if linked is not None else "."))
            add(kind, played_on[j], deviation=residual, linked=linked, text=text, **common)
            flagged_refs.add(i)
        expected_length = float(slopes[i] * (part.offsets[i] - part.onsets[i]))
        played_length = float(played_off[j] - played_on[j])
        difference = played_length - expected_length
        if judge_durations and expected_length > 0 and abs(difference) > timing_tolerance:
            ratio = played_length / expected_length
            kind = None
            if ratio < 1.0 - duration_tolerance and _silence_after(j, played_on, played_off, pool) > timing_tolerance:
                kind = "held_short"
            elif (ratio > 1.0 + duration_tolerance and g not in before_hesitation
                  and not any(sounds_through(j, t) for t in unheard_by_pitch.get(int(part.pitches[i]), ()))):
                kind = "held_long"
            if kind is not None:
                add(kind, played_on[j], deviation=difference,
                    text=(f"{_bar(pos)}: {name} held {played_length:.2f} s; at this pace it lasts "
                          f"about {expected_length:.2f} s."), **common)
                flagged_refs.add(i)
    for i, j in wrong:
        pos = where(i)
        step = int(played_pitch[j] - part.pitches[i])
        add("wrong_pitch", played_on[j], **pos, expected_pitch=int(part.pitches[i]), played_pitch=int(played_pitch[j]),
            deviation=float(step), reference_index=i, played_index=j,
            text=(f"{_bar(pos)}: played {pitch_name(played_pitch[j])} where the part has "
                  f"{pitch_name(part.pitches[i])} ({step:+d} semitone{'s' if abs(step) != 1 else ''})."))
    faint_onsets: dict[int, list] = {}
    for n in faint_notes or ():
        faint_onsets.setdefault(int(n.pitch), []).append(n.onset)
    for i in range(n_ref):
        if note_status[i] == "missed":
            heard = np.asarray(faint_onsets.get(int(part.pitches[i]), []), dtype=float)
            if heard.size and np.min(np.abs(heard - predicted[i])) <= _FAINT_WINDOW:
                # some evidence the note sounded: too faint for the draft, too much to blame the player
                note_status[i] = "uncertain"
                continue
            if masked_by_partials(i):
                # an octave, twelfth or double octave above a note sounding with it: its partials
                # are that note's overtones, so the spectrum cannot tell whether it was played
                note_status[i] = "uncertain"
                continue
            pos = where(i)
            merged = any(sounds_through(j, float(predicted[i])) for j in range(n_played)
                         if played_pitch[j] == part.pitches[i] and played_status[j] == "matched")
            text = (f"{_bar(pos)}: {pitch_name(part.pitches[i])} in the part was not heard"
                    + (" as a new note: the same pitch sounded on through its place (not played again?)."
                       if merged else "."))
            add("missed", predicted[i], **pos, expected_pitch=int(part.pitches[i]), reference_index=i, text=text)

    def take_position(t: float) -> dict:
        s = _take_to_score(model, t, part)
        m, b = part.measure_position(s)
        return {"measure": m, "beat": b, "measure_label": part.label(m)}

    for j in range(n_played):
        if played_status[j] != "extra":
            continue
        owner = abandoned_owner.get(j)
        linked = restart_items[owner] if owner is not None else None
        attempted = restarts[owner].abandoned_refs.get(j) if owner is not None else None
        # a note of a left-off attempt sits where that attempt was in the part
        pos = where(attempted) if attempted is not None else take_position(float(played_on[j]))
        text = (f"{_bar(pos)}: {pitch_name(played_pitch[j])} "
                + ("from the attempt that was started again." if linked is not None else "that is not in the part."))
        add("extra", played_on[j], **pos, played_pitch=int(played_pitch[j]), played_index=j, linked=linked, text=text)

    findings = _number(raw)

    # 7. summary
    # one event, one count: notes linked to a restart or a hesitation are details of it
    events = [f for f in findings if f.linked_to is None]
    counts = {kind: 0 for kind in KINDS}
    for f in events:
        counts[f.kind] += 1
    take_end = float(max(played_off.max() if n_played else 0.0, predicted.max() if n_ref else 0.0))
    per_bar = Counter(f.measure for f in events if f.measure is not None)
    correct = sum(1 for i in range(n_ref) if note_status[i] == "played" and i not in flagged_refs)
    confidence = getattr(alignment, "confidence", None) if alignment is not None else None
    if confidence is not None and not np.isscalar(confidence):
        confidence = float(np.mean(np.asarray(confidence, dtype=float))) if np.size(confidence) else None
    measure_times = {m: float(model.predict(s, fallback=float(to_take(np.array([s]))[0]))) for m, s in part.measure_starts.items()}
    summary = {
        "notes_in_part": n_ref,
        "notes_played": n_played,
        "notes_played_correctly": int(correct),
        "notes_uncertain": int(sum(1 for status in note_status if status == "uncertain")),
        "counts": counts,
        "linked_details": len(findings) - len(events),
        "findings_per_minute": round(len(events) / (take_end / 60.0), 3) if take_end > 0 else 0.0,
        "tempo_curve": _tempo_curve(part, model),
        "bars_with_most_findings": [{"measure": int(m), "findings": int(c)}
                                    for m, c in sorted(per_bar.items(), key=lambda mc: (-mc[1], mc[0]))[:5]],
        "alignment_confidence": None if confidence is None else round(float(confidence), 4),
        "take_duration": round(take_end, 4),
    }
    pairs = tuple(sorted(same + wrong))
    return Comparison(
        findings=tuple(findings),
        summary=summary,
        note_status=tuple(note_status),
        played_status=tuple(played_status),
        pairs=pairs,
        expected_onsets=predicted,
        expected_offsets=pred_off,
        played_notes=tuple(played),
        measure_times=measure_times,
    )


def _silence_after(j: int, played_on: np.ndarray, played_off: np.ndarray, pool: np.ndarray) -> float:
    """Seconds of silence between the release of played note ``j`` and the next onset.

    A note released just as the next one starts was held as long as the line allowed (an
    early or extra next note is reported on its own), so it is not called short.
    """
    later = played_on[pool][played_on[pool] > played_on[j] + 0.05]
    if later.size == 0:
        return np.inf
    return float(later.min() - played_off[j])


def _bar(pos: dict, *, lower: bool = False) -> str:
    word = "bar" if lower else "Bar"
    if pos.get("measure") is None:
        return "here" if lower else "Here"
    label = pos.get("measure_label") or pos["measure"]
    beat = pos.get("beat")
    if beat is None:
        return f"{word} {label}"
    return f"{word} {label}, beat {beat:g}"


def _overall_slope(score_on: np.ndarray, take_on: np.ndarray) -> float:
    """Median take seconds per score second between consecutive onsets (pauses and jumps aside)."""
    order = np.argsort(score_on, kind="stable")
    ds, dt = np.diff(score_on[order]), np.diff(take_on[order])
    ratios = dt[ds > 1e-6] / ds[ds > 1e-6]
    ratios = ratios[np.isfinite(ratios) & (ratios > 0)]
    return float(np.median(ratios)) if ratios.size else 1.0


def _take_to_score(model: _TempoModel, t: float, part: _Part) -> float:
    """Score seconds at take time ``t`` through the nearest group's local line."""
    if len(model.group_takes) == 0:
        return float(t / model.default_slope)
    k = int(np.argmin(np.abs(model.group_takes - t)))
    s = float(model.group_scores[k])
    slope, intercept = model.fit(s) or (model.default_slope, float(model.group_takes[k] - model.default_slope * s))
    return float((t - intercept) / slope) if slope > 0 else s


def _tempo_curve(part: _Part, model: _TempoModel) -> list[dict]:
    """Take seconds per quarter note, one sample per measure of the part."""
    if len(part.onsets) < 2 or len(model.group_scores) == 0:
        return []
    order = np.argsort(part.onsets, kind="stable")
    s_sorted, q_sorted = part.onsets[order], part.quarters[order]
    curve = []
    for m, s in sorted(part.measure_starts.items()):
        # sample the middle of the bar's notes
        sel = part.measures == m
        s_mid = float(np.median(part.onsets[sel])) if np.any(sel) else float(s)
        score_seconds_per_quarter = _local_rate(s_sorted, q_sorted, s_mid)
        take_per_score = model.slope(s_mid)
        seconds_per_beat = take_per_score * score_seconds_per_quarter
        if not np.isfinite(seconds_per_beat) or seconds_per_beat <= 0:
            continue
        curve.append({
            "measure": int(m),
            "score_quarters": round(float(np.interp(s, s_sorted, q_sorted)), 4),
            "take_time": round(float(model.predict(float(s))), 4),
            "seconds_per_beat": round(float(seconds_per_beat), 4),
            "beats_per_minute": round(60.0 / float(seconds_per_beat), 2),
        })
    return curve


def _local_rate(s_sorted: np.ndarray, q_sorted: np.ndarray, s: float) -> float:
    """Score seconds per quarter note around score time ``s``."""
    k = int(np.searchsorted(s_sorted, s))
    lo, hi = max(k - 4, 0), min(k + 4, len(s_sorted) - 1)
    dq = q_sorted[hi] - q_sorted[lo]
    ds = s_sorted[hi] - s_sorted[lo]
    if dq <= 0 or ds <= 0:
        dq, ds = q_sorted[-1] - q_sorted[0], s_sorted[-1] - s_sorted[0]
    return float(ds / dq) if dq > 0 else 0.5


_FAINT_WINDOW = 0.15  # seconds between a faint note and where a part note should sound
# semitones above a sounding note where its 2nd, 3rd and 4th partials lie (octave, twelfth,
# double octave; harmonic series, common practice, no source)
_PARTIAL_STEPS = (12, 19, 24)

_KIND_ORDER = {k: n for n, k in enumerate(("restart", "hesitation", "wrong_pitch", "missed", "extra", "early", "late", "held_short", "held_long"))}


def _number(raw: list[dict]) -> list[Finding]:
    ordered = sorted(raw, key=lambda d: (d["time"], _KIND_ORDER[d["kind"]], d.get("expected_pitch") or d.get("played_pitch") or 0))
    ids = {id(d): n + 1 for n, d in enumerate(ordered)}
    out = []
    for d in ordered:
        linked = d.pop("linked", None)
        out.append(Finding(id=ids[id(d)], linked_to=None if linked is None else ids[id(linked)], **d))
    return out
