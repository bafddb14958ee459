"""The findings of a comparison as values, and their JSON document.

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
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError

__all__ = ["KINDS", "Finding", "Comparison", "findings_json", "pitch_name"]

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


def bar_text(pos: dict, *, lower: bool = False) -> str:
    word = "bar" if lower else "Bar"
    if pos.get("measure") is None:
        return "here" if lower else "Here"
    label = pos.get("measure_label") or pos["measure"]
    beat = pos.get("beat")
    if beat is None:
        return f"{word} {label}"
    return f"{word} {label}, beat {beat:g}"


_KIND_ORDER = {k: n for n, k in enumerate(("restart", "hesitation", "wrong_pitch", "missed", "extra", "early", "late", "held_short", "held_long"))}


def number_findings(raw: list[dict]) -> list[Finding]:
    ordered = sorted(raw, key=lambda d: (d["time"], _KIND_ORDER[d["kind"]], d.get("expected_pitch") or d.get("played_pitch") or 0))
    ids = {id(d): n + 1 for n, d in enumerate(ordered)}
    out = []
    for d in ordered:
        linked = d.pop("linked", None)
        out.append(Finding(id=ids[id(d)], linked_to=None if linked is None else ids[id(linked)], **d))
    return out
