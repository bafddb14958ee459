"""The part as MusicXML 4.0 with the findings marked on its notes.

The notation comes from the pipeline (:attr:`takescribe.reference.part.LoadedPart.written`,
parsed once through the reference stage's safe reader); nothing here reads a file. When no
notation is given (a MIDI part, a test double), a simple part is rebuilt from the notes.

Conventions
-----------
- A note with findings gets the colour and notehead of its first finding (in
  :data:`takescribe.comparison.compare.KINDS` order) and one lyric line per finding with the
  finding's word; extra notes and restarts become text directions above the bar.
- A finding the comparison marks ``status == "check_by_ear"`` and a part note the recording
  could not settle (``note_status == "uncertain"``) get a parenthesised notehead and a word
  ending in "?"; with ``include_uncertain=False`` they are left unmarked.
- Every part note found in the notation gets the XML id ``ts-n<k>`` (``k`` the first reference
  note written by it), so the engraved page can link notes, findings and times.
"""

from __future__ import annotations

import copy
from dataclasses import dataclass
from typing import Any

from ..comparison.compare import KINDS, Comparison, pitch_name
from ..notation.musicxml import stable_ids
from .styles import KIND_STYLES, LISTEN_STYLE

__all__ = ["Annotated", "annotate", "annotate_musicxml", "is_uncertain", "label_of"]

#: How far (quarter notes) a written note may sit from a part note's place in its bar and
#: still be taken as that note; a little over a 16th, so neighbouring notes are not confused.
POSITION_TOLERANCE = 0.26

#: Text directions are placed on a grid of twelfths of a quarter (keeps MusicXML divisions small).
DIRECTION_GRID = 12


@dataclass(frozen=True)
class Annotated:
    """The annotated part.

    Attributes
    ----------
    musicxml : bytes
        MusicXML 4.0 (partwise).
    note_ids : dict
        Reference note index -> XML id of the written note that shows it.
    """

    musicxml: bytes
    note_ids: dict


def is_uncertain(finding: Any) -> bool:
    """Whether a finding is marked for checking by ear (``status`` from the comparison, when present)."""
    return getattr(finding, "status", "reported") == "check_by_ear"


def label_of(reference: Any, measure: int) -> str:
    """The printed number of a bar given in performance order."""
    labels = getattr(reference, "measure_labels", ()) or ()
    if 1 <= measure <= len(labels) and labels[measure - 1]:
        return str(labels[measure - 1])
    return str(measure)


def annotate_musicxml(comparison: Comparison, reference: Any, written: Any = None, *,
                      include_uncertain: bool = True) -> bytes:
    """MusicXML bytes of :func:`annotate` (kept for the 0.1 callers)."""
    return annotate(comparison, reference, written, include_uncertain=include_uncertain).musicxml


def annotate(comparison: Comparison, reference: Any, written: Any = None, *, include_uncertain: bool = True) -> Annotated:
    """The part with the findings marked on it (see the module docstring).

    Parameters
    ----------
    comparison : Comparison
    reference : takescribe.reference.part.Reference
    written : music21.stream.Score, optional
        The part's notation as parsed by the reference stage; it is copied, never changed.
    include_uncertain : bool
        Mark findings to check by ear and unsettled notes too.
    """
    from music21 import musicxml

    score = copy.deepcopy(written) if written is not None else _score_from_notes(reference)
    _brace_staves(score)
    index = _note_index(score)
    notes = list(getattr(reference, "notes", ()))
    note_ids = _assign_ids(index, notes, reference)
    _mark_notes(comparison, reference, index, notes, include_uncertain=include_uncertain)
    _mark_directions(comparison, reference, score, include_uncertain=include_uncertain)
    data = stable_ids(musicxml.m21ToXml.GeneralObjectExporter(score).parse().decode("utf-8")).encode("utf-8")
    return Annotated(data, note_ids)


def _brace_staves(score) -> None:
    """The staves of one instrument (a piano's two) joined by a brace, as the part prints them."""
    from music21 import layout

    staves = list(score.parts)
    if len(staves) > 1 and not list(score.getElementsByClass(layout.StaffGroup)):
        score.insert(0, layout.StaffGroup(staves, symbol="brace", barTogether=True))


def _assign_ids(index: dict, notes: list, reference: Any) -> dict:
    note_ids = {}
    for k, score_note in enumerate(notes):
        found = _find_note(index, score_note, reference)
        if found is None:
            continue
        target = found[0]
        if not isinstance(target.id, str) or not target.id.startswith("ts-n"):
            target.id = f"ts-n{k}"
        note_ids[k] = target.id
    return note_ids


def _mark_notes(comparison, reference, index, notes, *, include_uncertain: bool) -> None:
    by_ref: dict = {}
    for f in comparison.findings:
        if f.reference_index is not None and f.kind != "restart" and (include_uncertain or not is_uncertain(f)):
            by_ref.setdefault(f.reference_index, []).append(f)
    if include_uncertain:
        for k, status in enumerate(comparison.note_status):
            if status == "uncertain" and k not in by_ref:
                by_ref[k] = []
    for k, found in by_ref.items():
        if k >= len(notes):
            continue
        hit = _find_note(index, notes[k], reference)
        if hit is None:
            continue
        target, owner = hit
        if not found:  # a note the recording could not settle
            target.style.color = LISTEN_STYLE.colour
            target.noteheadParenthesis = True
            owner.addLyric(LISTEN_STYLE.word)
            continue
        found = sorted(found, key=lambda f: KINDS.index(f.kind))
        main = KIND_STYLES[found[0].kind]
        target.style.color = main.colour
        if main.notehead is not None:
            target.notehead = main.notehead
        if all(is_uncertain(f) for f in found):
            target.noteheadParenthesis = True
        for f in found:
            owner.addLyric(_word(f))


def _word(finding) -> str:
    word = KIND_STYLES[finding.kind].word
    if finding.kind == "wrong_pitch" and finding.played_pitch is not None:
        word = f"{word}: {pitch_name(finding.played_pitch)}"
    return word + ("?" if is_uncertain(finding) else "")


def _mark_directions(comparison, reference, score, *, include_uncertain: bool) -> None:
    from music21 import expressions

    measures = {}
    for m in score.recurse().getElementsByClass("Measure"):
        measures.setdefault(int(m.number), m)  # the top staff of a piano part
    for f in comparison.findings:
        if f.kind not in ("extra", "restart") or f.measure is None:
            continue
        if (f.kind == "extra" and f.linked_to is not None) or (is_uncertain(f) and not include_uncertain):
            continue  # the notes of an abandoned attempt are summed up by their restart
        measure = measures.get(_written_measure_number(reference, f.measure))
        if measure is None:
            continue
        if f.kind == "extra":
            text = f"{KIND_STYLES['extra'].word}: {pitch_name(f.played_pitch)}" if f.played_pitch is not None else "added"
        else:
            back = "?" if f.to_measure is None else label_of(reference, f.to_measure)
            text = f"went back to bar {back}"
        mark = expressions.TextExpression(text + ("?" if is_uncertain(f) else ""))
        mark.style.color = KIND_STYLES[f.kind].colour
        mark.placement = "above"
        offset = 0.0
        if f.beat is not None:
            ts = measure.getContextByClass("TimeSignature")
            beat_quarters = 4.0 / ts.denominator if ts is not None else 1.0
            offset = max(0.0, min((f.beat - 1.0) * beat_quarters, float(measure.highestTime)))
            offset = round(offset * DIRECTION_GRID) / DIRECTION_GRID
        measure.insert(offset, mark)


def _written_measure_number(reference: Any, measure: int) -> int:
    """Performance-order bar -> printed bar number (repeats expanded back), when labels are numeric."""
    labels = getattr(reference, "measure_labels", ()) or ()
    if 1 <= measure <= len(labels):
        try:
            return int(str(labels[measure - 1]).strip().rstrip("abcdefgh") or measure)
        except ValueError:
            return measure
    return measure


def _score_from_notes(reference: Any):
    """A simple notated part rebuilt from the reference notes (MIDI sources, test doubles)."""
    from music21 import chord, meter, note, stream

    part = stream.Part()
    signatures = getattr(reference, "time_signatures", None) or ((0.0, 4, 4),)
    part.insert(0, meter.TimeSignature(f"{int(signatures[0][1])}/{int(signatures[0][2])}"))
    grid = 1.0 / DIRECTION_GRID
    groups: dict = {}
    for n in getattr(reference, "notes", ()):
        q = round(float(n.onset_quarters) / grid) * grid
        d = max(grid, round(float(n.duration_quarters) / grid) * grid)
        groups.setdefault((q, d), []).append(int(n.pitch))
    for (q, d), pitches in sorted(groups.items()):
        element = note.Note(pitches[0]) if len(pitches) == 1 else chord.Chord(sorted(set(pitches)))
        element.quarterLength = d
        part.insert(q, element)
    made = part.makeMeasures()
    made.makeTies(inPlace=True)
    score = stream.Score()
    score.insert(0, made)
    return score


def _note_index(score) -> dict:
    """(bar number, pitch) -> list of (quarters into the bar, note, owner) for every sounding note.

    ``owner`` is the chord holding the note (lyrics go on the chord), or the note itself.
    """
    index: dict = {}
    for element in score.recurse().notes:
        measure_number = element.measureNumber
        measure = element.getContextByClass("Measure")
        if measure_number is None or measure is None:
            continue
        try:
            position = float(element.getOffsetInHierarchy(measure))
        except Exception:  # noqa: BLE001 - not inside that measure's hierarchy
            position = float(element.offset)
        members = element.notes if element.isChord else [element]
        for member in members:
            index.setdefault((int(measure_number), int(member.pitch.midi)), []).append((position, member, element))
    return index


def _find_note(index: dict, score_note: Any, reference: Any):
    """``(note, owner)`` of a reference note: same printed bar and pitch, nearest place in the bar; or None."""
    label = str(getattr(score_note, "measure_label", "") or getattr(score_note, "measure", ""))
    try:
        measure = int(label.strip().rstrip("abcdefgh"))
    except ValueError:
        measure = int(getattr(score_note, "measure", 0))
    candidates = index.get((measure, int(score_note.pitch)), [])
    if not candidates:
        return None
    starts = getattr(reference, "measure_starts", None) or ()
    bar = int(getattr(score_note, "measure", 0))
    if 1 <= bar <= len(starts) and getattr(score_note, "onset_quarters", None) is not None:
        position = float(score_note.onset_quarters) - float(starts[bar - 1])
    else:
        position = float(getattr(score_note, "beat", 1.0)) - 1.0  # quarter-note beats assumed
    best = min(candidates, key=lambda c: abs(c[0] - position))
    if abs(best[0] - position) > POSITION_TOLERANCE:
        return None
    return best[1], best[2]
