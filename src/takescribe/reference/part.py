"""Reference parts: load one part of a MusicXML or MIDI score as timed notes.

A :class:`Reference` is the part the player was asked to play, laid out in
*performance order* (repeats expanded) with each note's position in quarter
notes, in seconds at the written tempo, and in bars and beats.

This module builds it and holds the entry points; :mod:`.model` holds the values,
:mod:`.safexml` the checks of untrusted MusicXML and :mod:`.midipart` the MIDI parts.

Conventions
-----------
- Positions are quarter notes from the start of the expanded score
  (``onset_quarters``); times are seconds at the written tempo map
  (``onset``/``offset``); pitches are MIDI numbers (A4 = 69 = 440 Hz, ISO 16).
- ``measure`` is the 1-based number of the bar in performance order (a pickup
  bar is bar 1); ``measure_label`` is the number printed in the score, so a
  repeated bar 5 played twice has two ``measure`` values and one label "5".
- ``beat`` is 1-based and counts the unit of the time signature's denominator
  (6/8 has six beats of an eighth note). In a pickup bar the beats are counted
  from the end, as players count them (a one-quarter pickup in 4/4 is beat 4).
- Without any tempo mark the written tempo is 120 quarter notes per minute,
  the default of the Standard MIDI File specification (and of music21).
- Tied notes are merged into one note. Chords give one note per pitch.
- Grace notes are kept with ``is_grace=True``: they sound for
  :data:`GRACE_QUARTERS` (a 32nd note; at most half of the following note)
  taken from the start of the note they ornament, which starts that much later
  (common practice, no source; acciaccatura and appoggiatura are treated alike).
- Ornaments (trills, mordents, turns) are kept as the written main note.
- Untrusted files: XML is checked with defusedxml before music21 sees it
  (no external entities, no entity expansion); ``.mxl`` archives are opened
  here with a size limit (:data:`MAX_XML_BYTES`) so a zip bomb cannot exhaust
  memory; member names that are absolute or contain ``..`` are refused. Every
  failure to unpack one (damaged, encrypted, unknown compression) is a
  :class:`~takescribe.errors.ScoreError`.
- Damaged values are refused before they can hang the reader: a MIDI time
  signature outside 1..64 over 1, 2, 4, ..., 64, a MIDI part longer than
  :data:`MAX_BARS` bars, a Set Tempo of 0, a MusicXML bar of more than 64 beats
  (music21 slows down steeply with the number of beats). A MusicXML tempo mark
  that is not a positive number is ignored with a :class:`ScoreWarning`.
"""

from __future__ import annotations

import re
import warnings
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Sequence

import numpy as np

from ..errors import ScoreError, ScoreWarning  # ScoreWarning re-exported: its home before the warning tree
from .midipart import _midi_candidates
from .model import (  # noqa: F401 - the values' names stay importable from here
    DEFAULT_BPM, GRACE_QUARTERS, MAX_BARS, MAX_MIDI_BYTES, MAX_XML_BYTES, MIDI_SUFFIXES, MUSICXML_SUFFIXES,
    Reference, ScoreNote, _brief, _EPS, _RawNote, _RawPart, _spell, validate_reference,
)
from .safexml import _parse_musicxml, _timewise_to_partwise  # noqa: F401 - tests reach the converter here

__all__ = [
    "ScoreNote",
    "Reference",
    "ScoreWarning",
    "load_reference",
    "load_part",
    "LoadedPart",
    "list_parts",
    "validate_reference",
    "DEFAULT_BPM",
    "GRACE_QUARTERS",
    "MAX_XML_BYTES",
    "MUSICXML_SUFFIXES",
    "MIDI_SUFFIXES",
]


# --------------------------------------------------------------------------
# raw parts to a Reference
# --------------------------------------------------------------------------
def _merge_ties(raw: list[_RawNote]) -> list[_RawNote]:
    """Merge tied notes (same staff and pitch, each starting where the previous ends)."""
    raw = sorted(raw, key=lambda r: (r.staff, r.q, r.pitch))
    out: list[_RawNote] = []
    open_ties: dict[tuple[int, int], _RawNote] = {}
    for r in raw:
        key = (r.staff, r.pitch)
        held = open_ties.get(key)
        # as music21's stripTies: a held tie also absorbs an abutting note of the same pitch that
        # lacks the "stop" (a tie written into a second ending after a repeat is expanded)
        if r.tie != "start" and held is not None and abs(held.q + held.dur - r.q) < 1e-6:
            held.dur += r.dur
            if r.tie == "stop":
                del open_ties[key]
            continue
        out.append(r)
        if r.tie in ("start", "continue"):
            open_ties[key] = r
        else:
            open_ties.pop(key, None)
    return out


def _place_graces(raw: list[_RawNote]) -> list[_RawNote]:
    """Give grace notes a short sounding length taken from the note they ornament."""
    graces: dict[tuple[int, int, float], list[_RawNote]] = {}
    mains: dict[tuple[int, int, float], list[_RawNote]] = {}
    for r in raw:
        key = (r.staff, r.voice, round(r.q, 6))
        (graces if r.is_grace else mains).setdefault(key, []).append(r)
    for key, group in graces.items():
        # a chord of grace notes shares one slot; consecutive grace notes follow each other
        chord_slots: list[list[_RawNote]] = []
        for g in group:
            if chord_slots and g.chord_with_previous:
                chord_slots[-1].append(g)
            else:
                chord_slots.append([g])
        n_slots = len(chord_slots)
        targets = mains.get(key) or []
        if targets:
            shortest = min(t.dur for t in targets)
            g = min(GRACE_QUARTERS, shortest / (2 * n_slots))
            for t in targets:
                t.q += n_slots * g
                t.dur -= n_slots * g
        else:
            g = GRACE_QUARTERS
        for k, slot in enumerate(chord_slots):
            for r in slot:
                r.q = key[2] + k * g
                r.dur = g
    return raw


def _check_time_signature(numerator: int, denominator: int, source: Path) -> None:
    # SMF 1.0 stores the denominator as a power of two; 1..64 covers every written meter
    # (whole note to 64th; common practice, no source), as does a numerator of 1..64
    if not 1 <= numerator <= 64 or denominator not in (1, 2, 4, 8, 16, 32, 64):
        den = str(denominator) if denominator < 10**6 else f"2**{denominator.bit_length() - 1}"
        raise ScoreError(
            f"{source}: impossible time signature {numerator}/{den} (expected 1..64 over 1, 2, 4, ..., 64); "
            "the file is probably damaged; re-export it"
        )


def _measure_grid(time_signatures: list, end_q: float, *, source: Path = Path("?")) -> tuple[list[float], list[str]]:
    """Bar starts from time signatures up to ``end_q`` (for files without bars, e.g. MIDI).

    Raises :class:`ScoreError` for an impossible time signature or more than :data:`MAX_BARS` bars.
    """
    ts = sorted(time_signatures)
    for _, numerator, denominator in ts:
        _check_time_signature(int(numerator), int(denominator), source)
    starts: list[float] = []
    q = 0.0
    k = 0
    while q < end_q - _EPS or not starts:
        if len(starts) >= MAX_BARS:
            raise ScoreError(
                f"{source}: the part would last more than {MAX_BARS} bars (its last note ends "
                f"{end_q:.0f} quarter notes in); the file is probably damaged; re-export it"
            )
        while k + 1 < len(ts) and ts[k + 1][0] <= q + _EPS:
            k += 1
        starts.append(q)
        bar = ts[k][1] * 4.0 / ts[k][2]
        nxt = q + bar
        # a time signature change in the middle of a bar starts a new bar there
        if k + 1 < len(ts) and q + _EPS < ts[k + 1][0] < nxt - _EPS:
            nxt = ts[k + 1][0]
        q = nxt
    starts.append(q)
    return starts, [str(i + 1) for i in range(len(starts) - 1)]


def _build_reference(raw: _RawPart, source: Path) -> Reference:
    if not raw.notes:
        raise ScoreError(
            f"{source}: part {raw.name!r} has no notes; choose another part (see list_parts) or check the file"
        )
    tempo_map = sorted({round(q, 9): (float(q), float(b)) for q, b in raw.tempo_map}.values())
    if not tempo_map or tempo_map[0][0] > _EPS:
        tempo_map.insert(0, (0.0, DEFAULT_BPM))
    tempo_map = [tm for k, tm in enumerate(tempo_map) if k == 0 or tm[1] != tempo_map[k - 1][1]]
    tsigs = sorted({round(q, 9): (float(q), int(n), int(d)) for q, n, d in raw.time_signatures}.values())
    if not tsigs or tsigs[0][0] > _EPS:
        tsigs.insert(0, (0.0, 4, 4))
    skeleton = Reference(
        notes=(), tempo_map=tuple(tempo_map), time_signatures=tuple(tsigs),
        measure_starts=tuple(float(x) for x in raw.measure_starts),
    )
    kept = [r for r in raw.notes if r.dur > _EPS]
    kept.sort(key=lambda r: (r.q, r.pitch, r.staff, r.voice))
    q_on = np.array([r.q for r in kept])
    q_off = q_on + np.array([r.dur for r in kept])
    t_on = np.atleast_1d(skeleton.quarters_to_seconds(q_on))
    t_off = np.atleast_1d(skeleton.quarters_to_seconds(q_off))
    measures, beats = skeleton.measure_beat(q_on)
    measures = np.atleast_1d(measures)
    beats = np.atleast_1d(beats)
    labels = list(raw.measure_labels)
    notes = []
    for i, r in enumerate(kept):
        m = int(measures[i])
        notes.append(ScoreNote(
            pitch=int(r.pitch), onset_quarters=float(r.q), duration_quarters=float(r.dur),
            onset=float(t_on[i]), offset=float(t_off[i]), measure=m,
            measure_label=labels[m - 1] if 0 < m <= len(labels) else str(m),
            beat=float(beats[i]), staff=int(r.staff), voice=int(r.voice), spelling=r.spelling,
            index=i, is_grace=bool(r.is_grace),
        ))
    return Reference(
        notes=tuple(notes), tempo_map=tuple(tempo_map), time_signatures=tuple(tsigs),
        measure_starts=tuple(float(x) for x in raw.measure_starts), key_fifths=int(raw.key_fifths),
        mode=raw.mode, part_name=raw.name, instrument_name=raw.instrument_name,
        midi_program=raw.midi_program, source=str(source), measure_labels=tuple(labels),
    )


def _select(names: Sequence[str], part: object, source: Path) -> int:
    listing = ", ".join(f"{i}: {n!r}" for i, n in enumerate(names))
    if part is None:
        if len(names) > 1:
            warnings.warn(
                f"{source}: has {len(names)} parts ({listing}); using the first, {names[0]!r}. "
                "Choose another with part=<name or number>.",
                ScoreWarning, stacklevel=3,
            )
        return 0
    if isinstance(part, bool) or not isinstance(part, (int, np.integer, str)):
        raise TypeError(f"part must be a part name, a 0-based index or None, got {type(part).__name__}")
    if isinstance(part, str) and part.strip().isdigit():
        part = int(part.strip())
    if isinstance(part, (int, np.integer)):
        if not 0 <= int(part) < len(names):
            raise ScoreError(
                f"{source}: there is no part number {int(part)}; the parts are {listing} (numbers start at 0)"
            )
        return int(part)
    hits = [i for i, n in enumerate(names) if n.strip().lower() == part.strip().lower()]
    if not hits:
        raise ScoreError(f"{source}: there is no part named {part!r}; the parts are {listing}")
    if len(hits) > 1:
        raise ScoreError(
            f"{source}: several parts are named {part!r} ({listing}); choose one by its number"
        )
    return hits[0]


def _group_parts(score) -> list[tuple[str, list]]:
    """Parts of a music21 score, with the staves of one instrument (PartStaff) grouped."""
    groups: list[tuple[str, list]] = []
    index: dict[str, int] = {}
    for p in score.parts:
        pid = str(p.id)
        m = re.match(r"^(.*)-Staff\d+$", pid)
        key = m.group(1) if m else pid
        if key in index:
            groups[index[key]][1].append(p)
        else:
            index[key] = len(groups)
            name = (p.partName or "").strip() or (p.partAbbreviation or "").strip() or f"Part {len(groups) + 1}"
            groups.append((name, [p]))
    return groups


def _expand(score, path: Path):
    try:
        return score.expandRepeats()
    except Exception as exc:  # music21 repeat expansion fails on some hand-made scores
        warnings.warn(
            f"{path}: could not expand the repeats ({_brief(exc)}); using the written order, "
            "so bar numbers follow the page and repeated bars appear once",
            ScoreWarning, stacklevel=4,
        )
        return score


def _raw_notes(staves) -> list[_RawNote]:
    """Every pitched note and chord member of the staves, in quarters, ties not yet merged."""
    from music21 import chord, note, stream

    raw: list[_RawNote] = []
    for staff_number, staff in enumerate(staves, start=1):
        for m in staff.getElementsByClass(stream.Measure):
            containers = [(int(v.id) if str(v.id).isdigit() else i + 1, v, float(v.offset))
                          for i, v in enumerate(m.voices)]
            containers.append((1, m, 0.0))
            for voice_number, container, c_off in containers:
                for el in container.getElementsByClass((note.Note, chord.Chord)):
                    if isinstance(el, (note.Unpitched,)) or el.__class__.__name__ == "PercussionChord":
                        continue
                    q = float(m.offset) + c_off + float(el.offset)
                    dur = float(el.quarterLength)
                    is_grace = bool(el.duration.isGrace)
                    members = list(el.notes) if isinstance(el, chord.Chord) else [el]
                    for k, n in enumerate(members):
                        tie = n.tie if n.tie is not None else (el.tie if isinstance(el, chord.Chord) else None)
                        spelling = n.pitch.nameWithOctave.replace("-", "b")
                        r = _RawNote(pitch=int(round(n.pitch.ps)), q=q, dur=dur, staff=staff_number,
                                     voice=voice_number, spelling=spelling, is_grace=is_grace,
                                     tie=tie.type if tie is not None else None)
                        if is_grace and k > 0:
                            r.chord_with_previous = True
                        raw.append(r)
    return raw


def _musicxml_part(score, group_index: int, path: Path, written=None) -> _RawPart:
    from music21 import key, meter, stream, tempo

    name, staves = _group_parts(score)[group_index]
    first = staves[0]
    measures = list(first.getElementsByClass(stream.Measure))
    measure_starts = [float(m.offset) for m in measures]
    if measures:
        last = measures[-1]
        bar_end = float(last.offset + max(last.duration.quarterLength, last.highestTime))
        measure_starts.append(bar_end)
    # music21 marks repeated bars with suffixes "a", "b"...; the label is the printed one
    printed_suffix = {}
    if written is not None:
        written_first = _group_parts(written)[group_index][1][0]
        printed_suffix = {m.number: (m.numberSuffix or "") for m in written_first.getElementsByClass(stream.Measure)}
    measure_labels = [f"{m.number}{printed_suffix.get(m.number, m.numberSuffix or '')}" for m in measures]

    # a printed metronome mark wins over a playback-only <sound tempo> at the same place:
    # the reference is timed at the *written* tempo
    tempo_marks: dict[float, tuple[int, float]] = {}
    for p in score.parts:
        for m in p.getElementsByClass(stream.Measure):
            for mm in m.recurse().getElementsByClass(tempo.MetronomeMark):
                try:
                    bpm = mm.getQuarterBPM()
                except (ArithmeticError, ValueError, TypeError):  # a mark of 0 per minute divides by zero
                    bpm = float("nan")
                if bpm is not None and not (np.isfinite(bpm) and bpm > 0):
                    warnings.warn(
                        f"{path}: ignoring a tempo mark of {mm.number} per minute in bar {m.number} "
                        "(not a positive number)", ScoreWarning, stacklevel=4,
                    )
                    bpm = None
                if bpm:
                    q = round(float(m.offset + mm.getOffsetInHierarchy(m)), 9)
                    printed = 0 if (mm.number is not None and mm.numberImplicit is False) else 1
                    if q not in tempo_marks or printed < tempo_marks[q][0]:
                        tempo_marks[q] = (printed, float(bpm))
    time_sigs = []
    key_fifths, mode = 0, None
    found_key = False
    for m in measures:
        for ts in m.getElementsByClass(meter.TimeSignature):
            time_sigs.append((float(m.offset + ts.offset), int(ts.numerator), int(ts.denominator)))
        if not found_key:
            for ks in m.recurse().getElementsByClass(key.KeySignature):
                key_fifths = int(ks.sharps)
                mode = getattr(ks, "mode", None) if isinstance(ks, key.Key) else None
                found_key = True
                break

    instrument = first.getInstrument(returnDefault=False)
    inst_name = (getattr(instrument, "instrumentName", None) or name) if instrument else name
    program = getattr(instrument, "midiProgram", None) if instrument else None

    raw = _raw_notes(staves)
    raw = [r for r in raw if 0 <= r.pitch <= 127]
    raw = _merge_ties([r for r in raw if not r.is_grace]) + [r for r in raw if r.is_grace]
    raw = _place_graces(raw)
    return _RawPart(
        name=name, instrument_name=str(inst_name), midi_program=int(program) if program is not None else None,
        notes=raw, tempo_map=sorted((q, b) for q, (_, b) in tempo_marks.items()), time_signatures=time_sigs,
        measure_starts=measure_starts, measure_labels=measure_labels, key_fifths=key_fifths, mode=mode,
    )


# --------------------------------------------------------------------------
# public entry points
# --------------------------------------------------------------------------
def _check_path(path) -> Path:
    if not isinstance(path, (str, Path)) and not hasattr(path, "__fspath__"):
        raise TypeError(f"path must be a file path, got {type(path).__name__}")
    path = Path(path)
    if not path.exists():
        raise ScoreError(f"{path}: no such file; check the path to the reference part")
    if path.is_dir():
        raise ScoreError(f"{path}: is a folder; give the MusicXML (.musicxml, .xml, .mxl) or MIDI (.mid) file")
    suffix = path.suffix.lower()
    if suffix not in MUSICXML_SUFFIXES + MIDI_SUFFIXES:
        raise ScoreError(
            f"{path}: unknown reference format {suffix or '(no suffix)'}; use MusicXML "
            "(.musicxml, .xml, .mxl) or MIDI (.mid, .midi)"
        )
    return path


def list_parts(path) -> list[str]:
    """Names of the parts in a MusicXML or MIDI file, in score order.

    Parameters
    ----------
    path : path-like
        ``.musicxml``, ``.xml``, ``.mxl``, ``.mid`` or ``.midi``.

    Returns
    -------
    list of str
        One name per part (the two staves of a piano are one part). MIDI tracks
        without pitched notes are left out; unnamed tracks are ``"Track N"``.

    Raises
    ------
    ScoreError
        If the file cannot be read safely or is not a score.
    """
    path = _check_path(path)
    if path.suffix.lower() in MIDI_SUFFIXES:
        return [p.name for p in _midi_candidates(path)[0]]
    return [name for name, _ in _group_parts(_parse_musicxml(path))]


@dataclass(frozen=True)
class LoadedPart:
    """A part read once: its notes in performance order and, for MusicXML, the notation.

    Attributes
    ----------
    reference : Reference
    written : music21.stream.Score or None
        The chosen part alone (its staves grouped), in written order, as parsed from the
        checked XML; None for MIDI. Later stages (the report) take it from here instead of
        reading the file again. Treat it as read-only: copy it before changing it.
    title : str
        The score's title (work or movement title) when the file gives one, else "".
    """

    reference: Reference
    written: object = None
    title: str = ""


def load_part(path, *, part: int | str | None = None) -> LoadedPart:
    """:func:`load_reference` that also keeps the parsed notation of the part (one read, same checks)."""
    path = _check_path(path)
    if path.suffix.lower() in MIDI_SUFFIXES:
        return LoadedPart(load_reference(path, part=part))
    from music21 import stream

    score = _parse_musicxml(path)
    groups = _group_parts(score)
    if not groups:
        raise ScoreError(f"{path}: the MusicXML file has no parts; export the score with its parts")
    index = _select([name for name, _ in groups], part, path)
    reference = _reference_from_score(score, index, path)
    written = stream.Score()
    for staff in groups[index][1]:
        written.insert(0, staff)
    metadata = getattr(score, "metadata", None)
    title = ""
    if metadata is not None:
        title = str(metadata.title or metadata.movementName or "").strip()
    return LoadedPart(reference, written, title)


def _reference_from_score(score, index: int, path: Path) -> Reference:
    header, score = _header_at_sounding_pitch(score, index)
    expanded = _expand(score, path)
    if len(_group_parts(expanded)) != len(_group_parts(score)):
        expanded = score
    return replace(_build_reference(_musicxml_part(expanded, index, path, written=score), path), **header)


def _header_at_sounding_pitch(score, index: int):
    """Title, composer and the chosen part's transposition; the score at sounding pitch
    (music21 moves the notes and key signatures of parts read with ``<transpose>``)."""
    md = score.metadata
    title = str((md.title or md.movementName or "") if md is not None else "").strip()
    composer = str((md.composer or "") if md is not None else "").strip()
    # a library's placeholders are no title (music21 writes them when a score has none)
    title = "" if title == "Music21 Fragment" else title
    composer = "" if composer == "Music21" else composer
    chosen = _group_parts(score)[index][1][0]
    inst = chosen.getInstrument(returnDefault=False)
    interval = getattr(inst, "transposition", None) if inst is not None else None
    # only a part written transposed (read with <transpose>) has one: music21 gives an instrument
    # found by name ("Clarinet in B-flat") its usual transposition even in a concert-pitch score
    semitones = int(interval.semitones) if interval is not None and chosen.atSoundingPitch is False else 0
    if any(p.atSoundingPitch is False for p in score.parts):
        score = score.toSoundingPitch()
    return {"title": title, "composer": composer, "transposition": semitones}, score


def load_reference(path, *, part: int | str | None = None) -> Reference:
    """Load one part of a MusicXML or MIDI score in performance order.

    Parameters
    ----------
    path : path-like
        ``.musicxml``, ``.xml``, ``.mxl`` (read with music21) or ``.mid``/``.midi`` (read with mido).
    part : str, int or None
        Part name (case-insensitive) or 0-based number (an int or a string of
        digits). ``None`` takes the first part, with a :class:`ScoreWarning`
        when there are several.

    Returns
    -------
    Reference

    Raises
    ------
    ScoreError
        File missing, unreadable, unsafe (XML entities, zip bomb), not MusicXML
        or MIDI, unknown part (the message lists the parts), or a part with no notes.

    Examples
    --------
    >>> from music21 import corpus
    >>> ref = load_reference(corpus.getWork("bach/bwv66.6"), part="Soprano")  # doctest: +SKIP
    >>> ref.notes[0].spelling  # doctest: +SKIP
    'C#5'
    """
    path = _check_path(path)
    if path.suffix.lower() in MIDI_SUFFIXES:
        parts, tempo_map, time_sigs, fifths, mode = _midi_candidates(path)
        chosen = parts[_select([p.name for p in parts], part, path)]
        for r in chosen.notes:
            r.spelling = _spell(r.pitch, fifths)
        if not time_sigs:
            time_sigs = [(0.0, 4, 4)]  # SMF default when no time signature is given
        end_q = max(r.q + r.dur for r in chosen.notes)
        starts, labels = _measure_grid(time_sigs if time_sigs[0][0] <= _EPS else [(0.0, 4, 4)] + time_sigs, end_q,
                                       source=path)
        chosen.tempo_map = tempo_map
        chosen.time_signatures = time_sigs
        chosen.measure_starts = starts
        chosen.measure_labels = labels
        chosen.key_fifths = fifths
        chosen.mode = mode
        return _build_reference(chosen, path)

    score = _parse_musicxml(path)
    names = [name for name, _ in _group_parts(score)]
    if not names:
        raise ScoreError(f"{path}: the MusicXML file has no parts; export the score with its parts")
    return _reference_from_score(score, _select(names, part, path), path)
