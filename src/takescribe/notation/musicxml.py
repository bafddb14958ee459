"""MusicXML 4.0 drafts through music21: bars, rests, ties, tuplets, transposition, metadata.

A :class:`~.model.Notation` holds sounding pitches. A draft for a transposing instrument
is written at written pitch with the ``<transpose>`` element (music21 transposes the
notes and the key by the instrument's interval), or at concert pitch on request. Long
drafts are built and written in blocks of bars, so memory does not grow with the take.

Conventions
-----------
Written values are split at beat lines and bar lines and tied by the rules of
:func:`_pieces` (common practice, no source); tuplet brackets and beams come from
music21's ``makeNotation`` helpers. The title, composer and part name are the
:class:`~.model.Notation`'s; a library's placeholder never reaches the file.
"""

from __future__ import annotations

import copy
import re
from fractions import Fraction
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from ..errors import OutputError
from ..notes import Note
from ..safeio import atomic_write, check_writable
from .grid import beat_of
from .model import Notation, QuantizedNote
from .spelling import spell_pitch, tonic_name

__all__ = ["to_music21", "musicxml_string", "write_musicxml", "stable_ids", "BLOCK_BARS"]

#: Bars built and exported at a time: a block's music21 objects are a few MB at most.
BLOCK_BARS = 64

_PLAIN_VALUES = [Fraction(v) for v in ("4", "3", "2", "3/2", "1", "3/4", "1/2", "3/8", "1/4", "1/8")]
_TRIPLET_VALUES = [Fraction(4, 3), Fraction(2, 3), Fraction(1, 3), Fraction(1, 6), Fraction(1, 12)]


def _pieces(start: Fraction, end: Fraction, beat: Fraction) -> list[Fraction]:
    """Split ``[start, end)`` (quarters from the bar start) into lengths a reader expects.

    Beat-aligned spans take the longest plain values; spans that start or end inside a
    beat are cut at beat lines, then greedily into triplet values when an end lies on a
    triplet grid, else plain values (common practice, no source).
    """
    plain = sorted(_PLAIN_VALUES, reverse=True)
    triplet = sorted(_TRIPLET_VALUES, reverse=True)
    out: list[Fraction] = []
    pos = start
    while pos < end:
        if pos % beat == 0 and end - pos >= beat:
            span_end = pos + ((end - pos) // beat) * beat
        else:
            span_end = min(end, (pos // beat + 1) * beat)
        remaining = span_end - pos
        in_triplets = pos.denominator % 3 == 0 or span_end.denominator % 3 == 0
        for v in (triplet + plain) if in_triplets else (plain + triplet):
            if v <= remaining and _fits(remaining - v):
                break
        else:  # not a sum of our values (off-grid input): take what is left as is
            v = remaining
        out.append(v)
        pos += v
    return out


def _fits(x: Fraction) -> bool:
    """Can ``x`` be written as a sum of our values? (multiples of a 32nd or a 16th triplet)."""
    return (x / Fraction(1, 8)).denominator == 1 or (x / Fraction(1, 12)).denominator == 1


def _m21_pitch(n: QuantizedNote, fifths: int, mode: str):
    from music21 import pitch

    step, alter, octave = n.spelling or spell_pitch(n.pitch, key_fifths=fifths, mode=mode)
    p = pitch.Pitch()
    p.step = step
    p.octave = octave
    if alter:
        p.accidental = pitch.Accidental(alter)
    return p


def _voice_events(voice: Sequence[QuantizedNote]) -> list[tuple[Fraction, Fraction, list[QuantizedNote]]]:
    groups: dict[Fraction, list[QuantizedNote]] = {}
    for n in voice:
        groups.setdefault(n.onset_quarters, []).append(n)
    out = []
    for on in sorted(groups):
        chord = groups[on]
        out.append((on, max(n.duration_quarters for n in chord), chord))
    # no overlaps inside a voice (assign_voices guarantees it; keep it safe)
    for i in range(len(out) - 1):
        if out[i][0] + out[i][1] > out[i + 1][0]:
            out[i] = (out[i][0], out[i + 1][0] - out[i][0], out[i][2])
    return out


def _fill_measure(container, events, m_start: Fraction, m_len: Fraction, beat: Fraction,
                  fifths: int, mode: str) -> None:
    """Append notes, chords and rests of one voice for one bar, with ties."""
    from music21 import chord, duration, note, tie

    m_end = m_start + m_len
    pos = m_start
    items: list[tuple[Fraction, Fraction, list | None, bool, bool]] = []
    for on, dur, ch in events:
        off = on + dur
        if off <= m_start or on >= m_end:
            continue
        a, b = max(on, m_start), min(off, m_end)
        if a > pos:
            items.append((pos, a, None, False, False))
        items.append((a, b, ch, on < m_start, off > m_end))
        pos = b
    if pos < m_end:
        items.append((pos, m_end, None, False, False))
    for a, b, ch, tied_in, tied_out in items:
        lengths = _pieces(a - m_start, b - m_start, beat)
        for i, v in enumerate(lengths):
            d = duration.Duration(v)
            if ch is None:
                el = note.Rest()
                el.duration = d
            else:
                pitches = [_m21_pitch(n, fifths, mode) for n in sorted(ch, key=lambda n: n.pitch)]
                el = note.Note(pitches[0]) if len(pitches) == 1 else chord.Chord(pitches)
                el.duration = d
                vel = int(np.mean([n.velocity for n in ch]))
                el.volume.velocity = vel
                starts = tied_in or i > 0
                continues = tied_out or i < len(lengths) - 1
                if starts and continues:
                    el.tie = tie.Tie("continue")
                elif continues:
                    el.tie = tie.Tie("start")
                elif starts:
                    el.tie = tie.Tie("stop")
            container.append(el)


def _new_part(notation: Notation, concert_pitch: bool):
    """An empty music21 part (or staff of a grand staff) with its instrument."""
    from music21 import instrument, interval, stream

    part = stream.PartStaff() if notation.grand_staff else stream.Part()
    inst = copy.deepcopy(instrument.instrumentFromMidiProgram(int(notation.midi_program)))
    inst.instrumentName = notation.instrument_name
    inst.partName = notation.part_name
    inst.midiProgram = int(notation.midi_program)
    inst.transposition = None
    if notation.transposition and not concert_pitch:
        inst.transposition = interval.Interval(int(notation.transposition))
    part.insert(0, inst)
    part.partName = notation.part_name
    part.atSoundingPitch = True
    return part


def _measure(notation: Notation, s: int, i: int, bar: tuple, previous_ts, voice_events: list,
             *, first_number: int, block_start: bool):
    """Bar ``i`` of staff ``s`` (a music21 Measure) with its signatures, marks and voices."""
    from music21 import clef, duration, key, meter, stream, tempo
    from music21.stream import makeNotation

    g = notation.grid
    m_start, m_len = bar
    num, den = g.time_signature_at(m_start)
    _, beat = beat_of(num, den)
    m = stream.Measure(number=i + first_number)
    if i == 0 or block_start:
        m.insert(0, clef.TrebleClef() if notation.clefs[s] == "treble" else clef.BassClef())
        m.insert(0, key.Key(tonic_name(notation.key_fifths, notation.key_mode), notation.key_mode))
    if (num, den) != previous_ts or block_start:
        m.insert(0, meter.TimeSignature(f"{num}/{den}"))
    if s == 0:
        for q, bpm in g.tempo_marks:
            if m_start <= q < m_start + m_len:
                _, bq = beat_of(*g.time_signature_at(q))
                m.insert(q - m_start, tempo.MetronomeMark(number=round(float(bpm) / float(bq)),
                                                          referent=duration.Duration(bq)))
    full = Fraction(4 * num, den)
    if m_len < full:
        if i == 0:
            m.paddingLeft = float(full - m_len)
        else:
            m.paddingRight = float(full - m_len)
    used = [ev for ev in voice_events if any(on < m_start + m_len and on + d > m_start for on, d, _ in ev)]
    if len(used) <= 1:
        _fill_measure(m, used[0] if used else [], m_start, m_len, beat, notation.key_fifths, notation.key_mode)
        makeNotation.makeTupletBrackets(m, inPlace=True)
    else:
        for vi, ev in enumerate(used):
            v = stream.Voice(id=str(vi + 1))
            _fill_measure(v, ev, m_start, m_len, beat, notation.key_fifths, notation.key_mode)
            makeNotation.makeTupletBrackets(v, inPlace=True)
            m.insert(0, v)
    return m, (num, den)


def _bars(notation: Notation) -> tuple[list, int]:
    """Bars ``(start, length)`` of the draft and the number of the first (0 for a pickup)."""
    g = notation.grid
    bars = g.measures_until(max(notation.bars_end_quarters(), Fraction(1, 1000)))
    num0, den0 = g.time_signature_at(Fraction(0))
    return bars, (0 if bars[0][1] < Fraction(4 * num0, den0) else 1)


def to_music21(notation: Notation, *, concert_pitch: bool = False, bar_range: tuple | None = None):
    """Build a music21 ``Score`` from a :class:`~.model.Notation` (a new one on every call).

    One ``Part`` (or two ``PartStaff`` in a brace ``StaffGroup`` for a grand staff, which
    music21 writes as one MusicXML part with two staves), bars from the grid, key and time
    signatures, tempo marks, rests filled, ties over bar lines and beats, tuplet brackets.
    ``bar_range=(a, b)`` builds bars ``a..b-1`` only (a block of a long draft). Notes are
    at sounding pitch; with a transposing instrument and not ``concert_pitch`` the
    instrument carries its interval, and music21's exporter writes written pitch.
    """
    from music21 import layout, metadata, stream

    bars, first_number = _bars(notation)
    a, b = bar_range if bar_range is not None else (0, len(bars))
    score = stream.Score()
    score.metadata = metadata.Metadata()
    score.metadata.title = notation.title or notation.part_name
    score.metadata.movementName = score.metadata.title
    if notation.composer:
        score.metadata.composer = notation.composer
    parts = []
    lo, hi = (bars[a][0], bars[b - 1][0] + bars[b - 1][1]) if b > a else (Fraction(0), Fraction(0))
    for s, staff in enumerate(notation.staves):
        part = _new_part(notation, concert_pitch)
        voice_events = [_voice_events([n for n in v if n.onset_quarters < hi and n.offset_quarters > lo])
                        for v in staff]
        previous_ts = notation.grid.time_signature_at(bars[a - 1][0]) if a > 0 else None
        for i in range(a, b):
            m, previous_ts = _measure(notation, s, i, bars[i], previous_ts, voice_events,
                                      first_number=first_number, block_start=(i == a and a > 0))
            part.append(m)
        parts.append(part)
        score.insert(0, part)
    if notation.grand_staff:
        score.insert(0, layout.StaffGroup(parts, name=notation.part_name, symbol="brace", barTogether=True))
    score.atSoundingPitch = True
    return score


_RANDOM_ID = re.compile(r'id="(I[0-9a-f]{32})"')


def stable_ids(text: str) -> str:
    """music21's random instrument and part ids (``I`` / ``P`` + 32 hex digits) renamed ``I1``, ``P1``... in order
    of first appearance, every reference to one id renamed alike: the same notation gives the
    same bytes."""
    for letter in "IP":  # instruments, and parts (a part made without an id gets a random one)
        names: dict[str, str] = {}
        for found in re.findall(rf"\b{letter}[0-9a-f]{{32}}\b", text):
            names.setdefault(found, f"{letter}{len(names) + 1}")
        text = re.sub(rf"\b{letter}[0-9a-f]{{32}}\b", lambda m: names.get(m.group(0), m.group(0)), text)
    return text


def _export(score, composer: str) -> str:
    """music21's MusicXML text of a score, without the placeholder composer it adds when none is set."""
    from music21.musicxml.m21ToXml import GeneralObjectExporter

    text = stable_ids(GeneralObjectExporter(score).parse().decode("utf-8"))
    if not composer:
        text = re.sub(r'\s*<creator type="composer">Music21</creator>', "", text, count=1)
    return text


def musicxml_string(notation: Notation, *, concert_pitch: bool = False) -> str:
    """MusicXML 4.0 text of a :class:`~.model.Notation` (music21's exporter), in one piece."""
    return _export(to_music21(notation, concert_pitch=concert_pitch), notation.composer)


_ATTRIBUTES = re.compile(r"<attributes>.*?</attributes>\s*", re.S)
_TIME = re.compile(r"<time\b.*?</time>", re.S)


def _block_measures(notation: Notation, a: int, b: int, concert_pitch: bool) -> str:
    """The ``<measure>`` elements of bars ``a..b-1``, exported as a block and cut out of it.

    The signatures repeated at the block's start (for music21's context) are dropped again,
    keeping a time signature that really changes there.
    """
    text = _export(to_music21(notation, concert_pitch=concert_pitch, bar_range=(a, b)), notation.composer)
    body = text[text.index("<measure", text.index("<part id")):text.rindex("</part>")]
    first_end = body.index("</measure>")
    head, rest = body[:first_end], body[first_end:]
    bars, _ = _bars(notation)
    changed = notation.grid.time_signature_at(bars[a - 1][0]) != notation.grid.time_signature_at(bars[a][0])

    def keep_time(match: re.Match) -> str:
        time = _TIME.search(match.group(0))
        return f"<attributes>{time.group(0)}</attributes>" if (changed and time) else ""

    return _ATTRIBUTES.sub(keep_time, head) + rest


def _write_blocks(notation: Notation, path: Path, *, force: bool, concert_pitch: bool) -> Path:
    """Write a long draft block by block: the first block's file, then the later blocks' bars."""
    bars, _ = _bars(notation)
    first = _export(to_music21(notation, concert_pitch=concert_pitch, bar_range=(0, min(BLOCK_BARS, len(bars)))),
                    notation.composer)
    if "<score-partwise" not in first or first.count("<part id") != 1:
        raise OutputError(f"{path}: music21 produced no single-part partwise MusicXML; please report this")
    cut = first.rindex("</part>")
    with atomic_write(path, force=force, mode="w") as fh:
        fh.write(first[:cut])
        for a in range(BLOCK_BARS, len(bars), BLOCK_BARS):
            fh.write(_block_measures(notation, a, min(a + BLOCK_BARS, len(bars)), concert_pitch))
        fh.write(first[cut:])
    return path


def write_musicxml(
    notation: Notation | Sequence[Note],
    path: str | Path,
    *,
    force: bool = False,
    concert_pitch: bool = False,
    **notate_options: Any,
) -> Path:
    """Write a :class:`~.model.Notation` (or notes, notated first with ``notate_options``) as MusicXML 4.0.

    Parameters
    ----------
    notation : Notation or sequence of Note
        What to write; notes are passed to :func:`takescribe.notation.notate` with
        ``notate_options`` (``reference``, ``instrument_name``, ``midi_program``,
        ``tempo``, ``time_signature``, ``key``, ``grid``...); unknown options raise ``TypeError``.
    path : path-like
        Destination ``.musicxml`` / ``.xml`` file (uncompressed).
    force : bool
        Replace an existing file.
    concert_pitch : bool
        Write a transposing instrument's draft at sounding pitch (no ``<transpose>``).

    Returns
    -------
    Path

    Raises
    ------
    OutputError
        If ``path`` exists and ``force`` is false, or cannot be written.
    """
    from .notate import notate

    path = Path(path)
    if path.suffix.lower() == ".mxl":
        raise OutputError(f"{path}: compressed MusicXML is not written; use a .musicxml or .xml name")
    check_writable(path, force=force)
    if not isinstance(notation, Notation):
        notation = notate(notation, **notate_options)
    elif notate_options:
        raise TypeError(f"options {sorted(notate_options)} apply only when notes are given, not a Notation")
    return _write_blocks(notation, path, force=force, concert_pitch=concert_pitch)
