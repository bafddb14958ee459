"""Quantized notation: from timed notes to a draft that reads like music.

Steps (each a module of this package, functions on plain values):

1. :mod:`.grid` / :mod:`.meter`: a :class:`~.grid.BeatGrid` from the part and its
   alignment, or estimated from the take's onset evidence and the notes.
2. :mod:`.from_part`: with a part, played notes take the part's values (the draft is the
   part with the player's deviations in it); :mod:`.quantize` puts the other notes on the
   grid and gives them written values from musical intent.
3. :mod:`.spelling`: key (the part's, or a Krumhansl–Schmuckler estimate) and spelling.
4. :mod:`.staves`: piano notes split between the hands, voices within a staff.
5. :mod:`.musicxml`: MusicXML 4.0 through music21, block by block.

Conventions
-----------
- Times are seconds of the take; score positions are quarter notes as
  :class:`fractions.Fraction`; pitches are MIDI numbers at sounding pitch.
- The ``tempo=`` overrides count quarter notes per minute.
- A reference part is anything with the attributes of
  :class:`takescribe.reference.part.Reference` used here; ``notes``, ``title``,
  ``composer`` and ``transposition`` are optional. With a reference, bars, time
  signatures, tempo marks, key, names and written values come from the part.
- Piano programs (General MIDI 0–7) get a grand staff: one part, two staves.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from fractions import Fraction
from typing import Any, Sequence

import numpy as np

from ..errors import InputError
from ..notes import Note, sort_notes, validate_notes
from .from_part import match_part, part_end_quarters
from .grid import GRID_NAMES, BeatGrid, beat_of, grid_from_reference, grid_from_times, parse_time_signature
from .meter import estimate_meter
from .model import Notation, NotationWarning, QuantizedNote
from .quantize import quantize, written_values
from .spelling import estimate_key, spell_pitch, spell_voice
from .staves import assign_voices, split_hands

__all__ = ["notate", "is_decaying_program"]

# the names importable from this module before the split (0.1), kept for one release
from .musicxml import musicxml_string, to_music21, write_musicxml  # noqa: E402,F401

_PIANO_PROGRAMS = range(0, 8)
# General MIDI programs whose sound decays by itself (pianos, chromatic percussion, guitars,
# basses, pizzicato, harp, timpani, ethnic plucked, percussive): their measured ends say little
_DECAYING_PROGRAMS = frozenset(list(range(0, 16)) + list(range(24, 40)) + [45, 46, 47]
                               + list(range(104, 109)) + list(range(112, 120)))
# written -> sounding semitones of the General MIDI programs usually written transposed
# (soprano sax, alto sax, tenor sax, baritone sax, trumpet, French horn, clarinet in B-flat):
# common practice, no source; a part's own <transpose> always wins
_TRANSPOSING_PROGRAMS = {64: -2, 65: -9, 66: -14, 67: -21, 56: -2, 60: -7, 71: -2}
# a staff is treble when its median pitch is at least A3 (common practice, no source)
_TREBLE_FROM = 57
# without a part, an unplaced note joins the top staff from middle C up
_MIDDLE_C = 60


def is_decaying_program(program: int) -> bool:
    """Does the General MIDI program's sound decay by itself (struck or plucked)?"""
    return int(program) in _DECAYING_PROGRAMS


@dataclass(frozen=True)
class _Names:
    instrument_name: str
    part_name: str
    midi_program: int
    title: str
    composer: str
    transposition: int


def _names(reference: Any, *, instrument_name: str, part_name: str | None, midi_program: int,
           title: str | None, composer: str | None, transposition: int | None) -> _Names:
    """Names in the score: the part's win, then the caller's (the take's file name)."""
    if reference is not None:
        instrument_name = getattr(reference, "instrument_name", None) or instrument_name
        part_name = getattr(reference, "part_name", None) or part_name
        if getattr(reference, "midi_program", None) is not None:
            midi_program = int(reference.midi_program)
        title = getattr(reference, "title", None) or title
        composer = getattr(reference, "composer", None) or composer
        if transposition is None:
            transposition = getattr(reference, "transposition", None)
    if transposition is None and reference is None:
        transposition = _TRANSPOSING_PROGRAMS.get(int(midi_program), 0)
    part_name = part_name or instrument_name
    return _Names(str(instrument_name), str(part_name), int(midi_program), str(title or part_name),
                  str(composer or ""), int(transposition or 0))


def _beat_grid(notes: list, *, reference: Any, alignment: Any, onsets: Any, tempo: float | None,
               time_signature: object) -> BeatGrid:
    if reference is not None:
        return grid_from_reference(reference, alignment, last_seconds=max((n.offset for n in notes), default=0.0))
    if notes or onsets is not None:
        return estimate_meter(notes, onsets=onsets, tempo=tempo, time_signature=time_signature)
    ts = parse_time_signature(time_signature or "4/4")
    period = 60.0 / (tempo or 120.0) * float(beat_of(*ts)[1])
    return grid_from_times(period * np.arange(8), num=ts[0], den=ts[1], downbeat_index=0)


def _key(qnotes: list, reference: Any, key: tuple | None) -> tuple[int, str]:
    if key is not None:
        fifths, mode = int(key[0]), str(key[1])
        spell_pitch(60, key_fifths=fifths, mode=mode)  # validates
        return fifths, mode
    if reference is not None and getattr(reference, "mode", None) in ("major", "minor"):
        return int(reference.key_fifths), str(reference.mode)
    if reference is not None and getattr(reference, "key_fifths", None) is not None:
        return estimate_key(qnotes, key_fifths=int(reference.key_fifths))
    return estimate_key(qnotes)


def _staff_notes(placed: Sequence, unplaced: list, *, grand_staff: bool) -> list[list[QuantizedNote]]:
    """Notes per staff: the part's staves for placed notes when it has two, else by hand."""
    if not grand_staff:
        return [[q for q, _ in placed] + unplaced]
    if any(staff == 2 for _, staff in placed):
        top = [q for q, staff in placed if staff != 2] + [q for q in unplaced if q.pitch >= _MIDDLE_C]
        bottom = [q for q, staff in placed if staff == 2] + [q for q in unplaced if q.pitch < _MIDDLE_C]
        return [top, bottom]
    right, left = split_hands([q for q, _ in placed] + unplaced)
    return [right, left]


def _checked(notes: Sequence[Note], *, midi_program: object, grid: str | None) -> list[Note]:
    """Validated, sorted notes; a warning when there are none."""
    notes = sort_notes(validate_notes(notes))
    if not notes:
        warnings.warn("no notes to notate: the score will hold empty bars", NotationWarning, stacklevel=3)
    if not isinstance(midi_program, (int, np.integer)) or not 0 <= int(midi_program) <= 127:
        raise InputError(f"midi_program must be a General MIDI program in range 0..127, got {midi_program!r}")
    if grid is not None and grid not in GRID_NAMES:
        raise InputError(f"grid {grid!r} is unknown; use one of {', '.join(GRID_NAMES)}")
    return notes


def _layout(placed: Sequence, unplaced: list, grid: BeatGrid, *, grand_staff: bool, measured: bool,
            key: tuple[int, str], transposition: int) -> tuple[tuple, tuple]:
    """Staves (voices of spelled notes with written values) and their clefs."""
    fixed = frozenset(q for q, _ in placed)

    def voiced(staff_notes: list) -> tuple:
        valued = written_values(staff_notes, grid, measured_offsets=measured, fixed=fixed)
        return tuple(tuple(spell_voice(v, key_fifths=key[0], mode=key[1])) for v in assign_voices(valued))

    staves = tuple(voiced(s) for s in _staff_notes(placed, unplaced, grand_staff=grand_staff))
    if grand_staff:
        return staves, ("treble", "bass")
    pitches = [n.pitch for v in staves[0] for n in v]
    median = float(np.median(pitches)) if pitches else 65.0
    return staves, ("treble" if median - transposition >= _TREBLE_FROM else "bass",)


def _warn_beyond_part(notes: list, grid: BeatGrid, reference: Any) -> None:
    """State a take that goes on past the part's end (those bars are notated without it)."""
    end_q = part_end_quarters(reference)
    if not notes or end_q <= 0:
        return
    end_s = float(grid.quarters_to_seconds(np.array([float(end_q)]))[0])
    beyond = [n for n in notes if n.onset > end_s + 60.0 / max(grid.bpm, 1e-3)]
    if beyond:
        warnings.warn(
            f"the take goes on for {notes[-1].offset - end_s:.0f} s after the end of the part "
            f"({len(beyond)} notes): those bars are notated without the part, at the take's last tempo",
            NotationWarning, stacklevel=3)


def notate(
    notes: Sequence[Note],
    *,
    reference: Any = None,
    alignment: Any = None,
    onsets: Any = None,
    instrument_name: str = "Piano",
    part_name: str | None = None,
    midi_program: int = 0,
    grand_staff: bool | None = None,
    tempo: float | None = None,
    time_signature: object | None = None,
    key: tuple[int, str] | None = None,
    grid: str | None = None,
    measured_offsets: bool | None = None,
    title: str | None = None,
    composer: str | None = None,
    transposition: int | None = None,
) -> Notation:
    """Quantize, spell and voice transcribed notes into a :class:`~.model.Notation`.

    Parameters
    ----------
    notes : sequence of Note
        Transcribed notes in take seconds, at sounding pitch.
    reference : takescribe.reference.part.Reference, optional
        The written part: its bars, time signatures, tempo marks, key, names and written
        values are used.
    alignment : takescribe.alignment.align.Alignment, optional
        Take ↔ score time map for ``reference`` (identity when None).
    onsets : takescribe.features.onsets.OnsetStrength, optional
        The take's onset evidence, for beat tracking when there is no reference.
    instrument_name, part_name, title, composer : str
        Names in the score (the reference's win when it has them; the title defaults to
        the part name; pass the take's file name).
    midi_program : int
        General MIDI program 0..127 (the reference's wins when given).
    grand_staff : bool or None
        Two staves split by hand; None: True for the piano programs 0–7.
    tempo : float, optional
        Quarter notes per minute, overriding the estimate.
    time_signature : str or (int, int), optional
        Overrides the meter guess, e.g. ``"6/8"``.
    key : (int, str), optional
        ``(fifths, mode)`` of the concert-pitch key, overriding the reference and the estimate.
    grid : str, optional
        Force one quantization grid (a name of :data:`~.grid.GRID_NAMES`).
    measured_offsets : bool or None
        Trust the measured note ends (sustaining instruments); None: from ``midi_program``.
    transposition : int, optional
        Semitones written → sounding (-2 for a B-flat clarinet); the reference's when None.

    Returns
    -------
    Notation
    """
    notes = _checked(notes, midi_program=midi_program, grid=grid)
    names = _names(reference, instrument_name=instrument_name, part_name=part_name, midi_program=int(midi_program),
                   title=title, composer=composer, transposition=transposition)
    beat_grid = _beat_grid(notes, reference=reference, alignment=alignment, onsets=onsets, tempo=tempo,
                           time_signature=time_signature)
    measured = not is_decaying_program(names.midi_program) if measured_offsets is None else bool(measured_offsets)
    match = match_part(notes, reference, alignment, beat_grid, measured_offsets=measured) if reference is not None \
        else None
    placed = match.placed if match is not None else ()
    unplaced = quantize(match.unplaced if match is not None else notes, beat_grid, subdivisions=grid,
                        measured_offsets=measured)
    fifths, mode = _key([q for q, _ in placed] + unplaced, reference, key)
    if grand_staff is None:
        grand_staff = names.midi_program in _PIANO_PROGRAMS
    staves, clefs = _layout(placed, unplaced, beat_grid, grand_staff=bool(grand_staff), measured=measured,
                            key=(fifths, mode), transposition=names.transposition)
    if reference is not None:
        _warn_beyond_part(notes, beat_grid, reference)
    return Notation(grid=beat_grid, key_fifths=fifths, key_mode=mode, staves=staves, clefs=clefs,
                    part_name=names.part_name, instrument_name=names.instrument_name,
                    midi_program=names.midi_program, title=names.title, composer=names.composer,
                    transposition=names.transposition,
                    min_end_quarters=part_end_quarters(reference) if reference is not None else Fraction(0))
